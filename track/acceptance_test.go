package track

import (
	"context"
	"math"
	"testing"

	"gocv.io/x/gocv"

	"trackfactor/track/synth"
)

// onMask reports whether the pixel nearest (x, y) is set in a row-major
// W-wide mask (false outside).
func onMask(m []bool, w int, x, y float64) bool {
	xi, yi := int(math.Round(x)), int(math.Round(y))
	if xi < 0 || yi < 0 || xi >= w || yi*w+xi >= len(m) {
		return false
	}
	return m[yi*w+xi]
}

// TestOccluder is issue 3's appearance-drift test with a sliding occluder.
// Scene: the synthetic turntable (synth defaults: 640×480, 1° per frame,
// 30 frames, noise σ = 1 grey level) with an invented occluder composited
// over it (occluderFrames): a flat grey bar 40 px wide whose left edge
// moves from x = 150 to the right at 8 px per frame, across the part's
// left half and against its motion. Ground truth: the renderer's (a
// track's first observation cast onto the part and projected into later
// frames, hidden points excluded) and the bar's coverage, known by
// construction.
//
// A track's point is occluded in frame f when the bar covers at least half
// of the pixel its true position falls in. Checks, with default options:
//   - ≥ 95 % of the tracks whose point becomes occluded after their first
//     frame end before that frame (issue 3's bound: ended or flagged);
//   - no reconstructed point comes from such tracks: no kept observation
//     in a frame where the bar is within a patch (8 px) of the track's
//     true point is more than 2 px from the truth (the slide bound of
//     TestHighlightDrift), and no complete track (the orthographic model's
//     input) is ever occluded after its start.
//
// The number of those observations off by more than 1 px is logged.
func TestOccluder(t *testing.T) {
	if testing.Short() {
		t.Skip("renders a 30-frame scene; skipped in -short")
	}
	const n = 30
	const x0, v, bar, patch = 150.0, 8.0, 40.0, 8.0
	sc, _, imgs := renderScene(t, synth.Options{Frames: n, NoiseSigma: 1})
	frames, cov := occluderFrames(imgs, x0, v, bar, 5)
	src, err := FromImages(frames, nil)
	if err != nil {
		t.Fatal(err)
	}
	set, err := Run(context.Background(), src, Options{}, nil)
	if err != nil {
		t.Fatal(err)
	}
	checkInvariants(t, set)
	occludedTracks, endedInTime, nearObs, off2, off1 := 0, 0, 0, 0, 0
	complete := map[int]bool{}
	for _, tr := range set.CompleteSubset() {
		complete[tr.ID] = true
	}
	for _, tr := range set.Tracks {
		a := tr.Obs[0]
		X, ok := sc.Raycast(a.Frame, a.X, a.Y)
		if !ok {
			continue
		}
		occ := -1
		for f := a.Frame + 1; f < n && occ < 0; f++ {
			if x, _ := sc.Project(f, X); sc.Visible(f, X) && cov(f, x) >= 0.5 {
				occ = f
			}
		}
		if occ >= 0 {
			occludedTracks++
			if tr.Last() < occ {
				endedInTime++
			}
			if complete[tr.ID] {
				t.Errorf("complete track %d: its point is occluded in frame %d", tr.ID, occ)
			}
		}
		for _, o := range tr.Obs[1:] {
			if !sc.Visible(o.Frame, X) {
				continue
			}
			x, y := sc.Project(o.Frame, X)
			left := x0 + v*float64(o.Frame)
			if math.Max(left-x, x-left-bar) > patch {
				continue
			}
			nearObs++
			e := math.Hypot(o.X-x, o.Y-y)
			if e > 1 {
				off1++
			}
			if e > 2 {
				off2++
				t.Errorf("track %d frame %d: %.2f px from the truth next to the occluder", tr.ID, o.Frame, e)
			}
		}
	}
	t.Logf("%d tracks, ended %v; %d points occluded after their first frame, %d of those tracks ended in time; %d kept observations within %g px of the bar: %d off by more than 1 px, %d by more than 2 px",
		len(set.Tracks), set.Stats.Ended, occludedTracks, endedInTime, nearObs, patch, off1, off2)
	if occludedTracks < 50 {
		t.Fatalf("only %d tracks meet the occluder; scene unsuitable", occludedTracks)
	}
	if float64(endedInTime) < 0.95*float64(occludedTracks) {
		t.Errorf("%d of %d tracks whose point became occluded ended before it (want ≥ 95 %%)", endedInTime, occludedTracks)
	}
}

