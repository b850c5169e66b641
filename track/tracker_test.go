package track

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"image"
	"math"
	"strings"
	"testing"

	"gocv.io/x/gocv"
)

// warpErrors tracks src and returns, for every kept track, the end-point
// error of its last observation against the known warp: frame k holds the
// photograph warped by affine(k), so a point seen at p in frame f lies at
// affine(k)·affine(f)⁻¹·p in frame k. Also returns the largest |error| of
// each axis separately.
func warpErrors(t *testing.T, src *matSource, affine func(k int) [6]float64, opts Options) (errs []float64, maxDX, maxDY float64, set *Set) {
	t.Helper()
	set, err := Run(context.Background(), src, opts, nil)
	if err != nil {
		t.Fatal(err)
	}
	for _, tr := range set.Tracks {
		first, last := tr.Obs[0], tr.Obs[len(tr.Obs)-1]
		m := affine(last.Frame)
		inv := invAffine(affine(first.Frame))
		x0, y0 := applyAffine(inv, first.X, first.Y)
		ex, ey := applyAffine(m, x0, y0)
		dx, dy := last.X-ex, last.Y-ey
		errs = append(errs, math.Hypot(dx, dy))
		maxDX = math.Max(maxDX, math.Abs(dx))
		maxDY = math.Max(maxDY, math.Abs(dy))
	}
	return errs, maxDX, maxDY, set
}

// TestKnownWarp tracks real photographs from Debian's opencv-doc package
// (examples/data) through known sub-pixel warps: graf1.png (a graffiti
// wall, 800×640, PNG), baboon.jpg (the mandrill, 512×512, fine fur
// texture, JPEG) and building.jpg (a façade, 868×600, repeated man-made
// structure, JPEG). Each frame is made like a camera image: the photograph
// upsampled 4× (bicubic), warped with OpenCV's warpAffine (bilinear),
// averaged back down (INTER_AREA), so frame 0 is resampled like the others
// and the warp's own interpolation blur is a quarter pixel. (Warping at
// full resolution puts a different blur, or with bicubic a phase shift of
// up to 0.05 px, measured here, into every frame, which is the generator's
// error, not the tracker's.) Warps per frame, 5 frames: shift (0.37, 0)
// px; shift (1.63, −0.71) px; rotation 0.6° about the centre; scaling
// 1 % about the centre.
//
// Tolerances (issue 3): median end-point error ≤ 0.05 px and 99th
// percentile ≤ 0.3 px after 5 frames (sub-pixel accuracy of pyramidal LK
// on such warps is common practice). Plain frame-to-frame LK (refinement
// off) is held to the same bounds on translations; on rotation and
// scaling its translation-only window is biased by the patch's own
// rotation every frame (about 0.05 px per frame here), which the affine
// refinement removes, so plain LK's numbers are only reported there. Each
// failure names the photograph and the warp.
func TestKnownWarp(t *testing.T) {
	for _, photo := range []string{"graf1.png", "baboon.jpg", "building.jpg"} {
		t.Run(photo, func(t *testing.T) { knownWarp(t, photo) })
	}
}

