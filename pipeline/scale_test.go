package pipeline

import (
	"bytes"
	"context"
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"trackfactor/export"
	"trackfactor/track"
	"trackfactor/track/synth"
)

// farApartIn returns two used tracks observed in frame f, the pair
// farthest apart in that frame among the first 40, with their positions.
func farApartIn(t *testing.T, used []track.Track, f int) (a, b int, pa, pb [2]float64) {
	t.Helper()
	type seen struct {
		id int
		p  [2]float64
	}
	var in []seen
	for _, tr := range used {
		for _, o := range tr.Obs {
			if o.Frame == f {
				in = append(in, seen{tr.ID, [2]float64{o.X, o.Y}})
			}
		}
	}
	if len(in) < 2 {
		t.Fatalf("%d used tracks in frame %d", len(in), f)
	}
	in = in[:min(40, len(in))]
	best := -1.0
	for i := range in {
		for j := i + 1; j < len(in); j++ {
			if d := math.Hypot(in[i].p[0]-in[j].p[0], in[i].p[1]-in[j].p[1]); d > best {
				best, a, b, pa, pb = d, in[i].id, in[j].id, in[i].p, in[j].p
			}
		}
	}
	return
}

// A reference length given as two image points in a named frame stands
// for the tracks observed nearest to them: the result is the same, to the
// byte, as giving those two track ids (points 0.5 px off the tracked
// positions, well inside DefaultSnapPx), and the JSON says which tracks
// were used and how far the points were from them. The frame may be named
// by file name or by index. Points far from every track, an unknown frame
// and two points on one track are input errors that say what to do.
// (Whether a reference length gives correct distances is checked against
// the part's handbook geometry in factor/bundle's
// TestReferenceLengthReproducesDistances.)
func TestReferenceByImagePoints(t *testing.T) {
	_, dir := renderScene(t, synth.Options{Frames: 12, Width: 320, Height: 240, StepDeg: 1.5, NoiseSigma: 1, Seed: 21})
	ctx := context.Background()
	base, err := Run(ctx, Config{Input: dir})
	if err != nil {
		t.Fatal(err)
	}
	const f = 5
	a, b, pa, pb := farApartIn(t, base.Window.Tracks, f)
	off := [2]float64{0.4, -0.3} // 0.5 px
	shift := func(p [2]float64) [2]float64 { return [2]float64{p[0] + off[0], p[1] + off[1]} }
	t.Logf("tracks %d at (%.1f, %.1f) and %d at (%.1f, %.1f) in frame %d", a, pa[0], pa[1], b, pb[0], pb[1], f)

	byIDs, err := Run(ctx, Config{Input: dir, Refine: RefineConfig{Reference: &Reference{TrackA: a, TrackB: b, Length: 25.4}}})
	if err != nil {
		t.Fatal(err)
	}
	for _, name := range []string{strconv.Itoa(f), filepath.Base(base.Set.Frames[f])} {
		ref := &Reference{Frame: name, A: shift(pa), B: shift(pb), Length: 25.4}
		byPts, err := Run(ctx, Config{Input: dir, Refine: RefineConfig{Reference: ref}})
		if err != nil {
			t.Fatalf("frame %q: %v", name, err)
		}
		u := byPts.Refinement.Reference
		if u == nil || u.Frame != f || u.TrackA != a || u.TrackB != b {
			t.Fatalf("frame %q: reference resolved to %+v, want tracks %d and %d in frame %d", name, u, a, b, f)
		}
		if math.Abs(u.SnapA-0.5) > 1e-9 || math.Abs(u.SnapB-0.5) > 1e-9 {
			t.Errorf("snap distances %.12f, %.12f px, want 0.5", u.SnapA, u.SnapB)
		}
		var j1, j2 bytes.Buffer
		if err := export.WriteJSON(&j1, byIDs.Doc); err != nil {
			t.Fatal(err)
		}
		if err := export.WriteJSON(&j2, byPts.Doc); err != nil {
			t.Fatal(err)
		}
		var d1, d2 map[string]json.RawMessage
		json.Unmarshal(j1.Bytes(), &d1)
		json.Unmarshal(j2.Bytes(), &d2)
		for _, k := range []string{"points", "cameras", "units"} {
			if !bytes.Equal(d1[k], d2[k]) {
				t.Errorf("frame %q: %s differ between the track-id and the image-point reference", name, k)
			}
		}
		var sc struct {
			Unit      string `json:"unit"`
			Reference *struct {
				Frame  int `json:"frame"`
				TrackA int `json:"track_a"`
				TrackB int `json:"track_b"`
			} `json:"reference"`
		}
		if err := json.Unmarshal(byPts.Doc.Diagnostics.Scale, &sc); err != nil {
			t.Fatal(err)
		}
		if r := sc.Reference; sc.Unit != "mm" || r == nil || r.Frame != f || r.TrackA != a || r.TrackB != b {
			t.Errorf("diagnostics.scale %s: want unit mm and the reference's frame and tracks", byPts.Doc.Diagnostics.Scale)
		}
	}

	bad := []struct {
		name string
		ref  Reference
		says string
	}{
		{"far", Reference{Frame: strconv.Itoa(f), A: [2]float64{-50, -50}, B: pb, Length: 1}, "px away"},
		{"unknown frame", Reference{Frame: "nope.png", A: pa, B: pb, Length: 1}, "not one of the 12 frames"},
		{"one track", Reference{Frame: strconv.Itoa(f), A: pa, B: shift(pa), Length: 1}, "both reference points"},
	}
	for _, c := range bad {
		out := filepath.Join(t.TempDir(), "out")
		_, err := Run(ctx, Config{Input: dir, Out: out, Refine: RefineConfig{Reference: &c.ref}})
		if err == nil || !strings.Contains(err.Error(), c.says) {
			t.Errorf("%s: error %v, want one saying %q", c.name, err, c.says)
		}
		if _, ok := err.(*InputError); !ok {
			t.Errorf("%s: %T, want an input error", c.name, err)
		}
		if _, serr := os.Stat(out); serr == nil {
			t.Errorf("%s: the failed run created %s", c.name, out)
		}
	}
}

