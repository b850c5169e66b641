package track

import (
	"context"
	"fmt"
	"image"
	"math"
	"path/filepath"
	"syscall"
	"testing"
	"time"

	"gocv.io/x/gocv"

	"trackfactor/track/synth"
)

// benchFrames is the length of the benchmark sequences.
const benchFrames = 20

// benchSeq is a benchmark sequence written as PNG files into a folder, so
// that decoding is part of what is timed.
type benchSeq struct {
	dir  string
	n    int
	w, h int
	// affine, when not nil, is the known warp of frame k (crop
	// coordinates): a point at p in frame 0 is at affine(k)·p in frame k.
	affine func(k int) [6]float64
}

// Benchmark warp: per frame a shift of (1.7, −1.1) px, a rotation of 0.2°
// and a scaling of 0.2 % about the crop's centre, so over 20 frames points
// drift 40 px, turn 4° and grow 4 %, and corners leave the image and new
// ones enter.
const (
	benchShiftX, benchShiftY = 1.7, -1.1
	benchRotDeg              = 0.2
	benchScale               = 1.002
)

// warpBenchSeq makes the known-warp benchmark sequence: opencv-doc
// graf1.png (800×640, a real photograph) warped per frame by the benchmark
// warp with supersampling (warpSequenceSS, 4×), then cropped to its
// central 640×480 so that every pixel comes from the photograph (the
// replicated border stays more than 15 px outside the crop in every
// frame).
func warpBenchSeq(tb testing.TB) *benchSeq {
	tb.Helper()
	img := gocv.IMRead(extData(tb, "graf1.png"), gocv.IMReadColor)
	defer img.Close()
	const w, h = 640, 480
	ox, oy := (img.Cols()-w)/2, (img.Rows()-h)/2
	ccx, ccy := float64(w-1)/2, float64(h-1)/2
	crop := func(k int) [6]float64 {
		s := math.Pow(benchScale, float64(k))
		th := benchRotDeg * float64(k) * math.Pi / 180
		a, b, c, d := s*math.Cos(th), -s*math.Sin(th), s*math.Sin(th), s*math.Cos(th)
		return [6]float64{a, b, ccx - a*ccx - b*ccy + benchShiftX*float64(k),
			c, d, ccy - c*ccx - d*ccy + benchShiftY*float64(k)}
	}
	// The same warp in the full photograph's coordinates (crop = full − o).
	full := func(k int) [6]float64 {
		m := crop(k)
		fx, fy := float64(ox), float64(oy)
		return [6]float64{m[0], m[1], m[2] + fx - m[0]*fx - m[1]*fy, m[3], m[4], m[5] + fy - m[3]*fx - m[4]*fy}
	}
	src := warpSequenceSS(tb, img, benchFrames, full, 4)
	defer src.Close()
	seq := &benchSeq{dir: tb.TempDir(), n: benchFrames, w: w, h: h, affine: crop}
	for k, m := range src.mats {
		roi := m.Region(image.Rect(ox, oy, ox+w, oy+h))
		ok := gocv.IMWrite(filepath.Join(seq.dir, fmt.Sprintf("%03d.png", k)), roi)
		roi.Close()
		if !ok {
			tb.Fatalf("cannot write benchmark frame %d", k)
		}
	}
	return seq
}

// turntableBenchSeq renders the synthetic turntable (synth defaults,
// 640×480, 1° per frame, noise σ = 1 grey level, static textured
// backdrop) as PNG files.
func turntableBenchSeq(tb testing.TB) *benchSeq {
	tb.Helper()
	_, src, imgs := renderScene(tb, synth.Options{Frames: benchFrames, NoiseSigma: 1, Backdrop: true})
	src.Close()
	seq := &benchSeq{dir: tb.TempDir(), n: benchFrames, w: 640, h: 480}
	m := gocv.NewMat()
	defer m.Close()
	for k, im := range imgs {
		imageToBGR(im, &m)
		if !gocv.IMWrite(filepath.Join(seq.dir, fmt.Sprintf("%03d.png", k)), m) {
			tb.Fatalf("cannot write benchmark frame %d", k)
		}
	}
	return seq
}

