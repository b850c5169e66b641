package bundle

import (
	"context"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"

	"trackfactor/factor/rotation"
)

// The matrix-free product must equal the product with the dense reduced
// system S that linearize forms (the same Schur complement, Triggs et al.
// 2000 eq. 21, held rows included), and the preconditioner blocks S's
// diagonal blocks, for every camera model (shared parameters, a held
// gauge camera, the projected reference point): to 1e-10 relative
// (sums of O(100) products in another order). The PCG solve run to its
// limit with the forcing term at zero must reach gonum's Cholesky
// solution of the same system (the reference) to 1e-7 relative, and the
// right-hand side, cost and gradient must be the dense path's.
func TestCGProductAndSolveMatchDense(t *testing.T) {
	const lambda = 1e-2
	rng := rand.New(rand.NewPCG(1, 2))
	for _, mc := range modelCases(t) {
		mod, X, p := mc.pr.mod, mc.pr.X, mc.pr.st.prob
		p.makeChunks(2)
		lin := newLinearizer(p, mod)
		var sd, sc system
		var cs cgSystem
		lin.linearize(mod, X, lambda, &sd)
		S := append([]float64(nil), sd.S...)
		lin.linearizeCG(mod, X, lambda, &sc, &cs)
		N := lin.N
		at := func(i, j int) float64 { return S[min(i, j)*N+max(i, j)] }
		v := make([]float64, N)
		for i := range v {
			v[i] = rng.NormFloat64()
		}
		got := make([]float64, N)
		lin.apply(&sc, &cs, v, got)
		worst, scale := 0.0, 0.0
		for i := 0; i < N; i++ {
			want := 0.0
			for j := 0; j < N; j++ {
				want += at(i, j) * v[j]
			}
			worst = math.Max(worst, math.Abs(got[i]-want))
			scale = math.Max(scale, math.Abs(want))
		}
		if worst > 1e-10*scale {
			t.Errorf("%s: S·v differs from the dense product by %.3g (scale %.3g)", mc.name, worst, scale)
		}
		if d := maxDiff(sc.rhs, sd.rhs); d > 1e-10*maxAbsV(sd.rhs) {
			t.Errorf("%s: right-hand sides differ by %.3g", mc.name, d)
		}
		if math.Abs(sc.cost-sd.cost) > 1e-12*sd.cost || math.Abs(sc.gmax-sd.gmax) > 1e-10*sd.gmax {
			t.Errorf("%s: cost %.12g vs %.12g, |g| %.6g vs %.6g", mc.name, sc.cost, sd.cost, sc.gmax, sd.gmax)
		}
		// Preconditioner blocks: L Lᵀ = S_ff.
		nc, ng := lin.nc, lin.ng
		for f := 0; f < p.nf; f++ {
			if !cs.precOK[f] {
				t.Fatalf("%s: camera %d block not positive definite", mc.name, f)
			}
			l := cs.prec[f*nc*nc : (f+1)*nc*nc]
			base := ng + f*nc
			for a := 0; a < nc; a++ {
				for b := 0; b < nc; b++ {
					s := 0.0
					for k := 0; k < nc; k++ {
						s += l[a*nc+k] * l[b*nc+k]
					}
					if e := math.Abs(s - at(base+a, base+b)); e > 1e-10*scale {
						t.Fatalf("%s: camera %d block (%d,%d): LLᵀ %.9g, S %.9g", mc.name, f, a, b, s, at(base+a, base+b))
					}
				}
			}
		}
		var ch mat.Cholesky
		if !ch.Factorize(mat.NewSymDense(N, S)) {
			t.Fatalf("%s: S not positive definite", mc.name)
		}
		var want mat.VecDense
		if err := ch.SolveVecTo(&want, mat.NewVecDense(N, append([]float64(nil), sd.rhs...))); err != nil {
			t.Fatalf("%s: %v", mc.name, err)
		}
		cs.g0 = math.Inf(1) // forcing term 0: iterate to the limit
		dc, ok := lin.solveCamerasCG(&sc, &cs)
		if !ok {
			t.Fatalf("%s: PCG broke down", mc.name)
		}
		wv := want.RawVector().Data
		if e := maxDiff(dc, wv); e > 1e-7*maxAbsV(wv) {
			t.Errorf("%s: PCG step differs from Cholesky by %.3g (scale %.3g) after %d iterations", mc.name, e, maxAbsV(wv), cs.iters)
		}
		for i := range dc {
			if mod.held(i) && dc[i] != 0 {
				t.Errorf("%s: held parameter %d moved by %g", mc.name, i, dc[i])
			}
		}
		t.Logf("%s: N = %d, %d PCG iterations", mc.name, N, cs.iters)
	}
}

