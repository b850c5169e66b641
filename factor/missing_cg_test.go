package factor

import (
	"context"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// The matrix-free product must be the product with the dense H the
// existing path assembles (the same Kronecker blocks Π ⊗ x̃x̃ᵀ, summed in
// another order), and the block-Jacobi blocks its diagonal blocks: both
// to 1e-12 relative (round-off of sums of O(100) terms), for the rank-3
// and the lifted layout, with weights < 1 and 0 present.
func TestIncCGProductMatchesDenseH(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	s := incTracked(rng, 30, 200, 8, 2, 4, 4, 0.5)
	pr := newIncProblem(s.measurements(), nil, nil, nil)
	for k := range pr.wt {
		switch k % 7 {
		case 3:
			pr.wt[k] = 0.4
		case 5:
			pr.wt[k] = 0
		}
	}
	for _, r := range []int{3, 5} {
		d := incDim(r)
		u := incRandomStart(pr, d, 3, uint64(r))
		dw := newIncVPWork(pr, d, 2)
		dw.build(pr, u, make([]float64, r*pr.np))
		cw := newIncCGWork(pr, d, 2)
		X := make([]float64, r*pr.np)
		cw.build(pr, u, X)
		n := dw.n
		H := dw.hs[0]
		at := func(i, j int) float64 { return H[min(i, j)*n+max(i, j)] }
		v := make([]float64, n)
		for i := range v {
			v[i] = rng.NormFloat64()
		}
		const lambda = 0.3
		got := make([]float64, n)
		cw.apply(pr, X, v, got, lambda)
		worst, scale := 0.0, 0.0
		for i := 0; i < n; i++ {
			want := lambda * v[i]
			for j := 0; j < n; j++ {
				want += at(i, j) * v[j]
			}
			worst = math.Max(worst, math.Abs(got[i]-want))
			scale = math.Max(scale, math.Abs(want))
		}
		if worst > 1e-12*scale {
			t.Errorf("r = %d: (H + λI)v differs from the dense product by %.3g (scale %.3g)", r, worst, scale)
		}
		fs := d.fs
		worst = 0
		for f := 0; f < pr.nf; f++ {
			for i := 0; i < fs; i++ {
				for j := 0; j < fs; j++ {
					worst = math.Max(worst, math.Abs(cw.blks[0][f*fs*fs+i*fs+j]-at(f*fs+i, f*fs+j)))
				}
			}
		}
		if worst > 1e-12*cw.maxDiag() {
			t.Errorf("r = %d: diagonal blocks differ from H's by %.3g", r, worst)
		}
		if g1, g2 := cw.gs[0], dw.gs[0]; maxAbsDiff(g1, g2) > 1e-12*maxAbs(g2) {
			t.Errorf("r = %d: gradients differ by %.3g", r, maxAbsDiff(g1, g2))
		}
	}
}

// Run to its iteration limit with the forcing term at zero, PCG must
// reach the solution of gonum's dense Cholesky solve of the same damped
// system restricted to the gauge complement (the reference: mat.Cholesky
// on H + λI, whose solution for a gauge-free right-hand side has no gauge
// component since H maps the complement into itself), to 1e-8 relative
// (the CG residual is driven to ~1e-10 of the start, the condition number
// of this small system is < 1e3).
func TestIncCGSolveMatchesCholesky(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 8))
	s := incTracked(rng, 36, 240, 8, 2, 4, 4, 0.5)
	pr := newIncProblem(s.measurements(), nil, nil, nil)
	d := incDim(3)
	u := incRandomStart(pr, d, 4, 1)
	dw := newIncVPWork(pr, d, 1)
	dw.build(pr, u, make([]float64, 3*pr.np))
	cw := newIncCGWork(pr, d, 2)
	X := make([]float64, 3*pr.np)
	cw.build(pr, u, X)
	n := dw.n
	c := pr.gaugeC()
	lambda := 1e-3 * cw.maxDiag()
	A := mat.NewSymDense(n, nil)
	for i := 0; i < n; i++ {
		for j := i; j < n; j++ {
			A.SetSym(i, j, dw.hs[0][i*n+j])
		}
		A.SetSym(i, i, A.At(i, i)+lambda)
	}
	g := append([]float64(nil), cw.gs[0]...)
	incProjectGauge(u, g, pr.nf, d, c)
	copy(cw.gs[0], g)
	b := mat.NewVecDense(n, nil)
	for i := range g {
		b.SetVec(i, -g[i])
	}
	var ch mat.Cholesky
	if !ch.Factorize(A) {
		t.Fatal("H + λI not positive definite")
	}
	var want mat.VecDense
	if err := ch.SolveVecTo(&want, b); err != nil {
		t.Fatal(err)
	}
	cw.g0 = math.Inf(1) // forcing term √(‖g‖/∞) = 0: run to the limit or exact convergence
	got := make([]float64, n)
	if !cw.solve(pr, u, X, lambda, got) {
		t.Fatal("PCG broke down")
	}
	incProjectGauge(u, got, pr.nf, d, c)
	wv := want.RawVector().Data
	if e := maxAbsDiff(got, wv); e > 1e-8*maxAbs(wv) {
		t.Errorf("PCG step differs from the Cholesky solution by %.3g (scale %.3g) after %d iterations", e, maxAbs(wv), cw.iters)
	}
	t.Logf("%d PCG iterations for n = %d", cw.iters, n)
}