// cpuTime is the CPU time (user + system) the process has used, all
// threads (OpenCV's included).
func cpuTime() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// reportSpeed reports frames/s (wall clock) and CPU milliseconds per frame
// (less sensitive to other work on the machine; on 2 idle cores wall
// time per frame is at least half of it).
func reportSpeed(b *testing.B, frames int, cpu time.Duration) {
	b.ReportMetric(float64(frames*b.N)/b.Elapsed().Seconds(), "frames/s")
	b.ReportMetric(cpu.Seconds()*1000/float64(frames*b.N), "cpu-ms/frame")
}

func (s *benchSeq) path(k int) string { return filepath.Join(s.dir, fmt.Sprintf("%03d.png", k)) }

// trackStats are what the benchmark compares besides speed: kept tracks
// per frame pair and end-point errors against the known warp.
type trackStats struct {
	perPair float64   // kept points per frame pair (observations in frames 1..n−1 / (n−1))
	errs    []float64 // end-point errors in pixels over each track's life (known-warp sequences only)
	// pair are the errors of each observation against where the known
	// warp takes the track's previous observation: the error of one frame
	// pair's motion, what the plain loop measures (for the plain loop errs
	// and pair are the same).
	pair []float64
}

func (s trackStats) String() string {
	if len(s.errs) == 0 {
		return fmt.Sprintf("%.1f tracks/pair", s.perPair)
	}
	return fmt.Sprintf("%.1f tracks/pair, error median %.4f px, p99 %.4f px (per pair %.4f, %.4f)", s.perPair,
		percentile(s.errs, 50), percentile(s.errs, 99), percentile(s.pair, 50), percentile(s.pair, 99))
}

// report adds the kept tracks and the errors to a benchmark's metrics.
func (s trackStats) report(b *testing.B) {
	b.ReportMetric(s.perPair, "tracks/pair")
	if len(s.errs) > 0 {
		b.ReportMetric(percentile(s.errs, 50), "median-px")
		b.ReportMetric(percentile(s.errs, 99), "p99-px")
		b.ReportMetric(percentile(s.pair, 50), "pair-median-px")
		b.ReportMetric(percentile(s.pair, 99), "pair-p99-px")
	}
}

// warpErr is the end-point error of (x, y) in frame k for a point seen at
// (x0, y0) in frame k0 under the known warp.
func (s *benchSeq) warpErr(k0 int, x0, y0 float64, k int, x, y float64) float64 {
	p, q := applyAffine(invAffine(s.affine(k0)), x0, y0)
	ex, ey := applyAffine(s.affine(k), p, q)
	return math.Hypot(x-ex, y-ey)
}

// setStats measures a Set: every observation after a track's first is
// compared with where the known warp takes its first observation, so
// drift over the track's life counts.
func (s *benchSeq) setStats(set *Set) trackStats {
	var st trackStats
	obs := 0
	for _, tr := range set.Tracks {
		a := tr.Obs[0]
		for k, o := range tr.Obs[1:] {
			obs++
			if s.affine != nil {
				p := tr.Obs[k]
				st.errs = append(st.errs, s.warpErr(a.Frame, a.X, a.Y, o.Frame, o.X, o.Y))
				st.pair = append(st.pair, s.warpErr(p.Frame, p.X, p.Y, o.Frame, o.X, o.Y))
			}
		}
	}
	st.perPair = float64(obs) / float64(s.n-1)
	return st
}

