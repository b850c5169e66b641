package track

import (
	"context"
	"errors"
	"fmt"
	"image"
	"math"
	"slices"
	"sync"

	"gocv.io/x/gocv"
)

// Options configures Run. The zero value of every field means its
// default; booleans are phrased so that false is the default.
type Options struct {
	// Detect configures corner detection (MaxCorners 1000, Quality 0.01,
	// MinDistance 7 px, BlockSize 3, sub-pixel window 11×11). Its Border
	// is raised to at least half the LK window plus one pixel, so new
	// corners are not ended at once.
	Detect DetectOptions

	// Window is the side in pixels of the square LK window (odd, ≥ 5).
	// Default 21. On frames smaller than twice the window it is reduced
	// (reported in Stats.Clamped).
	Window int
	// Levels is the number of pyramid levels above full resolution
	// (OpenCV's maxLevel). Default 3. Reduced, as OpenCV does silently,
	// when a level would be no larger than the window; the reduction is
	// reported in Stats.Clamped.
	Levels int
	// MaxIter and Epsilon stop LK's iterations at each level after MaxIter
	// iterations or when an update is shorter than Epsilon pixels
	// (OpenCV's TermCriteria(COUNT+EPS, MaxIter, Epsilon)). Defaults 30
	// and 0.01 px, OpenCV's defaults for calcOpticalFlowPyrLK; with
	// refinement on (the default) Epsilon defaults to 0.05 px, since the
	// alignment against the reference patch sets the final position and
	// LK only starts it (and feeds the forward–backward check, whose
	// threshold is ten times larger): on the known-warp benchmark the
	// end-point errors stayed at 0.0323 px (median) and 0.226 px (99th
	// percentile) with the same tracks, and LK cost about a fifth less
	// (measured).
	MaxIter int
	Epsilon float64
	// MinEigen is OpenCV's minEigThreshold: the smaller eigenvalue of the
	// window's gradient matrix divided by the window's area, on 0..1
	// grey levels. Below it a point ends with DropLowEigen. Default 1e-4
	// (OpenCV's default).
	MinEigen float64
	// FBThreshold is the forward–backward check: a point tracked to the
	// next frame and back must land within FBThreshold pixels of where it
	// started (Kalal, Mikolajczyk & Matas, ICPR 2010), else it ends with
	// DropForwardBack. Default 0.5 px; negative turns the check off.
	FBThreshold float64

	// NoPredict turns motion prediction off. With prediction (default)
	// each point starts LK from its previous position plus its previous
	// displacement (OPTFLOW_USE_INITIAL_FLOW; a new track takes the mean
	// displacement of the live tracks near it) on a shallower pyramid
	// (PredictLevels); points that fail are tracked again without
	// prediction on all Levels ("deep retry", counted in Stats.Retried).
	NoPredict bool
	// PredictLevels is the number of pyramid levels above full resolution
	// (OpenCV's maxLevel) used with prediction, at most Levels.
	//
	// Default (0): chosen before every frame pair from the residual
	// motion, the 95th percentile of |displacement − previous
	// displacement| over the tracks of the last pair: the fewest levels L
	// with residual ≤ PredictCapture·2^L (each level halves the motion
	// LK has to capture); all Levels for the first pair, which has no
	// motion history. For the second pair, whose residual is not known
	// yet, the 95th percentile of the first pair's displacements about
	// their median stands in for it: a smooth motion changes far less
	// from one pair to the next than it varies over the image, and points
	// that fail are retried deep. The depth used for every pair is in
	// Stats.PredictLevels. A positive value fixes the depth; negative
	// fixes it at 0 (full resolution only).
	PredictLevels int
	// PredictWindow is the side in pixels of the LK window for the
	// predicted runs on fewer pyramid levels than Levels (odd, ≥ 5; at
	// most Window). After prediction LK captures only the residual motion
	// and the refinement sets the final position, so a smaller window than
	// the one needed for a search does: the first pair (no motion history),
	// a pair whose residual motion calls for all Levels and the deep retry
	// use Window. Default 17: OpenCV 4.6's LK took 0.43 ms for 808 points of
	// the known-warp benchmark at full resolution with a 17 px window
	// against 0.90 ms with 21 and 0.68 ms with 15 (best of 40 calls,
	// measured; its inner loops take 8 pixels of a window row at a time,
	// from memory of lkpyramid.cpp, so 17 = 2·8 + 1 wastes the least),
	// with the same tracks and end-point errors on the benchmark (933.2
	// against 933.0 tracks per pair, median 0.0324 against 0.0323 px).
	// The border margin (half of Window) and the refinement patch do not
	// depend on it. With refinement off LK sets the positions, and the
	// default is Window.
	PredictWindow int
	// PredictCapture is the residual motion in pixels that LK is trusted
	// to capture at full resolution when PredictLevels is automatic.
	// Default 2 px (about a tenth of the default 21 px window: a
	// conservative choice, since a point that LK loses is retried on the
	// full pyramid anyway, from memory of common practice).
	PredictCapture float64

	// MotionCheckPx and MotionCheckFactor are the motion check: a track
	// whose displacement in a frame pair differs from its prediction (its
	// own previous displacement; for a new track, the mean displacement
	// of its neighbours) by more than max(MotionCheckPx, MotionCheckFactor
	// × the 95th percentile of that difference over the pair's tracks)
	// ends with DropMotion. It catches corners that jump to other
	// structure and T-junctions that slide along an occluding edge, which
	// LK, the forward–backward check and the appearance check accept
	// because the edge dominates the window. Relative to the pair's own
	// residuals, so a shaking camera does not end every track. Defaults
	// 2 px and 3 (on the synthetic sliding occluder of TestOccluder, 3 px
	// left one corner born on the occluder's edge 2.2 px off the surface
	// point for the rest of the run; 2 px ended it, measured); negative
	// MotionCheckPx turns the check off.
	MotionCheckPx     float64
	MotionCheckFactor float64

	// TrimEnd is the number of observations cut from the end of a track
	// that ends on a drift signal (forward–backward, appearance drift,
	// motion check; counted in Stats.DroppedObs under that reason): the
	// drift that ends a track has usually begun a frame earlier (measured
	// on a synthetic sliding occluder, TestOccluder: the last observation
	// of such tracks was the one off by more than a pixel). The first
	// observation is never cut. Default 1; negative keeps every
	// observation.
	TrimEnd int

	// RedetectEvery re-detects corners in empty areas every K frames.
	// Default 5; negative means only when the count falls (RedetectBelow).
	RedetectEvery int
	// RedetectBelow re-detects whenever the number of live tracks falls
	// below this fraction of min(MaxCorners, the count after the last
	// detection). Default 0.85: on a full synthetic turn at 5° per frame
	// (TestCoverage), 0.7 let the part's corner count fall to 74 % of
	// frame 0's between detections, 0.85 to 83 %, 0.9 to 92 % (measured);
	// 0.9 also cut the loop-closure recall of TestCloseLoopsFullTurn from
	// 33 % to 26 % (more, shorter tracks). Negative turns it off.
	RedetectBelow float64

	// MinLength drops tracks with fewer observations (DropTooShort).
	// Default 2.
	MinLength int

	// Refine configures drift-free refinement against each track's
	// reference patch (on by default; Refine.Off turns it off).
	Refine RefineOptions
	// Reject configures static-background and outlier rejection after
	// tracking (on by default; Reject.Off turns both off).
	Reject RejectOptions

	// Prefetch is the number of frames decoded ahead in a goroutine while
	// the current pair is tracked. Default 2; negative decodes in line.
	Prefetch int
}

