package pipeline

import (
	"bufio"
	"bytes"
	"context"
	"encoding/binary"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"trackfactor/eval"
	"trackfactor/export"
	"trackfactor/track"
	"trackfactor/track/synth"
)

// renderScene writes a synthetic turntable sequence into a temp folder.
func renderScene(t testing.TB, opts synth.Options) (*synth.Scene, string) {
	t.Helper()
	scene, err := synth.New(opts)
	if err != nil {
		t.Fatal(err)
	}
	dir := filepath.Join(t.TempDir(), "frames")
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	if _, err := scene.WriteFrames(context.Background(), dir, nil); err != nil {
		t.Fatal(err)
	}
	return scene, dir
}

func firstSeen(set *track.Set) map[int]eval.Seen {
	m := map[int]eval.Seen{}
	for _, tr := range set.Tracks {
		o := tr.Obs[0]
		m[tr.ID] = eval.Seen{Frame: o.Frame, X: o.X, Y: o.Y}
	}
	return m
}

// End to end on a rendered orthographic turntable arc (issue 2's acceptance
// numbers: ≥ 20 frames spanning ≥ 10°; median relative-rotation error
// ≤ 0.2°; structure RMS ≤ 0.5 % of the bounding-box diagonal after a
// similarity alignment). The ground truth is the renderer's own geometry;
// the error measures (geodesic rotation distance, Umeyama alignment) are
// checked against their definitions in package eval.
func TestEndToEndOrthographicArc(t *testing.T) {
	frames := 24
	if testing.Short() {
		frames = 20
	}
	scene, dir := renderScene(t, synth.Options{Frames: frames, StepDeg: 0.6, NoiseSigma: 1, Seed: 3})
	out := filepath.Join(t.TempDir(), "out")
	res, err := Run(context.Background(), Config{Input: dir, Out: out})
	if err != nil {
		t.Fatal(err)
	}
	rep, err := eval.Score(res.Rec, firstSeen(res.Set), scene)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("%d frames, %d points; rotation median %.4f° max %.4f°; structure %.4f %% of diagonal; RMS %.4f px",
		len(res.Rec.Cameras), len(res.Rec.Points), rep.Rotation.MedianDeg, rep.Rotation.MaxDeg, rep.StructurePct, res.Rec.Diagnostics.RMS)
	if len(res.Rec.Cameras) != frames {
		t.Errorf("%d cameras for %d frames", len(res.Rec.Cameras), frames)
	}
	if rep.Rotation.MedianDeg > 0.2 {
		t.Errorf("median relative-rotation error %.3f° > 0.2°", rep.Rotation.MedianDeg)
	}
	if rep.StructurePct > 0.5 {
		t.Errorf("structure RMS %.3f %% of the diagonal > 0.5 %%", rep.StructurePct)
	}
	checkOutputs(t, out, res)
}

// checkOutputs validates the JSON against the schema and reads the PLY back
// with a reader written here from the PLY format description (Turk, 1994):
// an ASCII header ending in "end_header\n", then binary little-endian
// vertex records.
func checkOutputs(t *testing.T, out string, res *Result) {
	t.Helper()
	data, err := os.ReadFile(filepath.Join(out, "reconstruction.json"))
	if err != nil {
		t.Fatal(err)
	}
	if err := export.Validate(data); err != nil {
		t.Errorf("reconstruction.json does not validate: %v", err)
	}
	ply, err := os.ReadFile(filepath.Join(out, "points.ply"))
	if err != nil {
		t.Fatal(err)
	}
	end := bytes.Index(ply, []byte("end_header\n"))
	if end < 0 {
		t.Fatal("points.ply: no end_header")
	}
	header := string(ply[:end])
	body := ply[end+len("end_header\n"):]
	if !strings.HasPrefix(header, "ply\nformat binary_little_endian 1.0\n") {
		t.Fatalf("points.ply header starts %q", header[:min(40, len(header))])
	}
	n := -1
	var props []string
	sc := bufio.NewScanner(strings.NewReader(header))
	for sc.Scan() {
		f := strings.Fields(sc.Text())
		if len(f) == 3 && f[0] == "element" && f[1] == "vertex" {
			n, _ = strconv.Atoi(f[2])
		}
		if len(f) == 3 && f[0] == "property" {
			props = append(props, f[1]+" "+f[2])
		}
	}
	want := []string{"float x", "float y", "float z", "uchar red", "uchar green", "uchar blue"}
	if strings.Join(props, ",") != strings.Join(want, ",") {
		t.Fatalf("properties %v, want %v", props, want)
	}
	if n != len(res.Rec.Points) || len(body) != n*15 {
		t.Fatalf("vertex count %d, body %d bytes; want %d points × 15 bytes", n, len(body), len(res.Rec.Points))
	}
	for i, p := range res.Rec.Points {
		rec := body[15*i:]
		for k := 0; k < 3; k++ {
			v := math.Float32frombits(binary.LittleEndian.Uint32(rec[4*k:]))
			if float32(p.X[k]) != v {
				t.Fatalf("point %d coordinate %d: PLY %v, reconstruction %v", i, k, v, p.X[k])
			}
		}
	}
	csv, err := os.ReadFile(filepath.Join(out, "tracks.csv"))
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimSpace(string(csv)), "\n")
	if lines[0] != "track,frame,x,y" {
		t.Errorf("tracks.csv header %q", lines[0])
	}
	if got, want := len(lines)-1, len(res.Rec.Points)*len(res.Rec.Cameras); got != want {
		t.Errorf("tracks.csv has %d rows, want one per observation used (%d)", got, want)
	}
}
