package bundle

import (
	"math"
	"testing"

	"trackfactor/factor"
	"trackfactor/factor/rotation"
	"trackfactor/track/synth"
)

// smallCase is a small sequence for the internal checks: 8 frames, 40
// points, orthographic or pinhole (close range).
func smallCase(t *testing.T, proj synth.Projection) (*scenario, *factor.Measurements) {
	t.Helper()
	o := synth.Options{Projection: proj, Frames: 8, StepDeg: 12, ElevationDeg: 25}
	if proj == synth.Pinhole {
		o.DistanceMM = 220
	}
	s := newScenario(t, o, 40, 5)
	return s, s.measure(0.3, 9)
}

type modelCase struct {
	name string
	pr   *prepared
}

// modelCases builds one problem per camera model from perturbed starts:
// orthographic, scaled orthographic, perspective (with distortion and the
// focal length and k1 refined), single-axis affine and single-axis
// perspective.
func modelCases(t *testing.T) []modelCase {
	t.Helper()
	so, mo := smallCase(t, synth.Orthographic)
	sp, mp := smallCase(t, synth.Pinhole)
	opts := Options{}.WithDefaults()
	var out []modelCase
	add := func(name string, pr *prepared, err error) {
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		out = append(out, modelCase{name, pr})
	}
	ro := perturb(so.truth, 0.5, 0.5, 0.2, 1)
	pr, err := prepareFree(mo, ro, opts)
	add("orthographic", pr, err)
	rs := *ro
	rs.Model = factor.ScaledOrthographic
	pr, err = prepareFree(mo, &rs, opts)
	add("scaled-orthographic", pr, err)
	rp := perturb(sp.truth, 0.5, 0.5, 0.2, 2)
	in := *rp.Intrinsics
	in.K1, in.K2, in.P1, in.P2, in.K3 = -0.12, 0.03, 1e-3, -2e-3, 0.01
	rp.Intrinsics = &in
	o2 := opts
	o2.RefineFocal, o2.RefineK1 = true, true
	pr, err = prepareFree(mp, rp, o2)
	add("perspective+f+k1", pr, err)
	axis := Axis{Direction: [3]float64{0.01, -0.02, 1}, Point: [3]float64{0.3, -0.2, 10}}
	pr, _, _, err = prepareAxis(mo, ro, axis, opts)
	add("single-axis affine", pr, err)
	pr, _, _, err = prepareAxis(mp, rp, axis, o2)
	add("single-axis perspective+f+k1", pr, err)
	return out
}

// The analytic Jacobians of every camera model agree with central finite
// differences of the projection through the models' own update (so the
// rotation's right perturbation and the lens parameters are covered) —
// the gradient check of common practice (gonum's optimize/functions tests
// do the same). Step h = 1e-6 (parameters of order 1–500), central
// differences: truncation ≈ h²·|f”'| ≈ 1e-9 px, rounding ≈ 1e-16·600/h ≈
// 1e-7 px; tolerance 1e-5 + 1e-6·|J| per entry leaves a margin of ~100.
func TestJacobiansMatchFiniteDifferences(t *testing.T) {
	const h = 1e-6
	for _, mc := range modelCases(t) {
		mod, X, p := mc.pr.mod, mc.pr.X, mc.pr.st.prob
		ng, nc := mod.ng(), mod.nc()
		N := ng + mod.cams()*nc
		worst := 0.0
		checked := 0
		for j := 0; j < p.np(); j += 3 {
			for o := p.start[j]; o < p.start[j+1]; o += 2 {
				f := int(p.cam[o])
				var jac jacobian
				if _, _, ok := mod.project(f, &X[j], &jac); !ok {
					t.Fatalf("%s: point %d behind camera %d", mc.name, j, f)
				}
				check := func(what string, an [2]float64, fd [2]float64) {
					for r := 0; r < 2; r++ {
						e := math.Abs(an[r] - fd[r])
						worst = math.Max(worst, e/(1+math.Abs(an[r])))
						if e > 1e-5+1e-6*math.Abs(an[r]) {
							t.Errorf("%s: point %d camera %d %s row %d: analytic %.9g, finite difference %.9g", mc.name, j, f, what, r, an[r], fd[r])
						}
					}
					checked++
				}
				// Shared and this camera's parameters.
				idx := []int{}
				for i := 0; i < ng; i++ {
					idx = append(idx, i)
				}
				for i := 0; i < nc; i++ {
					idx = append(idx, ng+f*nc+i)
				}
				for _, i := range idx {
					d := make([]float64, N)
					d[i] = h
					up, vp, _ := mod.update(d).project(f, &X[j], nil)
					d[i] = -h
					um, vm, _ := mod.update(d).project(f, &X[j], nil)
					var an [2]float64
					if i < ng {
						an = [2]float64{jac.g[i], jac.g[ng+i]}
					} else {
						k := i - ng - f*nc
						an = [2]float64{jac.c[k], jac.c[nc+k]}
					}
					check("parameter", an, [2]float64{(up - um) / (2 * h), (vp - vm) / (2 * h)})
				}
				for a := 0; a < 3; a++ {
					Xp, Xm := X[j], X[j]
					Xp[a] += h
					Xm[a] -= h
					up, vp, _ := mod.project(f, &Xp, nil)
					um, vm, _ := mod.project(f, &Xm, nil)
					check("point", [2]float64{jac.x[a], jac.x[3+a]}, [2]float64{(up - um) / (2 * h), (vp - vm) / (2 * h)})
				}
			}
		}
		if checked < 100 {
			t.Fatalf("%s: only %d derivatives checked", mc.name, checked)
		}
		t.Logf("%s: %d derivatives, worst relative difference %.2g", mc.name, checked, worst)
	}
}