const (
	defaultWindow         = 21
	defaultLevels         = 3
	defaultLKIter         = 30
	defaultLKEps          = 0.01
	defaultLKEpsRefined   = 0.05
	defaultMinEigen       = 1e-4
	defaultFB             = 0.5
	defaultPredictCapture = 2.0
	defaultPredictWindow  = 17
	defaultMotionPx       = 2.0
	defaultTrimEnd        = 1
	defaultMotionFactor   = 3.0
	defaultRedetectEvery  = 5
	defaultRedetectBelow  = 0.85
	defaultMinLength      = 2
	defaultPrefetch       = 2
	minWindow             = 5
	// vgridCell is the cell size in pixels over which new tracks take the
	// mean displacement of their neighbours as their first prediction.
	vgridCell = 32
	// dupRadius: new corners refined to within this many pixels of each
	// other are one feature; only the stronger is kept.
	dupRadius = 1.0
)

// Validate reports the first option that breaks its rule, naming the
// field, the value and the rule.
func (o Options) Validate() error {
	if err := o.Detect.Validate(); err != nil {
		return err
	}
	if err := o.Refine.Validate(); err != nil {
		return err
	}
	if err := o.Reject.Validate(); err != nil {
		return err
	}
	switch {
	case o.Window < 0 || (o.Window != 0 && (o.Window < minWindow || o.Window%2 == 0)):
		return fmt.Errorf("track: Window %d must be odd and at least %d (0 = default %d)", o.Window, minWindow, defaultWindow)
	case o.PredictWindow < 0 || (o.PredictWindow != 0 && (o.PredictWindow < minWindow || o.PredictWindow%2 == 0)):
		return fmt.Errorf("track: PredictWindow %d must be odd and at least %d (0 = default %d)", o.PredictWindow, minWindow, defaultPredictWindow)
	case o.Levels < 0 || o.Levels > 10:
		return fmt.Errorf("track: Levels %d must be in 0..10 (0 = default %d)", o.Levels, defaultLevels)
	case o.MaxIter < 0:
		return fmt.Errorf("track: MaxIter %d is negative (0 = default %d)", o.MaxIter, defaultLKIter)
	case o.Epsilon < 0 || math.IsNaN(o.Epsilon):
		return fmt.Errorf("track: Epsilon %g must be a positive number of pixels (0 = default %g)", o.Epsilon, defaultLKEps)
	case o.MinEigen < 0 || math.IsNaN(o.MinEigen):
		return fmt.Errorf("track: MinEigen %g is negative (0 = default %g)", o.MinEigen, defaultMinEigen)
	case math.IsNaN(o.FBThreshold):
		return fmt.Errorf("track: FBThreshold is NaN; give pixels (0 = default %g, negative = off)", defaultFB)
	case o.PredictLevels > 10:
		return fmt.Errorf("track: PredictLevels %d must be at most 10 (0 = automatic, negative = full resolution only)", o.PredictLevels)
	case math.IsNaN(o.MotionCheckPx) || math.IsInf(o.MotionCheckPx, 0):
		return fmt.Errorf("track: MotionCheckPx %g must be a number of pixels (0 = default %g, negative = off)", o.MotionCheckPx, defaultMotionPx)
	case o.MotionCheckFactor < 0 || math.IsNaN(o.MotionCheckFactor) || math.IsInf(o.MotionCheckFactor, 0):
		return fmt.Errorf("track: MotionCheckFactor %g must be a positive factor (0 = default %g)", o.MotionCheckFactor, defaultMotionFactor)
	case o.PredictCapture < 0 || math.IsNaN(o.PredictCapture) || math.IsInf(o.PredictCapture, 0):
		return fmt.Errorf("track: PredictCapture %g must be a positive number of pixels (0 = default %g)", o.PredictCapture, defaultPredictCapture)
	case math.IsNaN(o.RedetectBelow) || o.RedetectBelow >= 1:
		return fmt.Errorf("track: RedetectBelow %g must be below 1 (0 = default %g, negative = off)", o.RedetectBelow, defaultRedetectBelow)
	case o.MinLength < 0:
		return fmt.Errorf("track: MinLength %d is negative (0 = default %d)", o.MinLength, defaultMinLength)
	}
	return nil
}

func (o Options) withDefaults() Options {
	o.Detect = o.Detect.withDefaults()
	o.Refine = o.Refine.withDefaults()
	o.Reject = o.Reject.withDefaults()
	if o.Window == 0 {
		o.Window = defaultWindow
	}
	if o.Levels == 0 {
		o.Levels = defaultLevels
	}
	if o.MaxIter == 0 {
		o.MaxIter = defaultLKIter
	}
	if o.Epsilon == 0 {
		o.Epsilon = defaultLKEps
		if !o.Refine.Off {
			o.Epsilon = defaultLKEpsRefined
		}
	}
	if o.MinEigen == 0 {
		o.MinEigen = defaultMinEigen
	}
	if o.FBThreshold == 0 {
		o.FBThreshold = defaultFB
	}
	if o.PredictWindow == 0 {
		o.PredictWindow = defaultPredictWindow
		if o.Refine.Off {
			o.PredictWindow = o.Window
		}
	}
	if o.PredictCapture == 0 {
		o.PredictCapture = defaultPredictCapture
	}
	if o.TrimEnd == 0 {
		o.TrimEnd = defaultTrimEnd
	}
	if o.MotionCheckPx == 0 {
		o.MotionCheckPx = defaultMotionPx
	}
	if o.MotionCheckFactor == 0 {
		o.MotionCheckFactor = defaultMotionFactor
	}
	if o.RedetectEvery == 0 {
		o.RedetectEvery = defaultRedetectEvery
	}
	if o.RedetectBelow == 0 {
		o.RedetectBelow = defaultRedetectBelow
	}
	if o.MinLength == 0 {
		o.MinLength = defaultMinLength
	}
	if o.Prefetch == 0 {
		o.Prefetch = defaultPrefetch
	}
	return o
}