// plainLoop is the straightforward loop the tracker is measured against:
// for each frame pair, decode the next frame and convert it to grey,
// detect 1000 corners in the previous one with goodFeaturesToTrack
// (quality 0.01, distance 7 px), track them forward and backward with
// calcOpticalFlowPyrLK (21 px window, 3 levels, 30 iterations / 0.01 px,
// OpenCV building both pyramids on every call). With st not nil it also
// counts the kept points, those found both ways within 0.5 px
// forward–backward and, as the tracker requires, at least half a window
// (10 px) from the border in both frames, and their end-point errors
// against the known warp of the pair.
func plainLoop(tb testing.TB, s *benchSeq, st *trackStats) {
	bgr := gocv.IMRead(s.path(0), gocv.IMReadColor)
	prev, cur := gocv.NewMat(), gocv.NewMat()
	corners, next, back := gocv.NewMat(), gocv.NewMat(), gocv.NewMat()
	sf, ef, sb, eb := gocv.NewMat(), gocv.NewMat(), gocv.NewMat(), gocv.NewMat()
	defer func() {
		for _, m := range []*gocv.Mat{&bgr, &prev, &cur, &corners, &next, &back, &sf, &ef, &sb, &eb} {
			m.Close()
		}
	}()
	crit := gocv.NewTermCriteria(gocv.Count|gocv.EPS, 30, 0.01)
	win := image.Pt(21, 21)
	gocv.CvtColor(bgr, &prev, gocv.ColorBGRToGray)
	kept := 0
	for f := 1; f < s.n; f++ {
		bgr.Close()
		bgr = gocv.IMRead(s.path(f), gocv.IMReadColor)
		if bgr.Empty() {
			tb.Fatalf("cannot read %s", s.path(f))
		}
		gocv.CvtColor(bgr, &cur, gocv.ColorBGRToGray)
		gocv.GoodFeaturesToTrack(prev, &corners, 1000, 0.01, 7)
		gocv.CalcOpticalFlowPyrLKWithParams(prev, cur, corners, next, &sf, &ef, win, 3, crit, 0, 1e-4)
		gocv.CalcOpticalFlowPyrLKWithParams(cur, prev, next, back, &sb, &eb, win, 3, crit, 0, 1e-4)
		if st != nil {
			c, _ := corners.DataPtrFloat32()
			nx, _ := next.DataPtrFloat32()
			bk, _ := back.DataPtrFloat32()
			a, _ := sf.DataPtrUint8()
			b, _ := sb.DataPtrUint8()
			in := func(x, y float32) bool {
				return x >= 10 && y >= 10 && x <= float32(s.w-11) && y <= float32(s.h-11)
			}
			for i := range a {
				x0, y0, x1, y1 := c[2*i], c[2*i+1], nx[2*i], nx[2*i+1]
				if a[i] == 0 || b[i] == 0 || !in(x0, y0) || !in(x1, y1) ||
					math.Hypot(float64(bk[2*i]-x0), float64(bk[2*i+1]-y0)) > 0.5 {
					continue
				}
				kept++
				if s.affine != nil {
					e := s.warpErr(f-1, float64(x0), float64(y0), f, float64(x1), float64(y1))
					st.errs, st.pair = append(st.errs, e), append(st.pair, e)
				}
			}
		}
		prev, cur = cur, prev
	}
	if st != nil {
		st.perPair = float64(kept) / float64(s.n-1)
	}
}

// benchCases are the tracker settings benchmarked: "default" is Run's
// defaults (drift-free refinement, rejection), "lk" turns refinement and
// rejection off (LK with prediction, shallow pyramid, deep retry),
// "lk-nopredict" also turns prediction off (3 levels for every point).
var benchCases = []struct {
	name string
	o    Options
}{
	{"default", Options{}},
	{"lk", Options{Refine: RefineOptions{Off: true}, Reject: RejectOptions{Off: true}}},
	{"lk-nopredict", Options{NoPredict: true, Refine: RefineOptions{Off: true}, Reject: RejectOptions{Off: true}}},
}