// The PCG path reaches the optimum of the dense Schur path on a
// perspective turntable of moderate size (120 cameras; PCG forced with
// IterativeAbove = 1). With the default tolerances the final costs agree
// within 1e-6 relative (both stop when a step gains less than
// FunctionTolerance = 1e-6 of the cost). The parameters are compared
// after both ran to FunctionTolerance 1e-12: a stop at a relative gain
// ε leaves a point within about √(2εC)/σ̂ = √(εn) standard deviations of
// the optimum (C ≈ nσ̂²/2 the cost, n the residuals), 3e-4 σ here, so
// camera translations and points must agree within 1e-3 of their
// standard deviations (from the dense run's covariance).
func TestIterativeSchurSameOptimum(t *testing.T) {
	nf, np := 120, 1500
	if testing.Short() {
		nf, np = 60, 800
	}
	m, start := benchScene(nf, np, 0.3)
	for _, ft := range []float64{0, 1e-12} {
		a, err := Adjust(context.Background(), m, start, Options{IterativeAbove: -1, FunctionTolerance: ft, SkipUncertainty: ft == 0})
		if err != nil {
			t.Fatal(err)
		}
		b, err := Adjust(context.Background(), m, start, Options{IterativeAbove: 1, FunctionTolerance: ft, SkipUncertainty: true})
		if err != nil {
			t.Fatal(err)
		}
		if ft == 0 {
			if ca, cb := a.Summary.FinalCost, b.Summary.FinalCost; math.Abs(ca-cb) > 1e-6*ca {
				t.Errorf("default tolerances: final costs differ: dense %.9g, PCG %.9g (%.3g relative)", ca, cb, (cb-ca)/ca)
			}
			continue
		}
		if a.Summary.LinearSolver != LinearDenseCholesky || b.Summary.LinearSolver != LinearPCG || b.Summary.CGIterations == 0 {
			t.Fatalf("solvers %q and %q (%d CG iterations)", a.Summary.LinearSolver, b.Summary.LinearSolver, b.Summary.CGIterations)
		}
		t.Logf("dense: %s", a.Summary.Brief())
		t.Logf("PCG:   %s; %d CG iterations", b.Summary.Brief(), b.Summary.CGIterations)
		if !a.Summary.Termination.Converged() || !b.Summary.Termination.Converged() {
			t.Fatalf("not converged: %s, %s", a.Summary.Termination, b.Summary.Termination)
		}
		ca, cb := a.Summary.FinalCost, b.Summary.FinalCost
		if math.Abs(ca-cb) > 1e-6*ca {
			t.Errorf("final costs differ: dense %.9g, PCG %.9g (%.3g relative)", ca, cb, (cb-ca)/ca)
		}
		ra, rb := a.Reconstruction, b.Reconstruction
		worstC, worstP := 0.0, 0.0
		for i := range ra.Cameras {
			cu := a.Uncertainty.Cameras[i]
			if cu.Held {
				continue
			}
			for c := 0; c < 3; c++ {
				worstC = math.Max(worstC, math.Abs(ra.Cameras[i].T[c]-rb.Cameras[i].T[c])/cu.TranslationSigma[c])
			}
		}
		for k := range ra.Points {
			pu := a.Uncertainty.Points[k]
			if !pu.Refined {
				continue
			}
			worstP = math.Max(worstP, rotation.Norm(rotation.Sub(ra.Points[k].X, rb.Points[k].X))/pu.SigmaMax)
		}
		t.Logf("largest difference: camera translations %.3g σ, points %.3g σ", worstC, worstP)
		if worstC > 1e-3 || worstP > 1e-3 {
			t.Errorf("optima differ by up to %.3g σ (cameras) and %.3g σ (points); want ≤ 1e-3", worstC, worstP)
		}
	}
}

func maxDiff(a, b []float64) float64 {
	m := 0.0
	for i := range a {
		m = math.Max(m, math.Abs(a[i]-b[i]))
	}
	return m
}

func maxAbsV(v []float64) float64 {
	m := 0.0
	for _, x := range v {
		m = math.Max(m, math.Abs(x))
	}
	return m
}
