package track

import (
	"context"
	"image"
	"testing"

	"gocv.io/x/gocv"

	"trackfactor/track/synth"
)

const benchFrames = 20

// benchSource renders benchFrames synthetic 640×480 frames (default synth
// scene with noise σ = 1 and a backdrop, so corners fill the image).
func benchSource(b *testing.B) Source {
	b.Helper()
	_, src, _ := renderScene(b, synth.Options{Frames: benchFrames, NoiseSigma: 1, Backdrop: true})
	return src
}

// BenchmarkTrack640x480 runs the tracker on 640×480 synth frames with
// 1000 corners and the forward–backward check: "refined" is the default
// (drift-free refinement, rejection), "lk" turns refinement and rejection
// off to show the cost of LK with prediction, shallow pyramids, re-used
// buffers and decoding in a goroutine. Reports frames/s.
func BenchmarkTrack640x480(b *testing.B) {
	src := benchSource(b)
	for _, bc := range []struct {
		name string
		o    Options
	}{
		{"refined", Options{}},
		{"lk", Options{Refine: RefineOptions{Off: true}, Reject: RejectOptions{Off: true}}},
		{"lk-nopredict", Options{NoPredict: true, Refine: RefineOptions{Off: true}, Reject: RejectOptions{Off: true}}},
	} {
		b.Run(bc.name, func(b *testing.B) {
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				set, err := Run(context.Background(), src, bc.o, nil)
				if err != nil {
					b.Fatal(err)
				}
				if len(set.Tracks) < 500 {
					b.Fatalf("only %d tracks", len(set.Tracks))
				}
			}
			b.ReportMetric(float64(benchFrames*b.N)/b.Elapsed().Seconds(), "frames/s")
		})
	}
}

// BenchmarkPlainLoop is the straightforward loop the tracker is measured
// against: for each frame pair, read and convert both frames, detect 1000
// corners with goodFeaturesToTrack, track them forward and backward with
// calcOpticalFlowPyrLK (21 px window, 3 levels, OpenCV building both
// pyramids on every call). Reports frames/s.
func BenchmarkPlainLoop(b *testing.B) {
	src := benchSource(b)
	ctx := context.Background()
	bgr, prev, cur := gocv.NewMat(), gocv.NewMat(), gocv.NewMat()
	corners, next, back := gocv.NewMat(), gocv.NewMat(), gocv.NewMat()
	st, er := gocv.NewMat(), gocv.NewMat()
	defer func() {
		for _, m := range []*gocv.Mat{&bgr, &prev, &cur, &corners, &next, &back, &st, &er} {
			m.Close()
		}
	}()
	crit := gocv.NewTermCriteria(gocv.Count|gocv.EPS, 30, 0.01)
	win := image.Pt(21, 21)
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if err := src.Read(ctx, 0, &bgr); err != nil {
			b.Fatal(err)
		}
		gocv.CvtColor(bgr, &prev, gocv.ColorBGRToGray)
		for f := 1; f < benchFrames; f++ {
			if err := src.Read(ctx, f, &bgr); err != nil {
				b.Fatal(err)
			}
			gocv.CvtColor(bgr, &cur, gocv.ColorBGRToGray)
			gocv.GoodFeaturesToTrack(prev, &corners, 1000, 0.01, 7)
			gocv.CalcOpticalFlowPyrLKWithParams(prev, cur, corners, next, &st, &er, win, 3, crit, 0, 1e-4)
			gocv.CalcOpticalFlowPyrLKWithParams(cur, prev, next, back, &st, &er, win, 3, crit, 0, 1e-4)
			prev, cur = cur, prev
		}
	}
	b.ReportMetric(float64(benchFrames*b.N)/b.Elapsed().Seconds(), "frames/s")
}