func knownWarp(t *testing.T, photo string) {
	img := gocv.IMRead(extData(t, photo), gocv.IMReadColor)
	defer img.Close()
	if img.Empty() {
		t.Fatalf("cannot decode %s", photo)
	}
	cx, cy := float64(img.Cols()-1)/2, float64(img.Rows()-1)/2
	cases := []struct {
		name   string
		affine func(k int) [6]float64
		shift  bool
		xOnly  bool
	}{
		{"shift-x", func(k int) [6]float64 { return [6]float64{1, 0, 0.37 * float64(k), 0, 1, 0} }, true, true},
		{"shift-xy", func(k int) [6]float64 { return [6]float64{1, 0, 1.63 * float64(k), 0, 1, -0.71 * float64(k)} }, true, false},
		{"rotate", func(k int) [6]float64 {
			th := 0.6 * float64(k) * math.Pi / 180
			c, s := math.Cos(th), math.Sin(th)
			return [6]float64{c, -s, cx - c*cx + s*cy, s, c, cy - s*cx - c*cy}
		}, false, false},
		{"scale", func(k int) [6]float64 {
			s := math.Pow(1.01, float64(k))
			return [6]float64{s, 0, cx - s*cx, 0, s, cy - s*cy}
		}, false, false},
	}
	for _, tc := range cases {
		src := warpSequenceSS(t, img, 6, tc.affine, 4)
		for _, refine := range []bool{true, false} {
			name := tc.name + map[bool]string{true: "/refined", false: "/plain"}[refine]
			t.Run(name, func(t *testing.T) {
				opts := Options{Refine: RefineOptions{Off: !refine}, Reject: RejectOptions{Off: true}}
				errs, mdx, mdy, set := warpErrors(t, src, tc.affine, opts)
				med, p99 := percentile(errs, 50), percentile(errs, 99)
				t.Logf("%s, %s: %d tracks: median %.4f px, p99 %.4f px, max |dx| %.3f, max |dy| %.3f, ended %v", photo, name, len(errs), med, p99, mdx, mdy, set.Stats.Ended)
				checkInvariants(t, set)
				if len(errs) < 500 {
					t.Fatalf("%s, %s: only %d tracks; expected most corners to survive a small warp", photo, name, len(errs))
				}
				if (refine || tc.shift) && (med > 0.05 || p99 > 0.3) {
					t.Errorf("%s, %s: median %.4f px (limit 0.05), p99 %.4f px (limit 0.3)", photo, name, med, p99)
				}
				if tc.xOnly {
					// x/y convention: the warp moved x only. Rows and
					// columns mixed up would move points 1.85 px in y; the
					// same error budget applies per axis.
					var dys, dxs []float64
					for _, tr := range set.Tracks {
						a, b := tr.Obs[0], tr.Obs[len(tr.Obs)-1]
						dys = append(dys, math.Abs(b.Y-a.Y))
						dxs = append(dxs, math.Abs(b.X-a.X-0.37*float64(b.Frame-a.Frame)))
					}
					if percentile(dys, 50) > 0.05 || percentile(dys, 99) > 0.3 || percentile(dxs, 50) > 0.05 || percentile(dxs, 99) > 0.3 {
						t.Errorf("%s, shift in x: y motion median %.3f p99 %.3f, x error median %.3f p99 %.3f (limits 0.05, 0.3)", photo,
							percentile(dys, 50), percentile(dys, 99), percentile(dxs, 50), percentile(dxs, 99))
					}
				}
			})
		}
		src.Close()
	}
}

// checkInvariants checks what every Set from Run guarantees: unique ids,
// observations sorted by frame with unique frames, positions inside the
// image, lengths ≥ MinLength (2), and the accounting Detected = Alive +
// Σ Ended.
func checkInvariants(t *testing.T, set *Set) {
	t.Helper()
	ids := map[int]bool{}
	for _, tr := range set.Tracks {
		if ids[tr.ID] {
			t.Fatalf("track id %d twice", tr.ID)
		}
		ids[tr.ID] = true
		if len(tr.Obs) < 2 {
			t.Fatalf("track %d has %d observations (MinLength 2)", tr.ID, len(tr.Obs))
		}
		for k, o := range tr.Obs {
			if k > 0 && o.Frame <= tr.Obs[k-1].Frame {
				t.Fatalf("track %d frames not increasing", tr.ID)
			}
			if o.X < 0 || o.Y < 0 || o.X > float64(set.Width-1) || o.Y > float64(set.Height-1) || math.IsNaN(o.X+o.Y) {
				t.Fatalf("track %d frame %d at (%g, %g) outside the %dx%d image", tr.ID, o.Frame, o.X, o.Y, set.Width, set.Height)
			}
			if o.Quality < 0 || o.Quality > 1 {
				t.Fatalf("quality %g outside [0,1]", o.Quality)
			}
		}
	}
	sum := set.Stats.Alive
	for _, n := range set.Stats.Ended {
		sum += n
	}
	if sum != set.Stats.Detected {
		t.Errorf("accounting: alive %d + ended %v = %d, detected %d", set.Stats.Alive, set.Stats.Ended, sum, set.Stats.Detected)
	}
	if len(set.Stats.Live) != len(set.Frames) {
		t.Errorf("Stats.Live has %d entries for %d frames", len(set.Stats.Live), len(set.Frames))
	}
	// Every observation is kept or counted as dropped: each track live
	// after frame f either observes f+1 or fails, and each detected corner
	// records its first observation.
	kept, dropped, attempts := 0, 0, set.Stats.Detected
	for _, tr := range set.Tracks {
		kept += len(tr.Obs)
	}
	for _, n := range set.Stats.DroppedObs {
		dropped += n
	}
	for _, n := range set.Stats.Live[:max(0, len(set.Stats.Live)-1)] {
		attempts += n
	}
	if kept+dropped != attempts {
		t.Errorf("observations: %d kept + %d dropped %v ≠ %d detected + %d live-track attempts",
			kept, dropped, set.Stats.DroppedObs, set.Stats.Detected, attempts-set.Stats.Detected)
	}
	for r, n := range set.Stats.Ended {
		if r != DropTooShort && set.Stats.DroppedObs[r] < n {
			t.Errorf("%d tracks ended with %s but only %d observations dropped for it", n, r, set.Stats.DroppedObs[r])
		}
	}
}