// The two camera-step solvers must reach the same optimum from the same
// propagated start on a turntable band of moderate size (80 frames):
// the cost within 1e-6 relative (AgreeTolerance, the rule by which two
// runs count as the same optimum) and the fitted image points M_f X_p + t_f
// — invariant to the affine gauge — within 1e-3 of the noise level
// (both runs stop when an iteration gains less than 1e-9 of the cost; a
// gain of 1e-9·cost at a strict minimum leaves the parameters within
// ~√(1e-9) of the noise-driven scale of the fit, well inside 1e-3σ for
// the fitted points of tracks of ≥ 4 views).
func TestIncompleteIterativeMatchesDense(t *testing.T) {
	nf, np := 80, 700
	if testing.Short() {
		nf, np = 60, 500
	}
	const sigma = 0.5
	s := incTracked(rand.New(rand.NewPCG(9, 10)), nf, np, 4.5, 1, 5, 8, sigma)
	m := s.measurements()
	fit := func(above int) (*AffineFit, *MissingReport) {
		f, rep, err := FitAffineIncomplete(context.Background(), m, Options{}, MissingOptions{Loss: LossSquared, MaxRuns: 1, IterativeAbove: above, Threads: 2})
		if err != nil {
			t.Fatal(err)
		}
		return f, rep
	}
	fd, rd := fit(-1)
	fc, rc := fit(1)
	if rd.Runs[0].LinearSolver != LinearDenseCholesky || rc.Runs[0].LinearSolver != LinearPCG {
		t.Fatalf("solvers %q and %q ran", rd.Runs[0].LinearSolver, rc.Runs[0].LinearSolver)
	}
	cd, cc := rd.Runs[0].Cost, rc.Runs[0].Cost
	t.Logf("dense: cost %.9g, %d iterations; PCG: cost %.9g, %d iterations, %d solves, %d CG iterations",
		cd, rd.Runs[0].Iterations, cc, rc.Runs[0].Iterations, rc.Runs[0].CGSolves, rc.Runs[0].CGIterations)
	if math.Abs(cc-cd) > 1e-6*cd {
		t.Errorf("costs differ: dense %.9g, PCG %.9g (%.3g relative)", cd, cc, (cc-cd)/cd)
	}
	nfAll, npAll := m.Dims()
	worst := 0.0
	proj := func(f *AffineFit, i, j, a int) float64 {
		v := f.T[2*i+a]
		for b := 0; b < 3; b++ {
			v += f.M.At(2*i+a, b) * f.X.At(b, j)
		}
		return v
	}
	for i, fr := range fd.Frames {
		if fc.Frames[i] != fr {
			t.Fatal("recovered frames differ")
		}
		for j, p := range fd.Tracks {
			if !m.Observed(fr, p) {
				continue
			}
			for a := 0; a < 2; a++ {
				worst = math.Max(worst, math.Abs(proj(fd, i, j, a)-proj(fc, i, j, a)))
			}
		}
	}
	_ = nfAll
	_ = npAll
	t.Logf("largest difference of the fitted image points: %.3g px", worst)
	if worst > 1e-3*sigma {
		t.Errorf("fitted image points differ by up to %.3g px; want ≤ %.3g", worst, 1e-3*sigma)
	}
}

func maxAbs(v []float64) float64 {
	m := 0.0
	for _, x := range v {
		m = math.Max(m, math.Abs(x))
	}
	return m
}

func maxAbsDiff(a, b []float64) float64 {
	m := 0.0
	for i := range a {
		m = math.Max(m, math.Abs(a[i]-b[i]))
	}
	return m
}
