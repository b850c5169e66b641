package pipeline

import (
	"context"
	"os"
	"path/filepath"
	"strconv"
	"testing"

	"trackfactor/factor"
)

// BenchmarkMissingData times the missing-data solver to convergence
// (FactorizeIncomplete with its defaults: initialisation, the VarPro runs
// until two agree, the robust rounds, the metric upgrade) on the tracks of
// a full turn of a synthetic part seen by an orthographic camera, every
// point in about half the frames (syntheticTracks, 0.1 px noise). It
// reports the time per solve, the iterations of the best run and the time
// per iteration of all runs; each iteration costs O(observations) to
// build the reduced system plus O(F³) to solve its dense 8F × 8F normal
// equations. 360 × 3000 (a full turn at 1°) runs only with
// TF_BENCH_LARGE=1.
func BenchmarkMissingData(b *testing.B) {
	sizes := []struct{ f, p int }{{72, 1000}, {120, 1500}}
	if os.Getenv("TF_BENCH_LARGE") == "1" {
		sizes = append(sizes, struct{ f, p int }{360, 3000})
	}
	for _, s := range sizes {
		b.Run(strconv.Itoa(s.f)+"x"+strconv.Itoa(s.p), func(b *testing.B) {
			set := syntheticTracks(s.f, s.p, true, 9)
			m, _ := IncompleteMeasurements(set, minViews(s.f))
			b.ResetTimer()
			var rep *factor.MissingReport
			iters := 0
			for i := 0; i < b.N; i++ {
				var err error
				_, rep, err = factor.FactorizeIncomplete(context.Background(), m, factor.Options{}, factor.MissingOptions{Threads: Threads})
				if err != nil {
					b.Fatal(err)
				}
				for _, r := range rep.Runs {
					iters += r.Iterations + r.LiftedIterations
				}
			}
			b.StopTimer()
			b.ReportMetric(float64(b.Elapsed().Milliseconds())/float64(b.N), "ms/solve")
			b.ReportMetric(float64(b.Elapsed().Milliseconds())/float64(max(1, iters)), "ms/iter")
			b.ReportMetric(float64(rep.Iterations), "iters")
			b.ReportMetric(float64(len(rep.Runs)), "runs")
			b.ReportMetric(float64(rep.Observations), "coordinates")
		})
	}
}

// TestRenderBenchFrames is a helper of scripts/bench.sh, skipped unless
// TF_RENDER_DIR names a folder: it writes TF_RENDER_FRAMES (default 100)
// frames of 640×480 of the synthetic turntable part turning 1° per frame
// into it; a sequence longer than a turn repeats the turn's 360 frames as
// hard links.
func TestRenderBenchFrames(t *testing.T) {
	dir := os.Getenv("TF_RENDER_DIR")
	if dir == "" {
		t.Skip("helper of scripts/bench.sh (set TF_RENDER_DIR)")
	}
	n := 100
	if s := os.Getenv("TF_RENDER_FRAMES"); s != "" {
		var err error
		if n, err = strconv.Atoi(s); err != nil || n < 3 {
			t.Fatalf("TF_RENDER_FRAMES=%q: want a number of frames ≥ 3", s)
		}
	}
	turn := streamTurn(t, filepath.Join(t.TempDir(), "turn"), 1, n)
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	for k := 0; k < n; k++ {
		name := filepath.Join(dir, strconv.Itoa(100000 + k)[1:]+".png")
		if err := os.Link(turn[k%len(turn)], name); err != nil {
			// Another file system than the temporary folder's: copy.
			b, rerr := os.ReadFile(turn[k%len(turn)])
			if rerr != nil {
				t.Fatal(rerr)
			}
			if werr := os.WriteFile(name, b, 0o644); werr != nil {
				t.Fatal(werr)
			}
		}
	}
}