// pyramidLevels is the number of levels OpenCV's buildOpticalFlowPyramid
// actually builds (lkpyramid.cpp, OpenCV 4.6): it stops at the first level
// whose half-size ((w+1)/2, (h+1)/2) is no larger than the window.
func pyramidLevels(w, h, win, maxLevel int) int {
	for l := 0; l < maxLevel; l++ {
		w, h = (w+1)/2, (h+1)/2
		if w <= win || h <= win {
			return l
		}
	}
	return maxLevel
}

// Run detects corners in the first frame of src and follows them
// through every frame with pyramidal Lucas–Kanade, checks and refines
// them, re-detects to keep coverage and returns the tracks with their
// diagnostics. progress, if not nil, is called after each frame with the
// number of frames done and the total. Cancelling ctx stops the work and
// returns ctx's error.
//
// Frames are decoded ahead in a goroutine (Prefetch), which also converts
// them to grey, builds each frame's LK pyramid once (OpenCV
// buildOpticalFlowPyramid, through the cgo shim; used by the forward run
// into the frame and the backward run out of it) and the smoothed float
// image refinement samples. Each frame pair (f−1, f):
//  1. LK forward from f−1 to f (OpenCV calcOpticalFlowPyrLK on the two
//     pyramids, window Window²; with prediction from the previous
//     displacement on PredictLevels levels, else Levels), LK backward
//     from f to f−1, and a deep retry of failures on all levels;
//  2. each point is ended with a reason: not found, low eigenvalue, left
//     the image (or within half a window of the border), forward–backward
//     distance above FBThreshold;
//  3. survivors are refined against their reference patch (RefineOptions,
//     on a fixed pool of Refine.Workers goroutines) and ended on
//     appearance drift; then the motion check (MotionCheckPx) ends points
//     that moved unlike their prediction; a track ended on a drift signal
//     loses its last TrimEnd observations;
//  4. every RedetectEvery frames, or when too few tracks are live, new
//     corners are detected away (MinDistance) from live tracks.
//
// After the last frame, tracks shorter than MinLength are dropped, the
// static-background and outlier checks run (RejectOptions), and then the
// occlusion-boundary check removes the tracks whose patch centre the votes
// collected during refinement assign to the static layer of their window
// (RefineOptions.StaticShare, DropBoundary).
func Run(ctx context.Context, src Source, opts Options, progress func(done, total int)) (*Set, error) {
	if src == nil {
		panic("track: Run with a nil Source")
	}
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	n := src.Len()
	if n < MinFrames {
		return nil, fmt.Errorf("track: the source has %d frames; at least %d are needed", n, MinFrames)
	}
	w, h := src.Size()
	t := newTracker(opts.withDefaults(), w, h, opts)
	defer t.close()
	if t.o.Detect.Mask != nil && len(t.o.Detect.Mask) != w*h {
		return nil, fmt.Errorf("track: detect mask has %d entries for %dx%d frames; give Width·Height = %d", len(t.o.Detect.Mask), w, h, w*h)
	}

	set := &Set{Frames: make([]string, n), Width: w, Height: h}
	for i := range set.Frames {
		set.Frames[i] = src.Name(i)
	}
	set.Stats.Ended = map[string]int{}
	set.Stats.Clamped = t.clamped

	frames, stop := startReader(ctx, src, n, readerSettings{prefetch: t.o.Prefetch, float: !t.o.Refine.Off,
		sigma: t.o.Refine.Sigma, win: t.o.Window, levels: t.levels})
	defer stop()

	var prev *frameBuf
	for f := 0; f < n; f++ {
		cur, err := frames.next(ctx)
		if err != nil {
			var se *SourceEndedError
			if errors.As(err, &se) && f >= MinFrames && ctx.Err() == nil {
				// A video cut short: keep the frames that decoded.
				set.Frames = set.Frames[:f]
				set.Stats.Stopped = &Stopped{Frame: src.Name(f), Index: se.Frame, Announced: n, Reason: se.Error()}
				break
			}
			return nil, err
		}
		if f == 0 {
			t.detectNew(cur, 0)
			if len(t.live) == 0 {
				return nil, fmt.Errorf("track: no corners found in frame %s; the frame may be blank, flat or blurred (try a lower Detect.Quality)", src.Name(0))
			}
		} else {
			t.step(prev, cur, f)
			t.maybeRedetect(cur, f)
			frames.release(prev)
		}
		t.liveCount = append(t.liveCount, len(t.live))
		prev = cur
		if progress != nil {
			progress(f+1, n)
		}
	}
	frames.release(prev)
	t.finish(set)
	if !t.o.Reject.Off {
		before := make(map[int]int, len(set.Tracks))
		for _, tr := range set.Tracks {
			before[tr.ID] = len(tr.Obs)
		}
		rep, err := Reject(ctx, set, t.o.Reject)
		if err != nil {
			return nil, err
		}
		t.applyReject(set, rep, before)
	}
	if !t.o.Refine.Off && t.o.Refine.StaticShare > 0 {
		t.applyBoundary(set)
	}
	return set, nil
}

