package bundle

import (
	"context"
	"errors"
	"math"
	"strings"
	"testing"

	"trackfactor/factor"
	"trackfactor/factor/rotation"
	"trackfactor/track/synth"
)

// After refinement from a perturbed start, the RMS residual of a maximum-
// likelihood fit with d parameters to n measurements with i.i.d. Gaussian
// noise σ is σ·√(1 − d/n) (Hartley and Zisserman, MVG 2nd ed., §5.1.3,
// result 5.2). Squared loss (the ML estimator for Gaussian noise); the
// synthetic scene's visibility gives a mask with missing entries. The
// sum of squares is σ²·χ²(n − d), whose relative standard deviation is
// √(2/(n − d)) ≈ 1 % for n − d ≈ 2·10⁴, i.e. 0.5 % on the RMS: tolerance
// 3 % (six standard deviations, "within a few percent"). The start must
// be clearly worse (≥ 1.5× the final RMS), so the check can fail.
func TestRMSMatchesMLResidual(t *testing.T) {
	const sigma = 0.5
	cases := []struct {
		name  string
		o     synth.Options
		model factor.Model
	}{
		{"orthographic", synth.Options{Frames: 30, StepDeg: 6}, factor.Orthographic},
		{"scaled-orthographic", synth.Options{Frames: 30, StepDeg: 6}, factor.ScaledOrthographic},
		{"perspective", synth.Options{Projection: synth.Pinhole, Frames: 30, StepDeg: 6, DistanceMM: 220}, factor.Perspective},
	}
	for i, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			s := newScenario(t, c.o, 500, int64(10+i))
			m := s.measure(sigma, uint64(20+i))
			start := perturb(s.truth, 0.3, 0.5, 0.3, uint64(30+i))
			start.Model = c.model
			res, err := Adjust(context.Background(), m, start, Options{Loss: Squared, SkipUncertainty: true})
			if err != nil {
				t.Fatal(err)
			}
			sm := res.Summary
			want := sigma * math.Sqrt(1-float64(sm.Parameters)/float64(sm.Residuals))
			t.Logf("%s", sm.Brief())
			t.Logf("n = %d, d = %d: RMS %.4f px, σ√(1−d/n) = %.4f px (ratio %.4f); σ̂ = %.4f", sm.Residuals, sm.Parameters, sm.FinalRMS, want, sm.FinalRMS/want, sm.NoiseSigma)
			if !sm.Termination.Converged() {
				t.Errorf("did not converge: %s (%s)", sm.Termination, sm.Message)
			}
			if r := sm.FinalRMS / want; math.Abs(r-1) > 0.03 {
				t.Errorf("RMS %.4f px is %.1f %% off σ√(1−d/n) = %.4f px", sm.FinalRMS, 100*(r-1), want)
			}
			if math.Abs(sm.NoiseSigma/sigma-1) > 0.03 {
				t.Errorf("σ̂ = %.4f px, the noise is %.2f px", sm.NoiseSigma, sigma)
			}
			if sm.InitialRMS < 1.5*sm.FinalRMS {
				t.Errorf("start RMS %.3f px not clearly above the final %.3f px: the test would not notice a solver that does nothing", sm.InitialRMS, sm.FinalRMS)
			}
			// d as documented: 5F+3P−6 (orthographic), 6F+3P−7 (scaled
			// orthographic, perspective), counting only the cameras and
			// points in the problem (the ML parameter counts of the
			// factor package documentation).
			F, P := sm.Cameras, sm.Points
			wantD := map[factor.Model]int{factor.Orthographic: 5*F + 3*P - 6, factor.ScaledOrthographic: 6*F + 3*P - 7, factor.Perspective: 6*F + 3*P - 7}[c.model]
			if sm.Parameters != wantD {
				t.Errorf("d = %d parameters, want %d for F = %d, P = %d", sm.Parameters, wantD, F, P)
			}
			// The gauge camera and the reference distance are held.
			if res.Reconstruction.Cameras[0].R != start.Cameras[0].R {
				t.Errorf("camera 0 rotation changed: the gauge was not held")
			}
		})
	}
}