// TestBackground is issue 3's background test: the synthetic turntable
// with its static textured backdrop (synth Backdrop, 30 frames, 1° per
// frame, noise σ = 1); the renderer's ObjectMask at a track's first
// observation says whether it lies on the part. Issue 3 asks ≥ 98 % of the
// kept tracks on the part.
//
// Without the occlusion-boundary check (RefineOptions.StaticShare
// negative) 95.4 % were (600 of 629, measured): every track off the part
// started 1–6 px from its outline, a backdrop corner or a T-junction of
// the silhouette with the backdrop, which slides with the occluding
// contour along the epipolar lines (the affine-epipolar check cannot see
// it) while half of its window stays on the static backdrop (so it is not
// static either). With the check (default options): 98.5 % (598 of 607,
// measured). So the test asks, with default options:
//   - ≥ 98 % of the kept tracks on the part (issue 3's bound);
//   - the check costs at most 2 % of the tracks on the part, counted
//     against the same run with the check off (the bound TestStaticBackdrop
//     sets for the static-background check).
func TestBackground(t *testing.T) {
	if testing.Short() {
		t.Skip("renders a 30-frame scene; skipped in -short")
	}
	sc, src, _ := renderScene(t, synth.Options{Frames: 30, NoiseSigma: 1, Backdrop: true})
	masks := map[int][]bool{}
	count := func(o Options) (on int, set *Set) {
		set, err := Run(context.Background(), src, o, nil)
		if err != nil {
			t.Fatal(err)
		}
		checkInvariants(t, set)
		for _, tr := range set.Tracks {
			a := tr.Obs[0]
			if masks[a.Frame] == nil {
				masks[a.Frame] = sc.ObjectMask(a.Frame)
			}
			if onMask(masks[a.Frame], set.Width, a.X, a.Y) {
				on++
			}
		}
		return on, set
	}
	on, set := count(Options{})
	onOff, setOff := count(Options{Refine: RefineOptions{StaticShare: -1}})
	share := float64(on) / float64(len(set.Tracks))
	t.Logf("%d of %d kept tracks start on the part (%.1f %%; issue 3 asks 98 %%); ended %v", on, len(set.Tracks), 100*share, set.Stats.Ended)
	t.Logf("without the occlusion-boundary check: %d of %d (%.1f %%)", onOff, len(setOff.Tracks), 100*float64(onOff)/float64(len(setOff.Tracks)))
	if len(set.Tracks) < 300 {
		t.Fatalf("only %d tracks kept", len(set.Tracks))
	}
	if set.Stats.Ended[DropBoundary] == 0 {
		t.Errorf("no track ended as %s", DropBoundary)
	}
	if share < 0.98 {
		t.Errorf("%.1f %% of kept tracks on the part, below issue 3's 98 %%", 100*share)
	}
	if float64(on) < 0.98*float64(onOff) {
		t.Errorf("the occlusion-boundary check kept %d tracks on the part of %d without it (more than 2 %% lost)", on, onOff)
	}
}

// TestCoverage is issue 3's coverage test: over a full rendered turn
// (synth, 72 frames 5° apart, noise σ = 1) the part keeps at least 80 % of
// the corner count it had in frame 0 in every frame, counting the tracks
// observed in the frame at a position on the renderer's ObjectMask. (With
// RedetectBelow 0.7, the earlier default, the count fell to 74 %; with
// 0.85 it stays at 83 % or more, measured.)
func TestCoverage(t *testing.T) {
	if testing.Short() {
		t.Skip("renders a 72-frame turn; skipped in -short")
	}
	const n = 72
	sc, src, _ := renderScene(t, synth.Options{Frames: n, StepDeg: 5, NoiseSigma: 1})
	set, err := Run(context.Background(), src, Options{}, nil)
	if err != nil {
		t.Fatal(err)
	}
	checkInvariants(t, set)
	counts := make([]int, n)
	for f := range counts {
		m := sc.ObjectMask(f)
		for _, tr := range set.Tracks {
			if o, ok := tr.At(f); ok && onMask(m, set.Width, o.X, o.Y) {
				counts[f]++
			}
		}
	}
	worst := 0
	for f, c := range counts {
		if c < counts[worst] {
			worst = f
		}
	}
	t.Logf("corners on the part per frame: %v; fewest %d in frame %d (%.0f %% of frame 0's %d)", counts, counts[worst], worst, 100*float64(counts[worst])/float64(counts[0]), counts[0])
	if counts[0] < 200 {
		t.Fatalf("only %d corners on the part in frame 0", counts[0])
	}
	for f, c := range counts {
		if float64(c) < 0.8*float64(counts[0]) {
			t.Errorf("frame %d: %d corners on the part, below 80 %% of frame 0's %d", f, c, counts[0])
		}
	}
}