// tracker holds the state of one Run call.
type tracker struct {
	o       Options
	w, h    int
	margin  int  // half window: points closer to the border are ended
	pwin    int  // LK window of the predicted runs (Options.PredictWindow)
	levels  int  // effective pyramid levels
	plevels int  // levels with prediction for the next pair
	autoLvl bool // plevels chosen from the residual motion
	clamped []string

	det  *detector
	pool *refinePool // nil when refinement is off

	tracks  []Track
	reasons []string // end reason per track id ("" = alive)
	// share is the static share of each track's patch centre
	// (refPatch.staticShare; −1 when unknown), set when the track ends.
	share   []float64
	dropped map[string]int // observations dropped, by reason
	live    []liveTrack

	// scratch, reused every frame; point coordinates interleaved (x, y)
	p, f, b, v []float32 // previous positions, forward, backward, last displacement
	rp0, rf    []float32 // deep retry: positions, results
	rdrop      []string
	xs, ys     []float64
	sf, sb     []uint8
	ef, eb     []float32
	idx        []int
	drop       []string
	rp         []*refPatch
	rr         []refineResult
	baseMask   []uint8
	mask       []uint8
	resid      []float64 // residual motion of this pair's tracks
	disp       []float64 // first displacements (x, y) of this pair's new tracks
	pos        []float64 // this pair's positions and quality (x, y, q)
	vgrid      []float64 // neighbour motion per cell: Σvx, Σvy, count
	newc       []Corner  // new corners that passed the spacing checks
	spacing    pointGrid // MinDistance check of new corners against live tracks
	dups       pointGrid // duplicate check among new corners
	usedLevels []int     // prediction depth per pair

	lastDetected int
	liveCount    []int
	retried      int
	refined      int // points refined (Stats.Refined)
	refineIters  int // their Gauss–Newton iterations (Stats.RefineIters)
	detected     int
}

// liveTrack is a track being followed.
type liveTrack struct {
	id     int
	x, y   float64 // position in the last frame
	vx, vy float64 // last displacement (for a new track: its neighbours')
	moved  bool    // vx, vy is the track's own displacement
	// hasPred: vx, vy predicts the next displacement (own, or the
	// neighbours' for a new track), so the motion check applies.
	hasPred bool
	ref     *refPatch
}

func newTracker(o Options, w, h int, given Options) *tracker {
	t := &tracker{o: o, w: w, h: h}
	win := o.Window
	if lim := min(w, h) / 2; win > lim {
		lim = max(minWindow, lim-(1-lim%2)) // odd
		if lim < win {
			t.clamped = append(t.clamped, fmt.Sprintf("LK window %d px reduced to %d px on %dx%d frames (at most half the smaller side)", win, lim, w, h))
			win = lim
		}
	}
	t.o.Window = win
	t.margin = win / 2
	t.pwin = win
	if !o.NoPredict && o.PredictWindow < win {
		t.pwin = o.PredictWindow
	}
	t.levels = pyramidLevels(w, h, win, o.Levels)
	if t.levels < o.Levels {
		t.clamped = append(t.clamped, fmt.Sprintf("pyramid levels %d reduced to %d on %dx%d frames with a %d px window (a coarser level would be no larger than the window)", o.Levels, t.levels, w, h, win))
	}
	switch {
	case o.PredictLevels == 0:
		t.autoLvl = true
		t.plevels = t.levels // first pair: no motion history
	case o.PredictLevels < 0:
		t.plevels = 0
	default:
		t.plevels = min(o.PredictLevels, t.levels)
		if !o.NoPredict && given.PredictLevels > t.levels {
			t.clamped = append(t.clamped, fmt.Sprintf("PredictLevels %d reduced to %d (the pyramid levels in use)", given.PredictLevels, t.plevels))
		}
	}
	if o.Detect.Border < t.margin+1 {
		t.o.Detect.Border = t.margin + 1
	}
	if o.Refine.HalfPatch > t.margin && !o.Refine.Off {
		t.clamped = append(t.clamped, fmt.Sprintf("refine HalfPatch %d reduced to %d (half the LK window)", o.Refine.HalfPatch, t.margin))
		t.o.Refine.HalfPatch = t.margin
	}
	t.det = newDetector()
	t.dropped = map[string]int{}
	if !o.Refine.Off {
		t.pool = newRefinePool(o.Refine.Workers)
		t.det.both = t.pool.both
	}
	// Detection mask: the user's mask minus the border band.
	t.baseMask = make([]uint8, w*h)
	b := t.o.Detect.Border
	for y := b; y < h-b; y++ {
		for x := b; x < w-b; x++ {
			i := y*w + x
			if o.Detect.Mask == nil || (len(o.Detect.Mask) == w*h && o.Detect.Mask[i]) {
				t.baseMask[i] = 1
			}
		}
	}
	t.mask = make([]uint8, w*h)
	return t
}

func (t *tracker) close() {
	t.det.close()
	if t.pool != nil {
		t.pool.close()
	}
}

// inside reports whether (x, y) is at least half a window from the border.
func (t *tracker) inside(x, y float64) bool {
	m := float64(t.margin)
	return x >= m && y >= m && x <= float64(t.w-1)-m && y <= float64(t.h-1)-m && !math.IsNaN(x) && !math.IsNaN(y)
}

// lk runs OpenCV's pyramidal LK (on the frames' pyramids, built once
// per frame) on the points pts (interleaved x, y) from prev to next, on
// levels levels above full resolution. With init, out holds the starting
// guesses (OPTFLOW_USE_INITIAL_FLOW). Results: positions in out, status
// and the minimum eigenvalue per point (OPTFLOW_LK_GET_MIN_EIGENVALS).
// Predicted runs on fewer levels than all (init, levels < t.levels) use
// the PredictWindow.
func (t *tracker) lk(prev, next *lkPyramid, pts, out []float32, init bool, levels int, st []uint8, eg []float32) {
	win := t.o.Window
	if init && levels < t.levels {
		win = t.pwin
	}
	lkPyr(prev, next, pts, out, st, eg, lkParams{win: win, maxLevel: levels, maxIter: t.o.MaxIter,
		eps: t.o.Epsilon, minEig: t.o.MinEigen, initial: init})
}

func grow32(s []float32, n int) []float32 {
	if cap(s) < n {
		return make([]float32, n, 2*n)
	}
	return s[:n]
}

func grow8(s []uint8, n int) []uint8 {
	if cap(s) < n {
		return make([]uint8, n, 2*n)
	}
	return s[:n]
}