// Predicted standard deviations against the scatter of the estimates over
// 50 noise draws (the covariance of the ML estimate is the inverse of the
// Fisher information, σ²(JᵀJ)⁻¹, to first order: Hartley and Zisserman,
// MVG 2nd ed., §5.2.3 and §A6.4). Every draw starts at the truth, which
// satisfies the gauge constraints, so the estimate's error in the gauge
// is what the covariance predicts. With 50 draws a per-point variance
// ratio has ≥ 50 degrees of freedom (three coordinates, correlated), so
// its square root scatters by ≤ 1/√100 = 10 %: the pooled ratios over all
// points and over all cameras must be within 20 % of 1 (the issue's
// bound; the pooled ones scatter far less), and at least 85 % of the
// individual points within 20 % (two standard deviations each).
func TestUncertaintyMatchesScatter(t *testing.T) {
	const draws, sigma = 50, 0.5
	cases := []struct {
		name string
		o    synth.Options
	}{
		{"orthographic", synth.Options{Frames: 12, StepDeg: 10}},
		{"perspective", synth.Options{Projection: synth.Pinhole, Frames: 12, StepDeg: 10, DistanceMM: 220}},
	}
	for ci, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			s := newScenario(t, c.o, 120, int64(40+ci))
			np, nf := len(s.truth.Points), len(s.truth.Cameras)
			errSS := make([]float64, np)
			predSS := make([]float64, np)
			var camErr, camPred float64
			refined := make([]bool, np)
			for k := 0; k < draws; k++ {
				m := s.measure(sigma, uint64(1000*ci+k))
				res, err := Adjust(context.Background(), m, s.truth, Options{Loss: Squared, FunctionTolerance: 1e-10})
				if err != nil {
					t.Fatal(err)
				}
				u := res.Uncertainty
				if u == nil {
					t.Fatalf("no uncertainty: %s", res.Summary.Message)
				}
				for j := 0; j < np; j++ {
					pu := u.Points[j]
					if !pu.Refined {
						continue
					}
					refined[j] = true
					e := rotation.Sub(res.Reconstruction.Points[j].X, s.truth.Points[j].X)
					errSS[j] += rotation.Dot(e, e)
					predSS[j] += pu.Cov[0][0] + pu.Cov[1][1] + pu.Cov[2][2]
				}
				for f := 0; f < nf; f++ {
					if u.Cameras[f].Held {
						continue
					}
					d := rotation.Log(rotation.TMul(s.truth.Cameras[f].R, res.Reconstruction.Cameras[f].R))
					camErr += rotation.Dot(d, d)
					C := u.Cameras[f].RotationCov
					camPred += C[0][0] + C[1][1] + C[2][2]
				}
			}
			var te, tp float64
			n, within := 0, 0
			for j := 0; j < np; j++ {
				if !refined[j] || predSS[j] == 0 {
					continue
				}
				n++
				te += errSS[j]
				tp += predSS[j]
				if r := math.Sqrt(errSS[j] / predSS[j]); r > 0.8 && r < 1.2 {
					within++
				}
			}
			pooled := math.Sqrt(te / tp)
			cam := math.Sqrt(camErr / camPred)
			t.Logf("%d points: scatter/predicted σ pooled %.3f, %d of %d points within 20 %%; camera rotations pooled %.3f", n, pooled, within, n, cam)
			if n < 50 {
				t.Fatalf("only %d refined points", n)
			}
			if !(math.Abs(pooled-1) <= 0.2) {
				t.Errorf("point scatter/predicted = %.3f, want within 20 %% of 1", pooled)
			}
			if !(math.Abs(cam-1) <= 0.2) {
				t.Errorf("camera rotation scatter/predicted = %.3f, want within 20 %% of 1", cam)
			}
			if float64(within) < 0.85*float64(n) {
				t.Errorf("only %d of %d points have scatter within 20 %% of the prediction", within, n)
			}
		})
	}
}