// With PLYSigma, points.ply carries a "sigma" vertex property equal (as
// float32) to each point's sigma in reconstruction.json, and −1 where the
// JSON has none; the header says what the property is. Read back with the
// package's own PLY reader, which is checked against the PLY format
// description (Turk, 1994) in package export.
func TestPLYSigmaProperty(t *testing.T) {
	_, dir := renderScene(t, synth.Options{Frames: 12, Width: 320, Height: 240, StepDeg: 1.5, NoiseSigma: 1, Seed: 21})
	out := filepath.Join(t.TempDir(), "out")
	res, err := Run(context.Background(), Config{Input: dir, Out: out, PLYSigma: true, PLYASCII: true})
	if err != nil {
		t.Fatal(err)
	}
	f, err := os.Open(filepath.Join(out, export.FilePoints))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	ply, err := export.ReadPLY(f)
	if err != nil {
		t.Fatal(err)
	}
	var sigma []float64
	for _, e := range ply.Elements {
		for _, p := range e.Properties {
			if e.Name == "vertex" && p.Name == "sigma" {
				sigma = p.Scalar
			}
		}
	}
	if len(sigma) != len(res.Doc.Points) {
		t.Fatalf("%d sigma values for %d points", len(sigma), len(res.Doc.Points))
	}
	known := 0
	for i, p := range res.Doc.Points {
		want := float64(export.SigmaUnknown)
		if p.Sigma != nil {
			want = float64(float32(*p.Sigma))
			known++
		}
		if sigma[i] != want {
			t.Fatalf("point %d (track %d): PLY sigma %v, JSON %v", i, p.Track, sigma[i], want)
		}
	}
	if known < len(res.Doc.Points)*9/10 {
		t.Errorf("only %d of %d points have an uncertainty", known, len(res.Doc.Points))
	}
	said := false
	for _, c := range ply.Comments {
		said = said || strings.Contains(c, "sigma is the position standard deviation")
	}
	if !said {
		t.Errorf("no comment explains the sigma property: %q", ply.Comments)
	}
}

// When the refinement computes no covariance because there are more
// cameras than bundle.Options.UncertaintyMaxCameras (here lowered to 5 so
// a small set shows it), the result says so in an informational warning,
// its points carry no sigma, and --ply-sigma writes −1 for every point.
func TestNoUncertaintyAboveCameraLimit(t *testing.T) {
	set := syntheticTracks(12, 60, false, 5)
	cfg := Config{Out: filepath.Join(t.TempDir(), "out"), PLYSigma: true, PLYASCII: true}
	cfg.Refine.Bundle.UncertaintyMaxCameras = 5
	res, err := Reconstruct(context.Background(), set, cfg)
	if err != nil {
		t.Fatal(err)
	}
	found := false
	for _, w := range res.Rec.Diagnostics.Warnings {
		found = found || w.Code == WarnNoUncertainty && strings.Contains(w.Message, "12 cameras")
	}
	if !found {
		t.Errorf("no %s warning naming the 12 cameras: %+v", WarnNoUncertainty, res.Rec.Diagnostics.Warnings)
	}
	for _, p := range res.Doc.Points {
		if p.Sigma != nil {
			t.Fatalf("point of track %d has sigma %v without a covariance", p.Track, *p.Sigma)
		}
	}
	if err := Write(res, cfg); err != nil {
		t.Fatal(err)
	}
	b, err := os.ReadFile(filepath.Join(cfg.Out, export.FilePoints))
	if err != nil {
		t.Fatal(err)
	}
	ply, err := export.ReadPLY(bytes.NewReader(b))
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range ply.Elements[0].Properties {
		if p.Name != "sigma" {
			continue
		}
		for i, v := range p.Scalar {
			if v != export.SigmaUnknown {
				t.Fatalf("vertex %d: sigma %v, want %v", i, v, export.SigmaUnknown)
			}
		}
		return
	}
	t.Error("points.ply has no sigma property")
}
