package bundle

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"testing"
	"time"

	"gonum.org/v1/gonum/mat"

	"trackfactor/factor"
	"trackfactor/factor/rotation"
)

// benchScene is a perspective turntable of nf cameras around a ball of np
// points, each point seen by a contiguous arc of vis·nf cameras (a
// turntable's banded visibility), with 0.5 px noise; the start is the
// truth perturbed by 0.3° per camera and 0.3 units per point.
func benchScene(nf, np int, vis float64) (*factor.Measurements, *factor.Reconstruction) {
	g := rand.New(rand.NewPCG(uint64(nf), uint64(np)))
	in := factor.Intrinsics{Fx: 1000, Fy: 1000, Cx: 639.5, Cy: 479.5}
	rec := &factor.Reconstruction{Model: factor.Perspective, Intrinsics: &in}
	const dist = 300.0
	e := 20 * math.Pi / 180
	Rlab := [3][3]float64{{1, 0, 0}, {0, -math.Sin(e), -math.Cos(e)}, {0, math.Cos(e), -math.Sin(e)}}
	for f := 0; f < nf; f++ {
		R := rotation.Mul(Rlab, rotation.RotZ(2*math.Pi*float64(f)/float64(nf)))
		rec.Cameras = append(rec.Cameras, factor.Camera{Frame: f, R: R, T: [3]float64{0, 0, dist}, Scale: in.Fx / dist})
	}
	W := mat.NewDense(2*nf, np, nil)
	mask := make([]bool, nf*np)
	arc := int(math.Round(vis * float64(nf)))
	for j := 0; j < np; j++ {
		X := [3]float64{g.NormFloat64() * 30, g.NormFloat64() * 30, g.NormFloat64() * 30}
		rec.Points = append(rec.Points, factor.Point{Track: j, X: X})
		s := g.IntN(nf)
		for k := 0; k < arc; k++ {
			f := (s + k) % nf
			u, v := rec.Project(f, X)
			W.Set(2*f, j, u+0.5*g.NormFloat64())
			W.Set(2*f+1, j, v+0.5*g.NormFloat64())
			mask[f*np+j] = true
		}
	}
	m := &factor.Measurements{W: W, Mask: mask}
	return m, perturb(rec, 0.3, 0.3, 0.3, 99)
}

func largeEnabled(b *testing.B) {
	if os.Getenv("TF_BENCH_LARGE") != "1" {
		b.Skip("set TF_BENCH_LARGE=1 to run the large case")
	}
}

// benchAdjust runs Adjust to convergence and reports the time per
// iteration and to convergence.
func benchAdjust(b *testing.B, nf, np int, solver Solver) {
	m, start := benchScene(nf, np, 0.3)
	opts := Options{Solver: solver, SkipUncertainty: true}
	b.ResetTimer()
	var iters int
	var total time.Duration
	var last *Result
	for i := 0; i < b.N; i++ {
		t0 := time.Now()
		res, err := Adjust(context.Background(), m, start, opts)
		if err != nil {
			b.Fatal(err)
		}
		total += time.Since(t0)
		iters += res.Summary.Iterations
		last = res
	}
	b.ReportMetric(float64(total.Milliseconds())/float64(iters), "ms/iter")
	b.ReportMetric(float64(total.Milliseconds())/float64(b.N), "ms/converged")
	b.ReportMetric(float64(iters)/float64(b.N), "iters")
	b.Logf("%s", last.Summary.Brief())
}

// BenchmarkAdjust72x2000: 72 cameras, 2000 points, 30 % visibility
// (43 200 observations), Schur solver, to convergence.
func BenchmarkAdjust72x2000(b *testing.B) { benchAdjust(b, 72, 2000, Schur) }

// BenchmarkAdjust300x20000: 300 cameras, 20 000 points, 30 % visibility
// (1.8 million observations). Needs TF_BENCH_LARGE=1.
func BenchmarkAdjust300x20000(b *testing.B) {
	largeEnabled(b)
	benchAdjust(b, 300, 20000, Schur)
}

// benchStep times one linearise-and-solve step of each solver at the
// start of the 72 × 2000 case.
func benchStep(b *testing.B, solver Solver) { benchStepSize(b, 72, 2000, solver) }

func benchStepSize(b *testing.B, nf, np int, solver Solver) {
	m, start := benchScene(nf, np, 0.3)
	opts := Options{}.WithDefaults()
	pr, err := prepareFree(m, start, opts)
	if err != nil {
		b.Fatal(err)
	}
	p := pr.st.prob
	p.makeChunks(opts.Threads)
	lin := newLinearizer(p, pr.mod)
	var sys system
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if solver == Dense {
			if _, _, _, _, _, ok := lin.denseStep(pr.mod, pr.X, 1e-4); !ok {
				b.Fatal("dense step failed")
			}
			continue
		}
		lin.linearize(pr.mod, pr.X, 1e-4, &sys)
		dc, ok := solveCameras(&sys)
		if !ok {
			b.Fatal("Schur step failed")
		}
		lin.backSubstitute(pr.mod, pr.X, &sys, dc)
	}
}

// BenchmarkStep72x2000Schur and …Dense: one Levenberg–Marquardt step of
// the 72 × 2000 case (432 camera + 6000 point parameters) by the Schur
// complement and by the full dense normal equations (6432² matrix, 330 MB;
// the dense one takes tens of seconds: run with -benchtime=1x).
func BenchmarkStep72x2000Schur(b *testing.B) { benchStep(b, Schur) }
func BenchmarkStep72x2000Dense(b *testing.B) { benchStep(b, Dense) }