// Close-range perspective turntable (camera at 220 mm, about 3× the part's
// 75 mm diagonal): from a weak-perspective start (the scaled-orthographic
// camera at each view's true rotation perturbed by 1°, the points moved by
// 1 mm — what an affine factorization gives at best), perspective
// refinement reduces the structure error against the ground truth (after
// a similarity alignment, Umeyama 1991) by at least 2× (the issue's
// bound), and ResolveMirror picks the true depth order from either start
// (the affine mirror ambiguity, Tomasi and Kanade 1992; perspective
// breaks it).
func TestCloseRangePerspectiveRecoversDepthOrder(t *testing.T) {
	o := synth.Options{Projection: synth.Pinhole, Frames: 24, StepDeg: 5, DistanceMM: 220}
	if testing.Short() {
		o.Frames = 12
		o.StepDeg = 8
	}
	s := newScenario(t, o, 300, 3)
	m := s.measure(0.3, 4)
	aff := weakPerspective(s.truth, centroid(s.truth))
	aff = perturb(aff, 1, 1, 1, 5)
	in := s.in
	for _, flip := range []bool{false, true} {
		start := aff
		want := MirrorAsGiven
		if flip {
			start = Mirrored(aff)
			want = MirrorFlipped
		}
		startErr := alignedRMS(start, s.truth, m, 2)
		mr, err := ResolveMirror(context.Background(), m, start, Options{Intrinsics: &in})
		if err != nil {
			t.Fatal(err)
		}
		if mr.Choice != want {
			t.Fatalf("flip=%v: choice %s, want %s (%s)", flip, mr.Choice, want, mr.Message)
		}
		endErr := alignedRMS(mr.Best.Reconstruction, s.truth, m, 2)
		t.Logf("flip=%v: %s; structure error %.3f mm → %.4f mm (%.0f×); %s", flip, mr.Message, startErr, endErr, startErr/endErr, mr.Best.Summary.Brief())
		if endErr*2 > startErr {
			t.Errorf("flip=%v: structure error %.3f mm → %.3f mm, want ≥ 2× smaller", flip, startErr, endErr)
		}
		if mr.Best.Reconstruction.Model != factor.Perspective || mr.Best.Reconstruction.Diagnostics.MirrorAmbiguous {
			t.Errorf("flip=%v: model %s, mirror ambiguous %v", flip, mr.Best.Reconstruction.Model, mr.Best.Reconstruction.Diagnostics.MirrorAmbiguous)
		}
		if !(mr.CostRatio > 2) {
			t.Errorf("flip=%v: cost ratio %.3g; at close range the wrong order should fit far worse", flip, mr.CostRatio)
		}
	}
}

// Far away (weak perspective: camera at 5 m with a 20000 px focal length,
// the same image size) the two depth orders fit alike and ResolveMirror
// must say so rather than guess (the perspective effect on a 75 mm part
// is ≈ (75/5000)² of its image size, below the noise).
func TestFarPerspectiveStaysAmbiguous(t *testing.T) {
	o := synth.Options{Projection: synth.Pinhole, Frames: 10, StepDeg: 8, DistanceMM: 5000, FocalPx: 20000}
	s := newScenario(t, o, 150, 6)
	m := s.measure(0.3, 7)
	aff := perturb(weakPerspective(s.truth, centroid(s.truth)), 0.2, 0.2, 0.1, 8)
	in := s.in
	mr, err := ResolveMirror(context.Background(), m, aff, Options{Intrinsics: &in, MaxIterations: 50})
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("%s", mr.Message)
	if mr.Choice != MirrorAmbiguous || !mr.Best.Reconstruction.Diagnostics.MirrorAmbiguous {
		t.Errorf("choice %s (ratio %.4f), want ambiguous", mr.Choice, mr.CostRatio)
	}
	found := false
	for _, w := range mr.Best.Reconstruction.Diagnostics.Warnings {
		found = found || w.Code == factor.WarnMirror
	}
	if !found {
		t.Error("no mirror-ambiguity warning")
	}
}