// The Schur-complement step (reduced camera system, then back-
// substitution) equals the step of the full dense normal equations at the
// same damping — the elimination is exact algebra (Triggs et al. 2000,
// §6.1), so only rounding may differ. Both are Cholesky solves of the same
// positive-definite system; with λ = 1e-2 its condition number is below
// ~1e9, so rounding stays below 1e-16·1e9 ≈ 1e-7 of the step: tolerance
// 1e-6 relative to the largest step component. The predicted decreases
// must agree likewise.
func TestSchurStepEqualsDenseStep(t *testing.T) {
	const lambda = 1e-2
	for _, mc := range modelCases(t) {
		mod, X, p := mc.pr.mod, mc.pr.X, mc.pr.st.prob
		p.makeChunks(2)
		lin := newLinearizer(p, mod)
		var sys system
		lin.linearize(mod, X, lambda, &sys)
		if !sys.ok {
			t.Fatalf("%s: linearisation failed", mc.name)
		}
		dc, ok := solveCameras(&sys)
		if !ok {
			t.Fatalf("%s: reduced system not positive definite", mc.name)
		}
		dX, pred := lin.backSubstitute(mod, X, &sys, dc)
		dc2, dX2, pred2, cost2, gmax2, ok := lin.denseStep(mod, X, lambda)
		if !ok {
			t.Fatalf("%s: dense system not positive definite", mc.name)
		}
		scale, diff := 0.0, 0.0
		for i := range dc {
			scale = math.Max(scale, math.Abs(dc[i]))
			diff = math.Max(diff, math.Abs(dc[i]-dc2[i]))
		}
		for j := range dX {
			for a := 0; a < 3; a++ {
				scale = math.Max(scale, math.Abs(dX[j][a]))
				diff = math.Max(diff, math.Abs(dX[j][a]-dX2[j][a]))
			}
		}
		if !(scale > 0) {
			t.Fatalf("%s: zero step from a perturbed start", mc.name)
		}
		if diff > 1e-6*scale {
			t.Errorf("%s: Schur and dense steps differ by %.3g (step size %.3g)", mc.name, diff, scale)
		}
		if math.Abs(pred-pred2) > 1e-6*math.Abs(pred) || math.Abs(sys.cost-cost2) > 1e-12*cost2 || math.Abs(sys.gmax-gmax2) > 1e-9*gmax2 {
			t.Errorf("%s: predicted decrease %.9g vs %.9g, cost %.12g vs %.12g, |g| %.6g vs %.6g", mc.name, pred, pred2, sys.cost, cost2, sys.gmax, gmax2)
		}
		// The held parameters do not move; the reference point does not
		// move along its held direction.
		for i := range dc {
			if mod.held(i) && dc[i] != 0 {
				t.Errorf("%s: held parameter %d moved by %g", mc.name, i, dc[i])
			}
		}
		d := mod.refDir(X[p.ref])
		if a := math.Abs(rotation.Dot(d, dX[p.ref])); a > 1e-12*scale {
			t.Errorf("%s: reference point moved %.3g along its held direction", mc.name, a)
		}
		t.Logf("%s: N = %d camera parameters, %d points, step %.3g, Schur−dense %.2g", mc.name, lin.N, p.np(), scale, diff)
	}
}

// The Huber and Cauchy losses: values and weights against their
// definitions (Huber 1964; the Cauchy loss as in Hartley and Zisserman,
// MVG 2nd ed., §A6.8), ρ continuous with ρ' at the Huber corner, and the
// weight is the derivative of ρ (central difference, tolerance 1e-7
// relative: h = 1e-6·s).
func TestLosses(t *testing.T) {
	for _, kind := range []Loss{Squared, Huber, Cauchy} {
		l := lossFn{kind: kind, c2: 4} // c = 2 px
		for _, s := range []float64{0.01, 1, 3.99, 4, 4.01, 9, 100, 1e4} {
			rho, w := l.eval(s)
			var want float64
			switch kind {
			case Squared:
				want = s
			case Huber:
				want = s
				if s > 4 {
					want = 4*math.Sqrt(s) - 4
				}
			case Cauchy:
				want = 4 * math.Log(1+s/4)
			}
			if math.Abs(rho-want) > 1e-12*want {
				t.Errorf("%s ρ(%g) = %.15g, want %.15g", kind, s, rho, want)
			}
			h := 1e-6 * s
			rp, _ := l.eval(s + h)
			rm, _ := l.eval(s - h)
			if kind == Huber && math.Abs(s-4) < 0.02 {
				continue // the kink of ρ' at s = c²
			}
			if d := (rp - rm) / (2 * h); math.Abs(d-w) > 1e-7*math.Max(1, w) {
				t.Errorf("%s ρ'(%g) = %.9g, finite difference %.9g", kind, s, w, d)
			}
		}
	}
}

// The closed-form largest eigenvalue of a symmetric 3×3 matrix against a
// diagonal case (trivial) and a rotated diagonal (R·diag·Rᵀ has the same
// eigenvalues; handbook fact). Tolerance 1e-12 relative.
func TestLargestEig(t *testing.T) {
	if v := largestEig([3][3]float64{{2, 0, 0}, {0, 5, 0}, {0, 0, 1}}); v != 5 {
		t.Errorf("diagonal: %g", v)
	}
	R := rotation.Exp([3]float64{0.3, -1.1, 0.7})
	D := [3][3]float64{{3, 0, 0}, {0, 0.5, 0}, {0, 0, 7.25}}
	A := rotation.MulT(rotation.Mul(R, D), R)
	if v := largestEig(A); math.Abs(v-7.25) > 1e-12*7.25 {
		t.Errorf("rotated diagonal: %.15g, want 7.25", v)
	}
}