// TestLargeShiftNeedsPyramid is the pyramid-level trap on a known shift:
// an invented texture (noiseImage) moving 20 px per frame (exact integer
// crops, 320×240) is far beyond what LK captures at full resolution with a
// 21 px window, so tracking it without prediction works only if the
// coarse levels are really used. Counted over the corners detected in
// frame 0 that stay in the image for two frames: with Levels 3 (2.5 px
// left to capture at the coarsest level) ≥ 85 % must follow the shift
// within 0.05 px (measured 93 %); with Levels 2 (5 px at the coarsest
// level, one level short) at most 60 % may (measured 48 %), so a level
// off by one shows. With prediction (the default) the first pair runs on
// all levels (no motion history) and the following pairs at full
// resolution only (Stats.PredictLevels), since the residual motion is
// zero, and ≥ 85 % follow as well.
func TestLargeShiftNeedsPyramid(t *testing.T) {
	const w, h, n, dx = 320, 240, 5, 20
	src := shiftSource(t, w, h, n, dx, 13)
	minX := float64(2*dx + 11)
	total := frame0Corners(t, src, minX)
	follow := func(o Options) (int, *Set) {
		o.Refine.Off, o.Reject.Off = true, true
		set, err := Run(context.Background(), src, o, nil)
		if err != nil {
			t.Fatal(err)
		}
		checkInvariants(t, set)
		good := 0
		for _, tr := range set.Tracks {
			a := tr.Obs[0]
			if tr.First() != 0 || a.X < minX {
				continue
			}
			if o, ok := tr.At(2); ok && math.Hypot(o.X-(a.X-2*dx), o.Y-a.Y) <= 0.05 {
				good++
			}
		}
		return good, set
	}
	g3, _ := follow(Options{NoPredict: true, Levels: 3})
	g2, _ := follow(Options{NoPredict: true, Levels: 2})
	gp, sp := follow(Options{})
	t.Logf("of %d frame-0 corners, followed for 2 frames: levels 3 %d, levels 2 %d, predicted %d (depths %v)",
		total, g3, g2, gp, sp.Stats.PredictLevels)
	if total < 200 {
		t.Fatalf("only %d corners", total)
	}
	if float64(g3) < 0.85*float64(total) {
		t.Errorf("levels 3: %d of %d corners follow a %d px shift (want ≥ 85 %%)", g3, total, dx)
	}
	if float64(g2) > 0.6*float64(total) {
		t.Errorf("levels 2: %d of %d corners follow a %d px shift (want ≤ 60 %%); the test cannot tell a level off by one", g2, total, dx)
	}
	if float64(gp) < 0.85*float64(total) {
		t.Errorf("predicted: %d of %d corners follow (want ≥ 85 %%)", gp, total)
	}
	if d := sp.Stats.PredictLevels; len(d) != n-1 || d[0] != 3 || d[len(d)-1] != 0 {
		t.Errorf("prediction depths %v; want 3 for the first pair and 0 once the motion is known", d)
	}
}

// frame0Corners counts the corners the tracker detects in frame 0 of src
// at x ≥ minX (default detection, border of half the 21 px window plus
// one).
func frame0Corners(t *testing.T, src Source, minX float64) int {
	t.Helper()
	m := gocv.NewMat()
	defer m.Close()
	g := gocv.NewMat()
	defer g.Close()
	if err := src.Read(context.Background(), 0, &m); err != nil {
		t.Fatal(err)
	}
	gocv.CvtColor(m, &g, gocv.ColorBGRToGray)
	cs, err := Detect(g, DetectOptions{Border: 11})
	if err != nil {
		t.Fatal(err)
	}
	k := 0
	for _, c := range cs {
		if c.X >= minX {
			k++
		}
	}
	return k
}