// shiftSource makes n frames cropped from a larger invented texture at
// x offsets dx·k (integer, so the motion is exact: content moves by −dx
// pixels per frame).
func shiftSource(t *testing.T, w, h, n, dx int, seed int64) Source {
	t.Helper()
	big := noiseImage(w+dx*n, h, seed)
	var imgs []image.Image
	for k := 0; k < n; k++ {
		imgs = append(imgs, big.SubImage(image.Rect(dx*k, 0, dx*k+w, h)))
	}
	src, err := FromImages(imgs, nil)
	if err != nil {
		t.Fatal(err)
	}
	return src
}

// TestBorder: content moves left 4 px per frame, so points leave the
// image. They must end with DropLeftImage, never be reported outside the
// image or within half a window (10 px) of its border, and re-detection
// must start new tracks (new ids) on the content entering at the right,
// away from live tracks. Positions must follow the exact integer shift
// within 0.05 px (invented texture, exact crops, no interpolation).
func TestBorder(t *testing.T) {
	const w, h, n, dx = 160, 120, 25, 4
	src := shiftSource(t, w, h, n, dx, 7)
	set, err := Run(context.Background(), src, Options{}, nil)
	if err != nil {
		t.Fatal(err)
	}
	checkInvariants(t, set)
	if set.Stats.Ended[DropLeftImage] == 0 {
		t.Fatalf("no track ended with %s: %v", DropLeftImage, set.Stats.Ended)
	}
	later := 0
	var worst float64
	for _, tr := range set.Tracks {
		if tr.First() > 0 {
			later++
		}
		for _, o := range tr.Obs {
			if o.X < 10 || o.X > w-1-10 || o.Y < 10 || o.Y > h-1-10 {
				t.Errorf("track %d frame %d at (%.2f, %.2f): within half a window of the border", tr.ID, o.Frame, o.X, o.Y)
			}
			a := tr.Obs[0]
			worst = math.Max(worst, math.Hypot(o.X-(a.X-dx*float64(o.Frame-a.Frame)), o.Y-a.Y))
		}
	}
	t.Logf("%d tracks, %d started after frame 0, worst error %.4f px, ended %v", len(set.Tracks), later, worst, set.Stats.Ended)
	if later == 0 {
		t.Errorf("no tracks started by re-detection")
	}
	if worst > 0.05 {
		t.Errorf("worst error %.4f px on an exact integer shift (limit 0.05)", worst)
	}
	// New tracks start at least MinDistance (7 px) from the tracks live
	// in their first frame.
	for _, tr := range set.Tracks {
		f := tr.First()
		if f == 0 {
			continue
		}
		a := tr.Obs[0]
		for _, u := range set.Tracks {
			if u.First() >= f {
				continue
			}
			if o, ok := u.At(f); ok && math.Hypot(o.X-a.X, o.Y-a.Y) < 7-1e-9 {
				t.Errorf("track %d started %.2f px from live track %d in frame %d", tr.ID, math.Hypot(o.X-a.X, o.Y-a.Y), u.ID, f)
			}
		}
	}
}