// BenchmarkStep300x2000Schur: one step with long tracks (90 views per
// point), where building the reduced system dominates.
func BenchmarkStep300x2000Schur(b *testing.B) { benchStepSize(b, 300, 2000, Schur) }

// BenchmarkUncertainty72x2000: the covariance at the optimum (the undamped
// reduced system, its inverse and every point's 3×3 block).
func BenchmarkUncertainty72x2000(b *testing.B) {
	m, start := benchScene(72, 2000, 0.3)
	res, err := Adjust(context.Background(), m, start, Options{SkipUncertainty: true})
	if err != nil {
		b.Fatal(err)
	}
	opts := Options{}.WithDefaults()
	pr, err := prepareFree(m, res.Reconstruction, opts)
	if err != nil {
		b.Fatal(err)
	}
	p := pr.st.prob
	p.makeChunks(opts.Threads)
	lin := newLinearizer(p, pr.mod)
	sum := res.Summary
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if _, err := uncertainty(lin, pr.mod, pr.X, pr.st, res.Reconstruction, &sum); err != nil {
			b.Fatal(err)
		}
	}
}

// Long turntable sequences (issue 8): nf cameras, each point seen by a
// contiguous arc of arc cameras (tracker-like tracks), to convergence
// with the dense Schur solver and the matrix-free PCG one. 300 × 2000
// (arc 90) runs by default; TF_BENCH_LARGE=1 adds 1000 × 6000 and
// 3000 × 18000 (arc 40; the dense solver only up to 1000 cameras: its
// reduced system at 3000 is 2.6 GB per copy and ~2·10¹² flops per
// factorisation). Reported: ms per iteration and to convergence, the
// iterations and the CG iterations per step.
func BenchmarkAdjustLong(b *testing.B) {
	longCases(b, func(b *testing.B, solver string, m *factor.Measurements, start *factor.Reconstruction) {
		above := -1
		if solver == "pcg" {
			above = 1
		}
		opts := Options{SkipUncertainty: true, IterativeAbove: above, Threads: 2}
		b.ResetTimer()
		var iters, cg int
		var total time.Duration
		for i := 0; i < b.N; i++ {
			t0 := time.Now()
			res, err := Adjust(context.Background(), m, start, opts)
			if err != nil {
				b.Fatal(err)
			}
			total += time.Since(t0)
			iters += res.Summary.Iterations
			cg += res.Summary.CGIterations
			if i == b.N-1 {
				b.Logf("%s", res.Summary.Brief())
			}
		}
		b.ReportMetric(float64(total.Milliseconds())/float64(iters), "ms/iter")
		b.ReportMetric(float64(total.Milliseconds())/float64(b.N), "ms/converged")
		b.ReportMetric(float64(iters)/float64(b.N), "iters")
		if cg > 0 {
			b.ReportMetric(float64(cg)/float64(iters), "cg/iter")
		}
	})
}

// longCases runs body for each long sequence and reduced-system solver
// ("dense", "pcg"), skipping the large ones unless enabled and the dense
// solver where its system would not fit.
func longCases(b *testing.B, body func(b *testing.B, solver string, m *factor.Measurements, start *factor.Reconstruction)) {
	for _, c := range []struct {
		nf, np, arc int
		large       bool
	}{{300, 2000, 90, false}, {1000, 6000, 40, true}, {3000, 18000, 40, true}} {
		for _, solver := range []string{"dense", "pcg"} {
			b.Run(fmt.Sprintf("%dx%d/%s", c.nf, c.np, solver), func(b *testing.B) {
				if c.large {
					largeEnabled(b)
				}
				if solver == "dense" && c.nf > 1000 {
					b.Skip("the dense reduced system of 3000 cameras needs 2.6 GB per copy")
				}
				m, start := benchScene(c.nf, c.np, float64(c.arc)/float64(c.nf))
				body(b, solver, m, start)
			})
		}
	}
}

// BenchmarkStepLong times one linearise-and-solve step at the start of
// the long sequences of BenchmarkAdjustLong (dense: form S and factor
// it; pcg: the point blocks and the truncated PCG solve).
func BenchmarkStepLong(b *testing.B) {
	longCases(b, func(b *testing.B, solver string, m *factor.Measurements, start *factor.Reconstruction) {
		opts := Options{Threads: 2}.WithDefaults()
		pr, err := prepareFree(m, start, opts)
		if err != nil {
			b.Fatal(err)
		}
		p := pr.st.prob
		p.makeChunks(opts.Threads)
		lin := newLinearizer(p, pr.mod)
		var sys system
		var cs cgSystem
		cg := 0
		b.ResetTimer()
		for i := 0; i < b.N; i++ {
			var dc []float64
			var ok bool
			if solver == "dense" {
				lin.linearize(pr.mod, pr.X, 1e-4, &sys)
				dc, ok = solveCameras(&sys)
			} else {
				cs.g0 = -1
				lin.linearizeCG(pr.mod, pr.X, 1e-4, &sys, &cs)
				dc, ok = lin.solveCamerasCG(&sys, &cs)
				cg += cs.iters
			}
			if !ok {
				b.Fatal("step failed")
			}
			lin.backSubstitute(pr.mod, pr.X, &sys, dc)
		}
		if cg > 0 {
			b.ReportMetric(float64(cg)/float64(b.N), "cg-iters")
		}
		b.ReportMetric(float64(p.nobs()), "observations")
	})
}