// track runs forward and backward LK for the points p (interleaved) and
// classifies each: drop[i] is "" when kept, else a Drop* reason. With
// predict, LK starts from p + v (v: last displacements). Forward results
// go to f.
func (t *tracker) track(prev, cur *lkPyramid, predict bool, levels int, p, v, f []float32, drop []string) {
	n := len(p) / 2
	t.sf, t.ef = grow8(t.sf, n), grow32(t.ef, n)
	if predict {
		for i := range f {
			f[i] = p[i] + v[i]
		}
	}
	t.lk(prev, cur, p, f, predict, levels, t.sf, t.ef)
	fb := t.o.FBThreshold > 0
	if fb {
		t.b = grow32(t.b, 2*n)
		t.sb, t.eb = grow8(t.sb, n), grow32(t.eb, n)
		if predict {
			// Start the backward run from the forward result minus the
			// prediction, not from the original point (which would bias
			// the check towards success).
			for i := range f {
				t.b[i] = f[i] - v[i]
			}
		}
		t.lk(cur, prev, f, t.b, predict, levels, t.sb, t.eb)
	}
	fb2 := t.o.FBThreshold * t.o.FBThreshold
	minEig := float32(t.o.MinEigen)
	for i := 0; i < n; i++ {
		x, y := float64(f[2*i]), float64(f[2*i+1])
		switch {
		case t.sf[i] == 0 && !t.inside(x, y):
			drop[i] = DropLeftImage
		case t.sf[i] == 0 && t.ef[i] < minEig:
			drop[i] = DropLowEigen
		case t.sf[i] == 0:
			drop[i] = DropNotFound
		case !t.inside(x, y):
			drop[i] = DropLeftImage
		case fb && (t.sb[i] == 0 || sq(float64(t.b[2*i]-p[2*i]))+sq(float64(t.b[2*i+1]-p[2*i+1])) > fb2):
			drop[i] = DropForwardBack
		default:
			drop[i] = ""
		}
	}
}

func sq(v float64) float64 { return v * v }

// step tracks the live tracks from frame f−1 to f.
func (t *tracker) step(prev, cur *frameBuf, f int) {
	n := len(t.live)
	if n == 0 {
		return
	}
	t.p, t.f, t.v = grow32(t.p, 2*n), grow32(t.f, 2*n), grow32(t.v, 2*n)
	if cap(t.drop) < n {
		t.drop = make([]string, n, 2*n)
	}
	t.drop = t.drop[:n]
	for i, l := range t.live {
		t.p[2*i], t.p[2*i+1] = float32(l.x), float32(l.y)
		t.v[2*i], t.v[2*i+1] = float32(l.vx), float32(l.vy)
	}
	predict := !t.o.NoPredict
	levels := t.levels
	if predict {
		levels = t.plevels
		t.usedLevels = append(t.usedLevels, levels)
	}
	t.resid, t.disp = t.resid[:0], t.disp[:0]
	t.track(prev.pyr, cur.pyr, predict, levels, t.p, t.v, t.f, t.drop)

	// Deep retry of failures without prediction on all levels.
	if predict && t.plevels < t.levels {
		t.idx = t.idx[:0]
		for i, d := range t.drop {
			if d != "" && d != DropLowEigen {
				t.idx = append(t.idx, i)
			}
		}
		if m := len(t.idx); m > 0 {
			t.retried += m
			t.rp0, t.rf = grow32(t.rp0, 2*m), grow32(t.rf, 2*m)
			if cap(t.rdrop) < m {
				t.rdrop = make([]string, m, 2*m)
			}
			rdrop := t.rdrop[:m]
			for k, i := range t.idx {
				t.rp0[2*k], t.rp0[2*k+1] = t.p[2*i], t.p[2*i+1]
			}
			t.track(prev.pyr, cur.pyr, false, t.levels, t.rp0, nil, t.rf, rdrop)
			for k, i := range t.idx {
				t.f[2*i], t.f[2*i+1], t.drop[i] = t.rf[2*k], t.rf[2*k+1], rdrop[k]
			}
		}
	}

	// Refinement against the reference patches.
	refine := !t.o.Refine.Off
	if refine {
		t.rp = t.rp[:0]
		if cap(t.xs) < n {
			t.xs, t.ys = make([]float64, n, 2*n), make([]float64, n, 2*n)
		}
		xs, ys := t.xs[:n], t.ys[:n]
		for i, l := range t.live {
			xs[i], ys[i] = float64(t.f[2*i]), float64(t.f[2*i+1])

			if t.drop[i] == "" {
				t.rp = append(t.rp, l.ref)
			} else {
				t.rp = append(t.rp, nil)
			}
		}
		if cap(t.rr) < n {
			t.rr = make([]refineResult, n, 2*n)
		}
		t.rr = t.rr[:n]
		t.pool.run(&cur.fl, t.rp, xs, ys, t.rr, t.o.Refine.HalfPatch, &t.o.Refine)
	}

	// Final positions and reasons; residual motion of the tracks that
	// have moved before.
	if cap(t.pos) < 3*n {
		t.pos = make([]float64, 3*n, 6*n)
	}
	pos := t.pos[:3*n]
	for i, l := range t.live {
		x, y := float64(t.f[2*i]), float64(t.f[2*i+1])
		q := 0.0
		if t.drop[i] == "" && refine {
			r := t.rr[i]
			t.refined++
			t.refineIters += r.iter
			switch {
			case !r.ok:
				t.drop[i] = DropAppearance
			case t.o.Refine.MinNCC > 0 && r.ncc < t.o.Refine.MinNCC:
				t.drop[i] = DropAppearance
			case !t.inside(r.x, r.y):
				t.drop[i] = DropLeftImage
			default:
				x, y, q = r.x, r.y, math.Max(0, math.Min(1, r.ncc))
			}
		}
		pos[3*i], pos[3*i+1], pos[3*i+2] = x, y, q
		if t.drop[i] == "" && l.moved {
			t.resid = append(t.resid, math.Hypot(x-l.x-l.vx, y-l.y-l.vy))
		} else if t.drop[i] == "" {
			t.disp = append(t.disp, x-l.x, y-l.y)
		}
	}
	// Motion check: the largest residual a track may have this pair.
	jump := math.Inf(1)
	if t.o.MotionCheckPx > 0 {
		jump = t.o.MotionCheckPx
		if len(t.resid) > 0 {
			jump = math.Max(jump, t.o.MotionCheckFactor*quantile(t.resid, 0.95))
		}
	}

	kept := t.live[:0]
	for i, l := range t.live {
		reason := t.drop[i]
		x, y, q := pos[3*i], pos[3*i+1], pos[3*i+2]
		vx, vy := x-l.x, y-l.y
		if reason == "" && l.hasPred && math.Hypot(vx-l.vx, vy-l.vy) > jump {
			reason = DropMotion
		}
		if reason != "" {
			t.noteShare(&l)
			t.end(l.id, reason)
			continue
		}
		tr := &t.tracks[l.id]
		tr.Obs = append(tr.Obs, Observation{Frame: f, X: x, Y: y, Quality: q})
		l.vx, l.vy, l.moved, l.hasPred = vx, vy, true, true
		l.x, l.y = x, y
		kept = append(kept, l)
	}
	for i := len(kept); i < len(t.live); i++ {
		t.live[i] = liveTrack{}
	}
	t.live = kept
	if t.autoLvl && predict {
		t.chooseLevels()
	}
}