// Robust loss: 5 % of the observations moved by 5–15 px in spread-out
// directions (mismatched tracks). With the default Huber loss (1 px) the
// structure error of the points seen in 6 or more views stays close to
// the outlier-free one; with plain least squares it is clearly worse (the
// reason for the default; Huber 1964, bounded influence). Points seen in
// two or three views are left out of the comparison: with one outlier in
// two views no loss can tell which one is wrong.
func TestHuberResistsOutliers(t *testing.T) {
	o := synth.Options{Frames: 16, StepDeg: 6}
	s := newScenario(t, o, 200, 11)
	clean := s.measure(0.3, 12)
	dirty := s.measure(0.3, 12)
	nf, np := len(s.truth.Cameras), len(s.truth.Points)
	k := 0
	for f := 0; f < nf; f++ {
		for j := 0; j < np; j++ {
			if !dirty.Observed(f, j) {
				continue
			}
			k++
			if k%20 == 0 {
				off := 5 + float64(k%11)
				a := 2.399 * float64(k) // golden-angle directions, spread evenly
				dirty.W.Set(2*f, j, dirty.W.At(2*f, j)+off*math.Cos(a))
				dirty.W.Set(2*f+1, j, dirty.W.At(2*f+1, j)+off*math.Sin(a))
			}
		}
	}
	start := perturb(s.truth, 0.3, 0.5, 0.2, 13)
	run := func(m *factor.Measurements, loss Loss) float64 {
		res, err := Adjust(context.Background(), m, start, Options{Loss: loss, SkipUncertainty: true})
		if err != nil {
			t.Fatal(err)
		}
		return alignedRMS(res.Reconstruction, s.truth, m, 6)
	}
	e0 := run(clean, Squared)
	eh := run(dirty, Huber)
	es := run(dirty, Squared)
	t.Logf("structure error: clean %.4f, outliers+Huber %.4f, outliers+squared %.4f (mm)", e0, eh, es)
	if eh > 1.5*e0 {
		t.Errorf("Huber with outliers %.4f mm vs clean %.4f mm: not robust", eh, e0)
	}
	if es < 2*eh {
		t.Errorf("squared loss with outliers %.4f mm is not clearly worse than Huber %.4f mm: the outliers are too weak for this test", es, eh)
	}
}

// Refining the focal length and k1 with the perspective model recovers
// a focal length 3 % off and a distortion the start ignores (the
// measurements are distorted with k1 = −0.15 through factor.Intrinsics,
// the OpenCV convention). Tolerances from the predicted standard
// deviations: within 4σ of the truth.
func TestRefineFocalAndK1(t *testing.T) {
	o := synth.Options{Projection: synth.Pinhole, Frames: 24, StepDeg: 8, DistanceMM: 120, FocalPx: 420}
	s := newScenario(t, o, 500, 21)
	m := s.measure(0.2, 22)
	truthIn := s.in
	truthIn.K1 = -0.15
	nf, np := len(s.truth.Cameras), len(s.truth.Points)
	for f := 0; f < nf; f++ {
		for j := 0; j < np; j++ {
			if m.Observed(f, j) {
				u, v := truthIn.Distort(m.W.At(2*f, j), m.W.At(2*f+1, j))
				m.W.Set(2*f, j, u)
				m.W.Set(2*f+1, j, v)
			}
		}
	}
	start := perturb(s.truth, 0.2, 0.3, 0.2, 23)
	startIn := s.in
	startIn.Fx *= 1.03
	startIn.Fy *= 1.03
	res, err := Adjust(context.Background(), m, start, Options{Intrinsics: &startIn, RefineFocal: true, RefineK1: true, Loss: Squared})
	if err != nil {
		t.Fatal(err)
	}
	u := res.Uncertainty
	sm := res.Summary
	t.Logf("focal %.2f → %.2f (truth %.2f, σ %.3f); k1 %.4f → %.5f (truth −0.15, σ %.5f); RMS %.3f", sm.InitialFocal, sm.FinalFocal, s.in.Fx, u.FocalSigma, sm.InitialK1, sm.FinalK1, u.K1Sigma, sm.FinalRMS)
	if math.Abs(sm.FinalFocal-s.in.Fx) > 4*u.FocalSigma || !(u.FocalSigma < 0.01*s.in.Fx) {
		t.Errorf("focal %.3f, truth %.3f, σ %.3f", sm.FinalFocal, s.in.Fx, u.FocalSigma)
	}
	if math.Abs(sm.FinalK1+0.15) > 4*u.K1Sigma || !(u.K1Sigma < 0.02) {
		t.Errorf("k1 %.5f, truth −0.15, σ %.5f", sm.FinalK1, u.K1Sigma)
	}
	if got := res.Reconstruction.Intrinsics; got == nil || got.Fx != sm.FinalFocal || got.K1 != sm.FinalK1 {
		t.Errorf("refined intrinsics not written into the reconstruction: %+v", got)
	}
}