// BenchmarkTrack640x480 times the whole tracking stage (Run on a folder of
// PNG frames, decoding included) at 640×480 with 1000 corners and the
// forward–backward check, on the known-warp photograph sequence ("warp")
// and on the rendered turntable with a backdrop ("turntable"). It reports
// frames/s, kept tracks per frame pair and, on "warp", the median and 99th
// percentile end-point error in pixels against the known warp over each
// track's life.
//
// Goal (issue 3): the default tracker at ≥ 1.6× the frames/s of
// BenchmarkPlainLoop on the same frames, with as many tracks (within 1 %)
// and positions as accurate (TestBenchParity checks these two, and
// BenchmarkVsPlain measures the ratio with both loops under the same
// load). Errors: median-px and p99-px over each track's life (against
// where the known warp takes its first observation), pair-median-px and
// pair-p99-px over single frame pairs (against where it takes the previous
// observation: the plain loop's measure, since it has no longer tracks).
//
// Measured on the 2-core development machine (AMD EPYC, OpenCV 4.6.0),
// shared with other work (load average 2–3 during these rounds). The
// tracker before and after the occlusion-boundary and speed work of
// issue 3's last round, each round running both builds back to back
// (-benchtime 10x, 3 rounds, medians; the plain loop, the same code in
// both, pooled over the 6 runs: warp 40.8 frames/s and 38.5 CPU-ms per
// frame, turntable 49.8 and 30.7; frames/s swing by ±15 % between rounds,
// CPU time per frame less):
//
//	                                before          after
//	warp/default frames/s           58.9 (1.44×)    73.6 (1.80× the plain loop)
//	warp/default cpu-ms/frame       28.6 (1.35×)    22.7 (1.70×)
//	turntable/default frames/s      59.7 (1.20×)    83.1 (1.67×)
//	turntable/default cpu-ms/frame  26.6 (1.15×)    20.6 (1.49×)
//	warp/default tracks/pair        933.0           933.2  (plain 857.5)
//	warp/default life median/p99    0.0321/0.2268   0.0325/0.2265 px
//	warp/default pair median/p99    0.0227/0.1700   0.0233/0.1620 px (plain 0.0249/0.1197)
//	warp/lk life median/p99         0.160/1.044     0.160/1.044 px (LK sets the positions: the full window)
//	warp/lk pair median/p99         0.0264/0.113    0.0264/0.113 px
//
// (before: the pair errors measured by the same code on that build's
// tracks.) On a quieter machine (load about 1) the build just before the
// last change (which also ran the first pair on the 17 px window) reached
// 86.6 frames/s on warp against the plain loop's 43.3 (2.0×) and 96.9 on
// the turntable against 56.0 (1.73×); BenchmarkVsPlain (interleaved)
// 1.87×. Where the time went (after, turntable, CPU per frame): PNG
// decoding 6.0 ms (both loops), LK forward and backward 3.8 ms,
// refinement 2.2 ms (1.8 iterations per point), corner detection every 5
// frames 1.3 ms, occlusion votes 0.7 ms, grey, pyramid, smoothing 0.7 ms.
// The gains: the LK window of the predicted runs (PredictWindow 17:
// OpenCV's LK took half the time of 21), LK Epsilon 0.05 with
// refinement, refinement Epsilon 0.3 (1.2–1.8 instead of 2.2–2.3
// iterations), the second pair's pyramid depth chosen from the first
// pair's motion (full depth before), and the occlusion votes in an AVX2
// kernel. The plain loop's 99th-percentile error per pair stays below
// ours (see TestBenchParity); its LK chained over our tracks' lives (lk)
// drifts to 0.16 px median where ours stays at 0.033.
func BenchmarkTrack640x480(b *testing.B) {
	outer := b
	for _, sq := range []struct {
		name string
		make func(testing.TB) *benchSeq
	}{{"warp", warpBenchSeq}, {"turntable", turntableBenchSeq}} {
		var seq *benchSeq
		for _, bc := range benchCases {
			b.Run(sq.name+"/"+bc.name, func(b *testing.B) {
				if seq == nil {
					seq = sq.make(outer) // made once, kept for the other cases
				}
				var set *Set
				b.ResetTimer()
				c0 := cpuTime()
				for i := 0; i < b.N; i++ {
					src, err := OpenFolder(seq.dir, Range{})
					if err != nil {
						b.Fatal(err)
					}
					set, err = Run(context.Background(), src, bc.o, nil)
					if err != nil {
						b.Fatal(err)
					}
				}
				reportSpeed(b, seq.n, cpuTime()-c0)
				seq.setStats(set).report(b)
			})
		}
	}
}

// BenchmarkPlainLoop times plainLoop on the same frames as
// BenchmarkTrack640x480 and reports the same metrics (errors over one
// frame pair: the plain loop has no longer tracks).
func BenchmarkPlainLoop(b *testing.B) {
	for _, sq := range []struct {
		name string
		make func(testing.TB) *benchSeq
	}{{"warp", warpBenchSeq}, {"turntable", turntableBenchSeq}} {
		b.Run(sq.name, func(b *testing.B) {
			seq := sq.make(b)
			b.ResetTimer()
			c0 := cpuTime()
			for i := 0; i < b.N; i++ {
				plainLoop(b, seq, nil)
			}
			reportSpeed(b, seq.n, cpuTime()-c0)
			b.StopTimer()
			var st trackStats
			plainLoop(b, seq, &st)
			st.report(b)
		})
	}
}