// end ends track id for reason: one observation failed, and on a drift
// signal (forward–backward, appearance, motion) TrimEnd observations are
// cut from its end as well (never its first).
func (t *tracker) end(id int, reason string) {
	t.reasons[id] = reason
	t.dropped[reason]++
	switch reason {
	case DropForwardBack, DropAppearance, DropMotion:
		tr := &t.tracks[id]
		k := min(t.o.TrimEnd, len(tr.Obs)-1)
		if k > 0 {
			tr.Obs = tr.Obs[:len(tr.Obs)-k]
			t.dropped[reason] += k
		}
	}
}

// quantile returns the q-quantile (nearest rank) of v, sorting v in place.
func quantile(v []float64, q float64) float64 {
	slices.Sort(v)
	return v[max(0, min(len(v)-1, int(math.Ceil(q*float64(len(v))))-1))]
}

// chooseLevels sets the prediction depth for the next pair from the
// residual motion of this one (t.resid; see Options.PredictLevels). When
// no track had a prediction yet (the first pair), the spread of the new
// tracks' displacements about their median (t.disp) stands in for it.
func (t *tracker) chooseLevels() {
	if len(t.resid) == 0 {
		if len(t.disp) == 0 {
			t.plevels = t.levels
			return
		}
		n := len(t.disp) / 2
		c := slices.Grow(t.resid, 2*n)[:n]
		for i := range c {
			c[i] = t.disp[2*i]
		}
		mx := quantile(c, 0.5)
		for i := range c {
			c[i] = t.disp[2*i+1]
		}
		my := quantile(c, 0.5)
		for i := range c {
			c[i] = math.Hypot(t.disp[2*i]-mx, t.disp[2*i+1]-my)
		}
		t.resid = c
	}
	q := quantile(t.resid, 0.95)
	l, r := 0, t.o.PredictCapture
	for l < t.levels && q > r {
		l++
		r *= 2
	}
	t.plevels = l
}

// neighbourMotion fills t.vgrid with the mean displacement of the live
// tracks that have moved, per cell of vgridCell pixels.
func (t *tracker) neighbourMotion() {
	gw, gh := (t.w+vgridCell-1)/vgridCell, (t.h+vgridCell-1)/vgridCell
	if cap(t.vgrid) < 3*gw*gh {
		t.vgrid = make([]float64, 3*gw*gh)
	}
	t.vgrid = t.vgrid[:3*gw*gh]
	clear(t.vgrid)
	for _, l := range t.live {
		if !l.moved {
			continue
		}
		cx := min(gw-1, max(0, int(l.x)/vgridCell))
		cy := min(gh-1, max(0, int(l.y)/vgridCell))
		g := t.vgrid[3*(cy*gw+cx):]
		g[0] += l.vx
		g[1] += l.vy
		g[2]++
	}
}

// predictNew is the starting displacement of a new track at (x, y): the
// mean displacement of the moved live tracks in its cell of t.vgrid, else
// in the 3×3 cells around it; ok is false when there are none.
func (t *tracker) predictNew(x, y float64) (vx, vy float64, ok bool) {
	gw, gh := (t.w+vgridCell-1)/vgridCell, (t.h+vgridCell-1)/vgridCell
	cx := min(gw-1, max(0, int(x)/vgridCell))
	cy := min(gh-1, max(0, int(y)/vgridCell))
	if g := t.vgrid[3*(cy*gw+cx):]; g[2] > 0 {
		return g[0] / g[2], g[1] / g[2], true
	}
	var sx, sy, n float64
	for j := max(0, cy-1); j <= min(gh-1, cy+1); j++ {
		for i := max(0, cx-1); i <= min(gw-1, cx+1); i++ {
			g := t.vgrid[3*(j*gw+i):]
			sx, sy, n = sx+g[0], sy+g[1], n+g[2]
		}
	}
	if n == 0 {
		return 0, 0, false
	}
	return sx / n, sy / n, true
}

// maybeRedetect adds tracks in empty areas of frame f when due.
func (t *tracker) maybeRedetect(cur *frameBuf, f int) {
	// With no live track there is nothing to lose by looking: after a
	// frame without texture (all black, a dropped frame) the count
	// reference below is 0 and would otherwise wait for the periodic round.
	due := len(t.live) == 0 || t.o.RedetectEvery > 0 && f%t.o.RedetectEvery == 0
	if t.o.RedetectBelow > 0 {
		ref := min(t.o.Detect.MaxCorners, t.lastDetected)
		if float64(len(t.live)) < t.o.RedetectBelow*float64(ref) {
			due = true
		}
	}
	if due && len(t.live) < t.o.Detect.MaxCorners {
		t.detectNew(cur, f)
	}
}