// The options rules: each bad value is refused naming the field.
func TestOptionsValidate(t *testing.T) {
	bad := []struct {
		o     Options
		field string
	}{
		{Options{Loss: "l1"}, "Loss"},
		{Options{LossScale: -1}, "LossScale"},
		{Options{LossScale: math.NaN()}, "LossScale"},
		{Options{MaxIterations: -2}, "MaxIterations"},
		{Options{FunctionTolerance: math.Inf(1)}, "FunctionTolerance"},
		{Options{MinViews: 1}, "MinViews"},
		{Options{Solver: "qr"}, "Solver"},
		{Options{Threads: -1}, "Threads"},
		{Options{MirrorRatio: 0.5}, "MirrorRatio"},
		{Options{Model: factor.Auto}, "Model"},
		{Options{Intrinsics: &factor.Intrinsics{Fx: -1, Fy: 1}}, "Intrinsics"},
	}
	for _, b := range bad {
		err := b.o.Validate()
		if err == nil || !strings.Contains(err.Error(), b.field) || !strings.HasPrefix(err.Error(), "bundle: ") {
			t.Errorf("%+v: error %v, want one naming %s", b.o, err, b.field)
		}
	}
	if err := (Options{}).Validate(); err != nil {
		t.Errorf("zero options: %v", err)
	}
	d := Options{}.WithDefaults()
	if d.Loss != Huber || d.LossScale != 1 || d.MaxIterations != 100 || d.Solver != Schur || d.MinViews != 2 || d.Threads < 1 {
		t.Errorf("defaults: %+v", d)
	}
}