// BenchmarkVsPlain measures the speed ratio itself: each iteration runs
// the plain loop and then the default tracker on the known-warp sequence
// (decoding included for both), timing each, so that both meet the same
// load when other work shares the machine. It reports the ratio of the
// plain loop's total time to the tracker's ("x-plain", issue 3's goal
// ≥ 1.6), the median of the per-iteration ratios, and both frame rates.
func BenchmarkVsPlain(b *testing.B) {
	seq := warpBenchSeq(b)
	var tPlain, tOurs time.Duration
	var ratios []float64
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		t0 := time.Now()
		plainLoop(b, seq, nil)
		t1 := time.Now()
		src, err := OpenFolder(seq.dir, Range{})
		if err != nil {
			b.Fatal(err)
		}
		if _, err := Run(context.Background(), src, Options{}, nil); err != nil {
			b.Fatal(err)
		}
		t2 := time.Now()
		tPlain += t1.Sub(t0)
		tOurs += t2.Sub(t1)
		ratios = append(ratios, t1.Sub(t0).Seconds()/t2.Sub(t1).Seconds())
	}
	b.ReportMetric(tPlain.Seconds()/tOurs.Seconds(), "x-plain")
	b.ReportMetric(percentile(ratios, 50), "x-plain-median")
	b.ReportMetric(float64(seq.n*b.N)/tOurs.Seconds(), "frames/s")
	b.ReportMetric(float64(seq.n*b.N)/tPlain.Seconds(), "plain-frames/s")
}

// plainOnOurPoints runs the plain loop's LK (calcOpticalFlowPyrLK, 21 px
// window, 3 levels, 30 iterations / 0.01 px, OpenCV building the
// pyramids) from every observation of set in frame f−1 that the set
// continues into frame f, so that both trackers start from the same
// points, and returns the end-point errors of both against the known warp
// of the pair (the plain loop's points that LK reports lost are left out
// of both).
func plainOnOurPoints(tb testing.TB, s *benchSeq, set *Set) (plain, ours []float64) {
	tb.Helper()
	grays := make([]gocv.Mat, s.n)
	for k := range grays {
		bgr := gocv.IMRead(s.path(k), gocv.IMReadColor)
		grays[k] = gocv.NewMat()
		gocv.CvtColor(bgr, &grays[k], gocv.ColorBGRToGray)
		bgr.Close()
	}
	next, st, er := gocv.NewMat(), gocv.NewMat(), gocv.NewMat()
	defer func() {
		for k := range grays {
			grays[k].Close()
		}
		next.Close()
		st.Close()
		er.Close()
	}()
	crit := gocv.NewTermCriteria(gocv.Count|gocv.EPS, 30, 0.01)
	for f := 1; f < s.n; f++ {
		var from, to []Observation
		for _, tr := range set.Tracks {
			for k := 1; k < len(tr.Obs); k++ {
				if tr.Obs[k].Frame == f && tr.Obs[k-1].Frame == f-1 {
					from, to = append(from, tr.Obs[k-1]), append(to, tr.Obs[k])
				}
			}
		}
		if len(from) == 0 {
			continue
		}
		pm := gocv.NewMatWithSize(len(from), 1, gocv.MatTypeCV32FC2)
		pp, _ := pm.DataPtrFloat32()
		for i, o := range from {
			pp[2*i], pp[2*i+1] = float32(o.X), float32(o.Y)
		}
		gocv.CalcOpticalFlowPyrLKWithParams(grays[f-1], grays[f], pm, next, &st, &er, image.Pt(21, 21), 3, crit, 0, 1e-4)
		nx, _ := next.DataPtrFloat32()
		ok, _ := st.DataPtrUint8()
		for i, a := range from {
			if ok[i] == 0 {
				continue
			}
			plain = append(plain, s.warpErr(f-1, a.X, a.Y, f, float64(nx[2*i]), float64(nx[2*i+1])))
			ours = append(ours, s.warpErr(f-1, a.X, a.Y, f, to[i].X, to[i].Y))
		}
		pm.Close()
	}
	return plain, ours
}