// TestTinyImage: on 40×30 frames the default 21 px window and 3 pyramid
// levels cannot be used; both are reduced, the reduction is reported in
// Stats.Clamped, and tracking still works (a degenerate coarse level must
// not end every track): tracks survive all 8 frames of a 1 px/frame shift
// and follow it within 0.05 px.
func TestTinyImage(t *testing.T) {
	src := shiftSource(t, 40, 30, 8, 1, 11)
	set, err := Run(context.Background(), src, Options{Levels: 3, Reject: RejectOptions{Off: true}}, nil)
	if err != nil {
		t.Fatal(err)
	}
	checkInvariants(t, set)
	t.Logf("clamped: %q; %d tracks, ended %v", set.Stats.Clamped, len(set.Tracks), set.Stats.Ended)
	joined := strings.Join(set.Stats.Clamped, "; ")
	if !strings.Contains(joined, "pyramid levels 3 reduced to 0") || !strings.Contains(joined, "LK window 21 px reduced to 15 px") {
		t.Errorf("clamps not reported: %q", joined)
	}
	full := 0
	for _, tr := range set.Tracks {
		if len(tr.Obs) == 8 {
			full++
			a, b := tr.Obs[0], tr.Obs[7]
			if e := math.Hypot(b.X-(a.X-7), b.Y-a.Y); e > 0.05 {
				t.Errorf("track %d error %.3f px after 7 frames", tr.ID, e)
			}
		}
	}
	if full == 0 || full < set.Stats.Detected/2 {
		t.Errorf("%d of %d detected tracks survived all frames", full, set.Stats.Detected)
	}
}

// TestPyramidLevels checks the level clamp against OpenCV's rule in
// buildOpticalFlowPyramid (lkpyramid.cpp, 4.6): stop before a level whose
// half-size is no larger than the window.
func TestPyramidLevels(t *testing.T) {
	for _, tc := range []struct{ w, h, win, max, want int }{
		{640, 480, 21, 3, 3}, // 320×240, 160×120, 80×60 all > 21
		{40, 30, 15, 3, 0},   // 20×15: 15 ≤ 15
		{100, 100, 21, 5, 2}, // 50, 25, then 13 ≤ 21
		{641, 481, 21, 8, 4}, // 321×241, 161×121, 81×61, 41×31, 21×16 ≤ 21
	} {
		if got := pyramidLevels(tc.w, tc.h, tc.win, tc.max); got != tc.want {
			t.Errorf("%dx%d win %d max %d: %d levels, want %d", tc.w, tc.h, tc.win, tc.max, got, tc.want)
		}
	}
}

func TestOptionsValidate(t *testing.T) {
	for _, tc := range []struct {
		o    Options
		frag string
	}{
		{Options{Window: 4}, "Window 4 must be odd and at least 5"},
		{Options{Window: 22}, "Window 22 must be odd"},
		{Options{Levels: 11}, "Levels 11 must be in 0..10"},
		{Options{Epsilon: -1}, "Epsilon -1"},
		{Options{FBThreshold: math.NaN()}, "FBThreshold is NaN"},
		{Options{RedetectBelow: 1}, "RedetectBelow 1 must be below 1"},
		{Options{MinLength: -1}, "MinLength -1 is negative"},
		{Options{Detect: DetectOptions{Quality: 1.5}}, "detect Quality 1.5 is outside [0,1)"},
		{Options{Detect: DetectOptions{BlockSize: 4}}, "detect BlockSize 4 must be odd"},
		{Options{Refine: RefineOptions{MinNCC: 1}}, "refine MinNCC 1 must be below 1"},
		{Options{Refine: RefineOptions{HalfPatch: 1}}, "refine HalfPatch 1 must be in 2..32"},
		{Options{Refine: RefineOptions{HalfPatch: 33}}, "refine HalfPatch 33 must be in 2..32"},
		{Options{PredictLevels: 11}, "PredictLevels 11 must be at most 10"},
		{Options{PredictCapture: math.NaN()}, "PredictCapture NaN must be a positive number"},
		{Options{MotionCheckPx: math.Inf(1)}, "MotionCheckPx +Inf must be a number of pixels"},
		{Options{MotionCheckFactor: -1}, "MotionCheckFactor -1 must be a positive factor"},
		{Options{Reject: RejectOptions{Confidence: 1}}, "reject Confidence 1 must be in (0,1)"},
		{Options{Reject: RejectOptions{MinTracks: 3}}, "reject MinTracks 3 must be at least 5"},
	} {
		err := tc.o.Validate()
		if err == nil || !strings.Contains(err.Error(), tc.frag) || !strings.HasPrefix(err.Error(), "track: ") {
			t.Errorf("%+v: error %v, want %q", tc.o, err, tc.frag)
		}
	}
	if err := (Options{}).Validate(); err != nil {
		t.Errorf("zero Options invalid: %v", err)
	}
}