// detectNew detects corners in frame f away from live tracks and starts
// tracks on them.
func (t *tracker) detectNew(cur *frameBuf, f int) {
	copy(t.mask, t.baseMask)
	r := math.Max(0, t.o.Detect.MinDistance)
	ri := int(math.Ceil(r))
	r2 := r * r
	for _, l := range t.live {
		cx, cy := int(math.Round(l.x)), int(math.Round(l.y))
		for y := max(0, cy-ri); y <= min(t.h-1, cy+ri); y++ {
			dy := float64(y) - l.y
			row := t.mask[y*t.w:]
			for x := max(0, cx-ri); x <= min(t.w-1, cx+ri); x++ {
				dx := float64(x) - l.x
				if dx*dx+dy*dy < r2 {
					row[x] = 0
				}
			}
		}
	}
	t.neighbourMotion()
	o := t.o.Detect
	o.MaxCorners = t.o.Detect.MaxCorners - len(t.live)
	corners := t.det.detect(cur.gray, o, nil, t.mask)
	bgr, _ := cur.bgr.DataPtrUint8()
	// Sub-pixel refinement may move a corner by up to its half window,
	// even next to a live track or onto another new corner: the refined
	// positions are checked again, MinDistance from live tracks (new
	// tracks go to empty areas only) and dupRadius from each other (two
	// corners refined onto one feature).
	t.spacing.reset(t.w, t.h, r)
	for _, l := range t.live {
		t.spacing.add(l.x, l.y)
	}
	t.dups.reset(t.w, t.h, dupRadius)
	t.newc = t.newc[:0]
	for _, c := range corners {
		if !t.inside(c.X, c.Y) || t.spacing.near(c.X, c.Y) || t.dups.near(c.X, c.Y) {
			continue
		}
		t.dups.add(c.X, c.Y)
		t.newc = append(t.newc, c)
	}
	m := len(t.newc)
	refine := !t.o.Refine.Off
	if refine {
		// Reference patches, built in parallel.
		if cap(t.xs) < m {
			t.xs, t.ys = make([]float64, m, 2*m), make([]float64, m, 2*m)
		}
		xs, ys := t.xs[:m], t.ys[:m]
		for k, c := range t.newc {
			xs[k], ys[k] = c.X, c.Y
		}
		t.rp = slices.Grow(t.rp[:0], m)[:m]
		t.pool.build(&cur.fl, t.rp, xs, ys, t.o.Refine.HalfPatch, &t.o.Refine)
	}
	for k, c := range t.newc {
		id := len(t.tracks)
		t.detected++
		tr := Track{ID: id, RGB: sampleRGB(bgr, t.w, t.h, c.X, c.Y)}
		q := 0.0
		var ref *refPatch
		if refine {
			if ref = t.rp[k]; ref == nil {
				// Recorded, then ended: no reference to refine against.
				// (Shorter than MinLength, so finish removes it.)
				tr.Obs = []Observation{{Frame: f, X: c.X, Y: c.Y}}
				t.tracks = append(t.tracks, tr)
				t.reasons = append(t.reasons, DropLowEigen)
				t.share = append(t.share, -1)
				continue
			}
			q = 1
		}
		tr.Obs = []Observation{{Frame: f, X: c.X, Y: c.Y, Quality: q}}
		t.tracks = append(t.tracks, tr)
		t.reasons = append(t.reasons, "")
		t.share = append(t.share, -1)
		l := liveTrack{id: id, x: c.X, y: c.Y, ref: ref}
		l.vx, l.vy, l.hasPred = t.predictNew(c.X, c.Y)
		t.live = append(t.live, l)
	}
	clear(t.rp)
	t.lastDetected = len(t.live)
}

// pointGrid answers "is any point closer than r?" over a grid of r-sized
// cells; its buffers are reused between calls.
type pointGrid struct {
	r        float64
	gw, gh   int
	head     []int32
	next     []int32
	xs, ys   []float64
	disabled bool
}

func (g *pointGrid) reset(w, h int, r float64) {
	g.r, g.disabled = r, r <= 0
	g.xs, g.ys, g.next = g.xs[:0], g.ys[:0], g.next[:0]
	if g.disabled {
		return
	}
	g.gw, g.gh = int(float64(w)/r)+1, int(float64(h)/r)+1
	if cap(g.head) < g.gw*g.gh {
		g.head = make([]int32, g.gw*g.gh)
	}
	g.head = g.head[:g.gw*g.gh]
	for i := range g.head {
		g.head[i] = -1
	}
}

func (g *pointGrid) cell(x, y float64) (int, int) {
	return min(g.gw-1, max(0, int(x/g.r))), min(g.gh-1, max(0, int(y/g.r)))
}

func (g *pointGrid) add(x, y float64) {
	if g.disabled {
		return
	}
	cx, cy := g.cell(x, y)
	g.xs, g.ys = append(g.xs, x), append(g.ys, y)
	g.next = append(g.next, g.head[cy*g.gw+cx])
	g.head[cy*g.gw+cx] = int32(len(g.xs) - 1)
}

func (g *pointGrid) near(x, y float64) bool {
	if g.disabled {
		return false
	}
	cx, cy := g.cell(x, y)
	r2 := g.r * g.r
	for j := max(0, cy-1); j <= min(g.gh-1, cy+1); j++ {
		for i := max(0, cx-1); i <= min(g.gw-1, cx+1); i++ {
			for k := g.head[j*g.gw+i]; k >= 0; k = g.next[k] {
				if dx, dy := g.xs[k]-x, g.ys[k]-y; dx*dx+dy*dy < r2 {
					return true
				}
			}
		}
	}
	return false
}

// sampleRGB samples a BGR image bilinearly at (x, y).
func sampleRGB(bgr []uint8, w, h int, x, y float64) [3]uint8 {
	x = math.Max(0, math.Min(float64(w-1), x))
	y = math.Max(0, math.Min(float64(h-1), y))
	x0, y0 := int(x), int(y)
	x1, y1 := min(x0+1, w-1), min(y0+1, h-1)
	fx, fy := x-float64(x0), y-float64(y0)
	var out [3]uint8
	for c := 0; c < 3; c++ {
		p00 := float64(bgr[(y0*w+x0)*3+c])
		p01 := float64(bgr[(y0*w+x1)*3+c])
		p10 := float64(bgr[(y1*w+x0)*3+c])
		p11 := float64(bgr[(y1*w+x1)*3+c])
		v := (1-fy)*((1-fx)*p00+fx*p01) + fy*((1-fx)*p10+fx*p11)
		out[2-c] = uint8(math.Round(math.Max(0, math.Min(255, v))))
	}
	return out
}

// noteShare records the static share of live track l's patch centre
// (occlusion-boundary check) before its reference patch is let go.
func (t *tracker) noteShare(l *liveTrack) {
	if l.ref == nil {
		return
	}
	if s, ok := l.ref.staticShare(); ok {
		t.share[l.id] = s
	}
}

// finish moves the tracks into set, dropping short ones, and fills Stats.
// It also records the static share of the tracks still followed.
func (t *tracker) finish(set *Set) {
	st := &set.Stats
	for i := range t.live {
		t.noteShare(&t.live[i])
	}
	for id := range t.tracks {
		tr := t.tracks[id]
		if len(tr.Obs) < t.o.MinLength {
			st.Ended[DropTooShort]++
			t.dropped[DropTooShort] += len(tr.Obs)
			t.reasons[id] = DropTooShort
			continue
		}

		if r := t.reasons[id]; r != "" {
			st.Ended[r]++
		} else {
			st.Alive++
		}
		set.Tracks = append(set.Tracks, tr)
	}
	st.Detected = t.detected
	st.DroppedObs = t.dropped
	st.Retried = t.retried
	st.Refined, st.RefineIters = t.refined, t.refineIters
	st.PredictLevels = t.usedLevels
	st.Live = t.liveCount
}