// TestBenchParity checks the non-speed half of the benchmark goal on the
// known-warp benchmark sequence (opencv-doc graf1.png, benchmark warp):
// the speed-ups must not cost tracks or accuracy. Run with default options
// is compared with a reference run without them (NoPredict: all 3 levels
// and the full window for every point; LK Epsilon 0.01 px, refinement
// Epsilon 0.005 px, the earlier defaults): tracks per frame pair within
// 1 % (issue 3's bound), and the end-point errors against the known warp,
// measured over each track's whole life, no worse than the reference's by
// more than 0.002 px at the median and 0.02 px at the 99th percentile (a
// tolerance for the slightly different point sets; the medians are about
// 0.03 px).
//
// Against the plain loop (BenchmarkPlainLoop's): at least 99 % as many
// points per pair; and, on the same points (plainOnOurPoints: the plain
// loop's LK started from our observations in frame f−1), our per-pair
// median error no worse than its (+0.002 px). Measured when written: per
// pair, ours 0.0228 px median and 0.165 px at the 99th percentile, the
// plain loop's 0.0264 and 0.112 on the same points; over the tracks'
// lives ours stays at 0.032 and 0.23 px (drift-free), where plain
// frame-to-frame LK chained over the same lives (Refine.Off) reaches
// 0.160 and 1.04 px. The 99th percentile per pair is the one figure where
// the plain loop is ahead (the 15×15 affine refinement's noise on a few
// per cent of the tracks, see RefineOptions.HalfPatch); it is logged.
// Every track's life also keeps issue 3's accuracy bounds for known
// warps of real photographs (median ≤ 0.05 px, 99th percentile ≤ 0.3 px).
func TestBenchParity(t *testing.T) {
	if testing.Short() {
		t.Skip("makes the 20-frame benchmark sequence; skipped in -short")
	}
	seq := warpBenchSeq(t)
	run := func(o Options) (trackStats, *Set) {
		src, err := OpenFolder(seq.dir, Range{})
		if err != nil {
			t.Fatal(err)
		}
		set, err := Run(context.Background(), src, o, nil)
		if err != nil {
			t.Fatal(err)
		}
		checkInvariants(t, set)
		return seq.setStats(set), set
	}
	ours, set := run(Options{})
	ref, _ := run(Options{NoPredict: true, Epsilon: 0.01, Refine: RefineOptions{Epsilon: 0.005}})
	var plain trackStats
	plainLoop(t, seq, &plain)
	po, oo := plainOnOurPoints(t, seq, set)
	t.Logf("default:    %v; ended %v, prediction depths %v, %.2f refinement iterations per point", ours, set.Stats.Ended, set.Stats.PredictLevels,
		float64(set.Stats.RefineIters)/float64(set.Stats.Refined))
	t.Logf("reference:  %v", ref)
	t.Logf("plain loop: %v", plain)
	t.Logf("same points (%d): per pair, ours median %.4f px, p99 %.4f px; plain loop's LK %.4f, %.4f", len(po),
		percentile(oo, 50), percentile(oo, 99), percentile(po, 50), percentile(po, 99))
	if math.Abs(ours.perPair-ref.perPair) > 0.01*ref.perPair {
		t.Errorf("%.1f tracks per pair, reference %.1f: more than 1 %% apart", ours.perPair, ref.perPair)
	}
	om, o99 := percentile(ours.errs, 50), percentile(ours.errs, 99)
	rm, r99 := percentile(ref.errs, 50), percentile(ref.errs, 99)
	if om > rm+0.002 || o99 > r99+0.02 {
		t.Errorf("error median %.4f px, p99 %.4f px; the reference's %.4f and %.4f (tolerance +0.002, +0.02 px)", om, o99, rm, r99)
	}
	if om > 0.05 || o99 > 0.3 {
		t.Errorf("error median %.4f px, p99 %.4f px over the tracks' lives; issue 3 asks ≤ 0.05 and ≤ 0.3", om, o99)
	}
	if ours.perPair < 0.99*plain.perPair {
		t.Errorf("%.1f tracks per pair, fewer than 99 %% of the plain loop's %.1f", ours.perPair, plain.perPair)
	}
	if len(po) < 1000 {
		t.Fatalf("only %d points shared with the plain loop's LK", len(po))
	}
	if m, pm := percentile(oo, 50), percentile(po, 50); m > pm+0.002 {
		t.Errorf("same points, per pair: our median %.4f px, the plain loop's %.4f (tolerance +0.002)", m, pm)
	}
}