// TestRunProgressAndCancel: progress is called once per frame with
// increasing counts; cancelling the context stops Run with ctx's error.
func TestRunProgressAndCancel(t *testing.T) {
	src := shiftSource(t, 96, 80, 10, 1, 5)
	var calls []int
	if _, err := Run(context.Background(), src, Options{}, func(done, total int) {
		if total != 10 {
			t.Errorf("total %d, want 10", total)
		}
		calls = append(calls, done)
	}); err != nil {
		t.Fatal(err)
	}
	if fmt.Sprint(calls) != "[1 2 3 4 5 6 7 8 9 10]" {
		t.Errorf("progress calls %v", calls)
	}
	for _, prefetch := range []int{-1, 2} {
		ctx, cancel := context.WithCancel(context.Background())
		_, err := Run(ctx, src, Options{Prefetch: prefetch}, func(done, _ int) {
			if done == 3 {
				cancel()
			}
		})
		if !errors.Is(err, context.Canceled) {
			t.Errorf("prefetch %d: cancelled run returned %v", prefetch, err)
		}
	}
}

// TestPrefetchSame: decoding ahead in a goroutine must not change results.
func TestPrefetchSame(t *testing.T) {
	src := shiftSource(t, 128, 96, 12, 2, 9)
	a, err := Run(context.Background(), src, Options{Prefetch: -1}, nil)
	if err != nil {
		t.Fatal(err)
	}
	b, err := Run(context.Background(), src, Options{Prefetch: 3}, nil)
	if err != nil {
		t.Fatal(err)
	}
	var ba, bb bytes.Buffer
	WriteCSV(&ba, a, true)
	WriteCSV(&bb, b, true)
	if ba.String() != bb.String() {
		t.Errorf("results differ with and without prefetch")
	}
}

// TestWithDefaultsIdempotent: the CLI fills in defaults (WithDefaults) and
// Run fills them in again; "off" values must survive both.
func TestWithDefaultsIdempotent(t *testing.T) {
	o := Options{FBThreshold: -1, RedetectEvery: -1, RedetectBelow: -1, Prefetch: -1, PredictLevels: -1, MotionCheckPx: -1, TrimEnd: -1,
		Detect: DetectOptions{MinDistance: -1, SubPixHalfWin: -1},
		Refine: RefineOptions{MinNCC: -1, Sigma: -1, StaticShare: -1}}
	once := o.withDefaults()
	twice := once.withDefaults()
	if fmt.Sprintf("%+v", once) != fmt.Sprintf("%+v", twice) {
		t.Errorf("withDefaults not idempotent:\n%+v\n%+v", once, twice)
	}
	if twice.Detect.MinDistance >= 0 || twice.Refine.MinNCC >= 0 || twice.Refine.StaticShare >= 0 || twice.FBThreshold >= 0 || twice.PredictLevels >= 0 || twice.MotionCheckPx >= 0 || twice.TrimEnd >= 0 {
		t.Errorf("an off value became a default: %+v", twice)
	}
	if d := (Options{}).withDefaults(); d.Window != 21 || d.Levels != 3 || d.Detect.MaxCorners != 1000 || d.FBThreshold != 0.5 || d.RedetectEvery != 5 || d.MinLength != 2 ||
		d.RedetectBelow != 0.85 || d.PredictLevels != 0 || d.PredictCapture != 2 || d.MotionCheckPx != 2 || d.MotionCheckFactor != 3 || d.TrimEnd != 1 || d.Refine.Epsilon != 0.3 ||
		d.Epsilon != 0.05 || d.Refine.HalfPatch != 7 || d.Refine.Sigma != 0.7 || d.Refine.StaticShare != 0.5 || d.Refine.StaticDiff != 2 || d.PredictWindow != 17 {
		t.Errorf("defaults differ from the documented ones: %+v", d)
	}
	if d := (Options{Refine: RefineOptions{Off: true}}).withDefaults(); d.Epsilon != 0.01 || d.PredictWindow != d.Window {
		t.Errorf("LK Epsilon %g, PredictWindow %d with refinement off; documented 0.01 (OpenCV's default) and Window", d.Epsilon, d.PredictWindow)
	}
}