// applyBoundary removes the tracks whose patch centre belongs to the
// static layer of their window (occlusion-boundary check,
// RefineOptions.StaticShare), moving each from its previous reason to
// DropBoundary and counting its observations as dropped. It runs after
// Reject, so that tracks on static background are reported as such.
func (t *tracker) applyBoundary(set *Set) {
	st := &set.Stats
	kept := set.Tracks[:0]
	for _, tr := range set.Tracks {
		if t.share[tr.ID] <= t.o.Refine.StaticShare {
			kept = append(kept, tr)
			continue
		}
		t.moveReason(st, tr.ID, DropBoundary)
		st.DroppedObs[DropBoundary] += len(tr.Obs)
	}
	clear(set.Tracks[len(kept):])
	set.Tracks = kept
}

// moveReason moves track id's count in st from its current reason (or
// Alive) to reason to.
func (t *tracker) moveReason(st *Stats, id int, to string) {
	if r := t.reasons[id]; r != "" {
		st.Ended[r]--
		if st.Ended[r] == 0 {
			delete(st.Ended, r)
		}
	} else {
		st.Alive--
	}
	st.Ended[to]++
	t.reasons[id] = to
}

// applyReject moves the counts of tracks the rejection removed or cut from
// their previous reason to the rejection's, and counts the observations it
// removed (before: each track's observation count before rejection).
func (t *tracker) applyReject(set *Set, rep *RejectReport, before map[int]int) {
	st := &set.Stats
	after := make(map[int]int, len(set.Tracks))
	for _, tr := range set.Tracks {
		after[tr.ID] = len(tr.Obs)
	}
	move := func(id int, to string) { t.moveReason(st, id, to) }
	for _, id := range rep.Static {
		move(id, DropStatic)
		st.DroppedObs[DropStatic] += before[id]
	}
	for _, id := range rep.Outliers {
		move(id, DropOutlier)
		st.DroppedObs[DropOutlier] += before[id] - after[id]
	}
	st.Reject = rep
}

// frameBuf is one decoded frame: colour, grey, its LK pyramid and (for
// refinement) float.
type frameBuf struct {
	i         int
	bgr, gray gocv.Mat
	pyr       *lkPyramid // grey pyramid with derivatives, built once
	smooth    gocv.Mat   // CV_32F, Gaussian-smoothed grey for refinement
	fl        floatImage // aliases smooth's data
	err       error
}

// readerSettings say what the frame reader prepares for each frame.
type readerSettings struct {
	prefetch int     // frames decoded ahead (≤ 0: in line)
	float    bool    // make the smoothed float image for refinement
	sigma    float64 // its Gaussian σ (≤ 0: none)
	win      int     // LK window the pyramid's borders are made for
	levels   int     // pyramid levels above full resolution
}

// frameReader decodes frames in a goroutine, Prefetch frames ahead,
// through a fixed pool of buffers (no per-frame allocation after the
// first frames).
type frameReader struct {
	src    Source
	n      int
	set    readerSettings
	inline bool
	next_  int
	free   chan *frameBuf
	ready  chan *frameBuf
	all    []*frameBuf
	cancel context.CancelFunc
	wg     sync.WaitGroup
}

func startReader(ctx context.Context, src Source, n int, set readerSettings) (*frameReader, func()) {
	prefetch := set.prefetch
	r := &frameReader{src: src, n: n, set: set}
	nbuf := 2
	if prefetch > 0 {
		nbuf += prefetch
	} else {
		r.inline = true
	}
	r.free = make(chan *frameBuf, nbuf)
	for i := 0; i < nbuf; i++ {
		b := &frameBuf{bgr: gocv.NewMat(), gray: gocv.NewMat(), smooth: gocv.NewMat(), pyr: newLKPyramid()}
		r.all = append(r.all, b)
		r.free <- b
	}
	if !r.inline {
		var cctx context.Context
		cctx, r.cancel = context.WithCancel(ctx)
		r.ready = make(chan *frameBuf, prefetch)
		r.wg.Add(1)
		go r.run(cctx)
	}
	stop := func() {
		if r.cancel != nil {
			r.cancel()
			for range r.ready {
			}
			r.wg.Wait()
		}
		for _, b := range r.all {
			b.bgr.Close()
			b.gray.Close()
			b.smooth.Close()
			b.pyr.close()
		}
	}
	return r, stop
}

func (r *frameReader) load(ctx context.Context, b *frameBuf, i int) {
	b.i = i
	b.err = r.src.Read(ctx, i, &b.bgr)
	if b.err != nil {
		return
	}
	if b.bgr.Type() != gocv.MatTypeCV8UC3 {
		b.err = fmt.Errorf("track: frame %s: the source gave a Mat of type %v, want 8-bit BGR", r.src.Name(i), b.bgr.Type())
		return
	}
	gocv.CvtColor(b.bgr, &b.gray, gocv.ColorBGRToGray)
	b.pyr.build(b.gray, r.set.win, r.set.levels)
	if r.set.float {
		b.gray.ConvertTo(&b.smooth, gocv.MatTypeCV32F)
		if r.set.sigma > 0 {
			// Kernel size 0: OpenCV derives it from sigma (±3σ for float).
			gocv.GaussianBlur(b.smooth, &b.smooth, image.Pt(0, 0), r.set.sigma, r.set.sigma, gocv.BorderReflect101)
		}
		p, err := b.smooth.DataPtrFloat32()
		if err != nil {
			b.err = fmt.Errorf("track: frame %s: %v", r.src.Name(i), err)
			return
		}
		b.fl = floatImage{w: b.smooth.Cols(), h: b.smooth.Rows(), pix: p}
	}
}

func (r *frameReader) run(ctx context.Context) {
	defer r.wg.Done()
	defer close(r.ready)
	for i := 0; i < r.n; i++ {
		var b *frameBuf
		select {
		case b = <-r.free:
		case <-ctx.Done():
			return
		}
		r.load(ctx, b, i)
		select {
		case r.ready <- b:
		case <-ctx.Done():
			return
		}
		if b.err != nil {
			return
		}
	}
}

// next returns the next decoded frame.
func (r *frameReader) next(ctx context.Context) (*frameBuf, error) {
	if r.inline {
		b := <-r.free
		r.load(ctx, b, r.next_)
		r.next_++
		if b.err != nil {
			return nil, b.err
		}
		return b, nil
	}
	select {
	case b, ok := <-r.ready:
		if !ok {
			if err := ctx.Err(); err != nil {
				return nil, err
			}
			return nil, fmt.Errorf("track: frame reader stopped early")
		}
		if b.err != nil {
			return nil, b.err
		}
		return b, nil
	case <-ctx.Done():
		return nil, ctx.Err()
	}
}

// release hands a frame buffer back to the reader.
func (r *frameReader) release(b *frameBuf) {
	if b != nil {
		r.free <- b
	}
}