// Bad input is a returned error, not a panic: a perspective refinement
// without intrinsics, a rotation that is not one, points behind the
// camera; a cancelled context stops with the best iterate and the
// context's error.
func TestErrors(t *testing.T) {
	s, m := smallCase(t, synth.Orthographic)
	rec := *s.truth
	if _, err := Adjust(context.Background(), m, &rec, Options{Model: factor.Perspective}); err == nil || !strings.Contains(err.Error(), "intrinsics") {
		t.Errorf("perspective without intrinsics: %v", err)
	}
	bad := *s.truth
	bad.Cameras = append([]factor.Camera(nil), s.truth.Cameras...)
	bad.Cameras[2].R[0][0] += 0.1
	if _, err := Adjust(context.Background(), m, &bad, Options{}); err == nil || !strings.Contains(err.Error(), "orthonormal") {
		t.Errorf("non-rotation: %v", err)
	}
	sp, mp := smallCase(t, synth.Pinhole)
	behind := *sp.truth
	behind.Points = append([]factor.Point(nil), sp.truth.Points...)
	for i := range behind.Points {
		behind.Points[i].X = rotation.Scale(50, behind.Points[i].X)
	}
	if _, err := Adjust(context.Background(), mp, &behind, Options{}); err == nil || !strings.Contains(err.Error(), "behind") {
		t.Errorf("points behind the camera: %v", err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	res, err := Adjust(ctx, m, perturb(s.truth, 0.5, 0.5, 0.2, 3), Options{})
	if !errors.Is(err, context.Canceled) || res == nil || res.Summary.Termination != Cancelled {
		t.Errorf("cancelled: result %v, error %v", res != nil, err)
	}
}

// The summary's report carries what a solver summary should: costs,
// RMS, iterations with a record each, the termination and the timing.
func TestSummaryReport(t *testing.T) {
	s, m := smallCase(t, synth.Pinhole)
	var seen int
	res, err := Adjust(context.Background(), m, perturb(s.truth, 0.5, 0.5, 0.2, 3), Options{OnIteration: func(Iteration) { seen++ }})
	if err != nil {
		t.Fatal(err)
	}
	sm := res.Summary
	if seen != len(sm.Records) || sm.Iterations != len(sm.Records) || sm.Iterations == 0 {
		t.Errorf("%d callbacks, %d records, %d iterations", seen, len(sm.Records), sm.Iterations)
	}
	if !sm.Usable() || !(sm.FinalCost < sm.InitialCost) {
		t.Errorf("not usable: %s", sm.Brief())
	}
	rep := sm.Report()
	for _, w := range []string{"initial", "final", "RMS", "termination: " + string(sm.Termination), "gauge:", "iter", "usable: yes"} {
		if !strings.Contains(rep, w) {
			t.Errorf("report lacks %q:\n%s", w, rep)
		}
	}
	if strings.Count(sm.Brief(), "\n") != 0 {
		t.Errorf("brief is not one line: %q", sm.Brief())
	}
	c := res.Reconstruction.Diagnostics.Convergence
	if len(c) == 0 || c[len(c)-1].Stage != "bundle" {
		t.Errorf("no bundle convergence entry: %+v", c)
	}
	t.Log("\n" + rep)
}

// Cameras and points are paired with the measurements by frame and track
// id, not by position: a reconstruction whose points come in another
// order, with one track unknown to the measurements and one camera
// missing, refines to the same result for the shared ones. And the number
// of threads changes nothing beyond rounding (the reductions are summed
// in a fixed order per thread count): final costs within 1e-9 relative.
func TestIDMappingAndThreads(t *testing.T) {
	s, m := smallCase(t, synth.Pinhole)
	start := perturb(s.truth, 0.3, 0.3, 0.1, 41)
	ref, err := Adjust(context.Background(), m, start, Options{Threads: 1})
	if err != nil {
		t.Fatal(err)
	}
	two, err := Adjust(context.Background(), m, start, Options{Threads: 2})
	if err != nil {
		t.Fatal(err)
	}
	if d := math.Abs(two.Summary.FinalCost/ref.Summary.FinalCost - 1); d > 1e-9 {
		t.Errorf("threads 1 vs 2: final costs differ by %.3g relative", d)
	}
	shuf := *start
	shuf.Points = nil
	for i := len(start.Points) - 1; i >= 0; i-- {
		shuf.Points = append(shuf.Points, start.Points[i])
	}
	shuf.Points = append(shuf.Points, factor.Point{Track: 999999, X: [3]float64{1, 2, 3}})
	res, err := Adjust(context.Background(), m, &shuf, Options{Threads: 1})
	if err != nil {
		t.Fatal(err)
	}
	if d := math.Abs(res.Summary.FinalCost/ref.Summary.FinalCost - 1); d > 1e-9 {
		t.Errorf("reordered points: final cost %.12g vs %.12g", res.Summary.FinalCost, ref.Summary.FinalCost)
	}
	byTrack := map[int][3]float64{}
	for _, p := range ref.Reconstruction.Points {
		byTrack[p.Track] = p.X
	}
	for _, p := range res.Reconstruction.Points {
		if p.Track == 999999 {
			if p.X != [3]float64{1, 2, 3} {
				t.Errorf("a point without measurements moved to %v", p.X)
			}
			continue
		}
		if d := rotation.Norm(rotation.Sub(p.X, byTrack[p.Track])); d > 1e-6 {
			t.Fatalf("track %d: %v vs %v", p.Track, p.X, byTrack[p.Track])
		}
	}
	if res.Summary.SkippedPoints != ref.Summary.SkippedPoints+1 {
		t.Errorf("skipped %d, want %d", res.Summary.SkippedPoints, ref.Summary.SkippedPoints+1)
	}
	drop := *start
	drop.Cameras = append([]factor.Camera(nil), start.Cameras[:3]...)
	drop.Cameras = append(drop.Cameras, start.Cameras[4:]...)
	res, err = Adjust(context.Background(), m, &drop, Options{})
	if err != nil {
		t.Fatal(err)
	}
	if res.Summary.Cameras != len(start.Cameras)-1 || res.Reconstruction.Cameras[3].Frame != 4 {
		t.Errorf("dropped camera: %d cameras, camera 3 is frame %d", res.Summary.Cameras, res.Reconstruction.Cameras[3].Frame)
	}
}

// The dense solver reaches the same optimum as the Schur one (same steps,
// so the same iterates to rounding).
func TestDenseSolverSameOptimum(t *testing.T) {
	s, m := smallCase(t, synth.Orthographic)
	start := perturb(s.truth, 0.3, 0.3, 0.1, 42)
	a, err := Adjust(context.Background(), m, start, Options{SkipUncertainty: true})
	if err != nil {
		t.Fatal(err)
	}
	b, err := Adjust(context.Background(), m, start, Options{Solver: Dense, SkipUncertainty: true})
	if err != nil {
		t.Fatal(err)
	}
	if a.Summary.Iterations != b.Summary.Iterations || math.Abs(a.Summary.FinalCost/b.Summary.FinalCost-1) > 1e-9 {
		t.Errorf("Schur %s\ndense %s", a.Summary.Brief(), b.Summary.Brief())
	}
}

// Mirrored leaves every affine projection unchanged (the depth-reversal
// ambiguity: R'ᵢ·X' = Rᵢ·H·H·X for the image rows; Tomasi and Kanade
// 1992) and gives proper rotations; sameHandedness tells a mirror image
// from a rotated, scaled, shifted copy. Tolerance 1e-9 px (rounding of
// coordinates ≈ 100 times 1e-16, with margin).
func TestMirroredAndHandedness(t *testing.T) {
	s, _ := smallCase(t, synth.Orthographic)
	rec := s.truth
	mir := Mirrored(rec)
	for i, c := range mir.Cameras {
		if d := rotation.Det(c.R); math.Abs(d-1) > 1e-12 {
			t.Fatalf("camera %d: det %.15g", i, d)
		}
		for k := 0; k < len(rec.Points); k += 5 {
			u0, v0 := rec.Project(i, rec.Points[k].X)
			u1, v1 := mir.Project(i, mir.Points[k].X)
			if math.Hypot(u1-u0, v1-v0) > 1e-9 {
				t.Fatalf("camera %d point %d: mirror moved the projection by %.3g px", i, k, math.Hypot(u1-u0, v1-v0))
			}
		}
	}
	withViews := func(r *factor.Reconstruction) *factor.Reconstruction {
		out := *r
		out.Points = append([]factor.Point(nil), r.Points...)
		for i := range out.Points {
			out.Points[i].Views = 2
		}
		return &out
	}
	moved := withViews(ScaleBy(rec, 2.5))
	G := rotation.Exp([3]float64{0.4, -0.3, 1.2})
	for i := range moved.Points {
		moved.Points[i].X = rotation.Add(rotation.Apply(G, moved.Points[i].X), [3]float64{5, -7, 1})
	}
	if !sameHandedness(withViews(rec), moved) {
		t.Error("a rotated, scaled, shifted copy reported as mirrored")
	}
	if sameHandedness(withViews(rec), withViews(mir)) {
		t.Error("the mirror image reported as the same depth order")
	}
}
