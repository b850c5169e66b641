package factor

import (
	"context"
	"errors"
	"math"
	"math/rand/v2"
	"os"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// allModels lists the models with the options each needs for scene s.
func allModels(s *scene) []Options {
	return []Options{
		{Model: Orthographic},
		{Model: ScaledOrthographic},
		{Model: Paraperspective, Intrinsics: &s.K},
		{Model: Perspective, Intrinsics: &s.K},
		{Model: Perspective, Intrinsics: &s.K, PerspectiveMethod: SturmTriggs},
	}
}

// A flat part (all points in one plane) seen by rotating cameras: the
// planar-scene warning fires for every model (for the affine models the
// centred matrix has rank 2, Tomasi–Kanade 1992; for the perspective model
// the corrected matrix x̄(1+ε) has), and it stays silent on the same scene
// with depth relief. Noise 0.2 px.
func TestPlanarSceneWarnsEveryModel(t *testing.T) {
	rng := rand.New(rand.NewPCG(41, 42))
	flat := newCloseRangeScene(rng, 12, 60, 100, 400, 80, 0.1)
	for j := range flat.X {
		flat.X[j][1] = 0 // the plane y = 0: the turntable's top
	}
	good := newCloseRangeScene(rng, 12, 60, 100, 400, 80, 0.1)
	for _, model := range []Model{Orthographic, ScaledOrthographic, Paraperspective, Perspective} {
		for _, c := range []struct {
			s      *scene
			planar bool
		}{{flat, true}, {good, false}} {
			render := model
			if model == Orthographic {
				render = Orthographic
			}
			W := c.s.render(rng, render, 0.2)
			o := Options{Model: model, Intrinsics: &c.s.K}
			rec, err := Factorize(context.Background(), &Measurements{W: W}, o)
			if err != nil {
				t.Fatalf("%s planar=%v: %v", model, c.planar, err)
			}
			if hasWarning(rec, WarnPlanar) != c.planar {
				t.Errorf("%s: planar warning %v on a scene with planar=%v; σ = %.4g", model, !c.planar, c.planar, rec.Diagnostics.SingularValues)
			}
		}
	}
}

// Views that differ only by translation and an image-plane rotation carry
// no depth information (common practice: the images are 2D similarities of
// each other): every model must refuse with ErrLittleRotation.
func TestNoRotationIsAnErrorEveryModel(t *testing.T) {
	rng := rand.New(rand.NewPCG(43, 44))
	s := newCloseRangeScene(rng, 10, 40, 100, 2000, 0, 0)
	for i := range s.R {
		s.R[i] = s.R[0]
		s.T[i] = [3]float64{5 * float64(i), -3 * float64(i), 2000}
	}
	for _, o := range allModels(s) {
		W := s.render(rng, Orthographic, 0.1)
		if _, err := Factorize(context.Background(), &Measurements{W: W}, o); !errors.Is(err, ErrLittleRotation) {
			t.Errorf("%s %s: got %v, want ErrLittleRotation", o.Model, o.PerspectiveMethod, err)
		}
	}
}

// Too few frames or points for the model is an error: 2 frames (the metric
// upgrade needs 3, Tomasi–Kanade 1992 §3.3), 3 points for the affine models
// (MinPoints = 4) and 5 for the perspective one (MinPointsPerspective = 6).
func TestTooFewEveryModel(t *testing.T) {
	rng := rand.New(rand.NewPCG(45, 46))
	for _, c := range []struct{ nf, np int }{{2, 40}, {10, 3}, {10, 5}} {
		s := newCloseRangeScene(rng, c.nf, c.np, 100, 400, 60, 0.1)
		for _, o := range allModels(s) {
			if c.np == 5 && o.Model != Perspective {
				continue
			}
			W := s.render(rng, Perspective, 0)
			if _, err := Factorize(context.Background(), &Measurements{W: W}, o); !errors.Is(err, ErrTooFew) {
				t.Errorf("%s, %d×%d: got %v, want ErrTooFew", o.Model, c.nf, c.np, err)
			}
		}
	}
}

// lorentzScene renders points through cameras whose rows are orthonormal
// in the Lorentzian metric diag(1, 1, −1) — i = (cosh a cos b,
// cosh a sin b, sinh a), j = (−sin b, cos b, 0) — on the odd frames (all
// frames when mixed is false) and through orthographic cameras on the even
// ones. Such rows satisfy the Tomasi–Kanade constraints exactly with
// L = diag(1, 1, −1) (made here by construction), which is not positive
// definite.
func lorentzScene(rng *rand.Rand, mixed bool, amp float64) *mat.Dense {
	const nf, np = 10, 50
	W := mat.NewDense(2*nf, np, nil)
	X := make([][3]float64, np)
	for j := range X {
		X[j] = [3]float64{100 * (rng.Float64() - 0.5), 100 * (rng.Float64() - 0.5), 100 * (rng.Float64() - 0.5)}
	}
	for i := 0; i < nf; i++ {
		var ri, rj [3]float64
		if mixed && i%2 == 0 {
			R := randRotation(rng)
			ri, rj = R[0], R[1]
		} else {
			a, b := amp*float64(i), 0.4*float64(i)
			ri = [3]float64{math.Cosh(a) * math.Cos(b), math.Cosh(a) * math.Sin(b), math.Sinh(a)}
			rj = [3]float64{-math.Sin(b), math.Cos(b), 0}
		}
		for j := range X {
			W.Set(2*i, j, dot3(ri, X[j])+300+0.1*rng.NormFloat64())
			W.Set(2*i+1, j, dot3(rj, X[j])+200+0.1*rng.NormFloat64())
		}
	}
	return W
}

// Half the frames Lorentzian: the least-squares L is not positive definite,
// the upgrade falls back to the nearest positive-definite matrix and must
// say so; all frames Lorentzian: the fallback collapses the views and the
// upgrade must fail with ErrMetricUpgrade; orthographic data: neither.
func TestMetricFallbackWarns(t *testing.T) {
	rng := rand.New(rand.NewPCG(47, 48))
	rec, err := Factorize(context.Background(), &Measurements{W: lorentzScene(rng, true, 0.3)}, Options{})
	if err != nil {
		t.Fatal(err)
	}
	if !rec.Diagnostics.MetricFallback || !hasWarning(rec, WarnMetricFallback) {
		t.Errorf("no metric fallback reported: %+v", rec.Diagnostics.Warnings)
	}
	if _, err := Factorize(context.Background(), &Measurements{W: lorentzScene(rng, false, 0.1)}, Options{}); !errors.Is(err, ErrMetricUpgrade) {
		t.Errorf("all-Lorentzian cameras: got %v, want ErrMetricUpgrade", err)
	}
	good := newOrthoScene(rng, 10, 50, 0.1)
	rec, err = Factorize(context.Background(), &Measurements{W: good.Wm}, Options{})
	if err != nil {
		t.Fatal(err)
	}
	if hasWarning(rec, WarnMetricFallback) {
		t.Error("metric fallback on orthographic data")
	}
}

// The wrong model leaves a residual far above the noise: orthographic on
// close-range perspective data (0.2 px noise) must warn high-residual; the
// perspective model on the same data must not.
func TestHighResidualWarns(t *testing.T) {
	rng := rand.New(rand.NewPCG(49, 50))
	s := newCloseRangeScene(rng, 15, 60, 100, 300, 80, 0.1)
	W := s.render(rng, Perspective, 0.2)
	m := &Measurements{W: W}
	rec, err := Factorize(context.Background(), m, Options{NoiseSigma: 0.2})
	if err != nil {
		t.Fatal(err)
	}
	if !hasWarning(rec, WarnHighResidual) {
		t.Errorf("no high-residual warning: RMS %.3f, expected %.3f", rec.Diagnostics.RMS, rec.Diagnostics.ExpectedRMS)
	}
	rec, err = Factorize(context.Background(), m, Options{Model: Perspective, Intrinsics: &s.K, NoiseSigma: 0.2})
	if err != nil {
		t.Fatal(err)
	}
	if hasWarning(rec, WarnHighResidual) {
		t.Errorf("high-residual warning on the right model: RMS %.3f, expected %.3f", rec.Diagnostics.RMS, rec.Diagnostics.ExpectedRMS)
	}
}

// The mirror ambiguity: every affine model reports it; the perspective
// model resolves it at close range (distance 3× the part) and reports weak
// perspective with the ambiguity at 200× (far away, 0.3 px noise).
func TestMirrorAndWeakPerspective(t *testing.T) {
	rng := rand.New(rand.NewPCG(51, 52))
	near := newCloseRangeScene(rng, 12, 50, 100, 300, 80, 0.1)
	for _, o := range allModels(near)[:3] {
		rec, err := Factorize(context.Background(), &Measurements{W: near.render(rng, o.Model, 0.2)}, o)
		if err != nil {
			t.Fatal(err)
		}
		if !rec.Diagnostics.MirrorAmbiguous || !hasWarning(rec, WarnMirror) {
			t.Errorf("%s: mirror ambiguity not reported", o.Model)
		}
	}
	o := Options{Model: Perspective, Intrinsics: &near.K}
	rec, err := Factorize(context.Background(), &Measurements{W: near.render(rng, Perspective, 0.2)}, o)
	if err != nil {
		t.Fatal(err)
	}
	if rec.Diagnostics.MirrorAmbiguous || hasWarning(rec, WarnMirror) || hasWarning(rec, WarnWeakPerspective) {
		t.Errorf("close range: mirror %v, warnings %+v", rec.Diagnostics.MirrorAmbiguous, rec.Diagnostics.Warnings)
	}
	far := newCloseRangeScene(rng, 12, 50, 100, 20000, 80, 0)
	far.K.Fx, far.K.Fy = 40000, 40000 // a long lens: the part still spans ~200 px
	o = Options{Model: Perspective, Intrinsics: &far.K}
	rec, err = Factorize(context.Background(), &Measurements{W: far.render(rng, Perspective, 0.3)}, o)
	if err != nil {
		t.Fatal(err)
	}
	if !hasWarning(rec, WarnWeakPerspective) || !rec.Diagnostics.MirrorAmbiguous || !hasWarning(rec, WarnMirror) {
		t.Errorf("far away: mirror %v, warnings %+v", rec.Diagnostics.MirrorAmbiguous, rec.Diagnostics.Warnings)
	}
}

// Paraperspective without intrinsics runs with the documented defaults and
// says so; with intrinsics it does not.
func TestDefaultIntrinsicsWarns(t *testing.T) {
	rng := rand.New(rand.NewPCG(53, 54))
	s := newCloseRangeScene(rng, 10, 40, 100, 400, 60, 0.1)
	W := s.render(rng, Paraperspective, 0.1)
	rec, err := Factorize(context.Background(), &Measurements{W: W}, Options{Model: Paraperspective, ImageWidth: 640, ImageHeight: 480})
	if err != nil {
		t.Fatal(err)
	}
	if !hasWarning(rec, WarnDefaultIntrinsics) || rec.Intrinsics == nil || rec.Intrinsics.Fx != 1.2*640 || rec.Intrinsics.Cx != 319.5 {
		t.Errorf("default intrinsics: %+v, warnings %+v", rec.Intrinsics, rec.Diagnostics.Warnings)
	}
	rec, err = Factorize(context.Background(), &Measurements{W: W}, Options{Model: Paraperspective, Intrinsics: &s.K})
	if err != nil {
		t.Fatal(err)
	}
	if hasWarning(rec, WarnDefaultIntrinsics) {
		t.Error("default-intrinsics warning with intrinsics given")
	}
	if _, err := Factorize(context.Background(), &Measurements{W: W}, Options{Model: Perspective}); err == nil {
		t.Error("perspective without intrinsics must fail")
	}
}

// The chessboard of Debian's opencv-doc (left01…left14.jpg, a 9×6 inner
// corner grid with 25 mm squares, square_size 0.025 in the file):
// projecting the board's grid through the 13 views' extrinsics
// (extrinsic_parameters, rvec and tvec per row), camera matrix and
// distortion of left_intrinsics.yml gives the tracks a perfect corner
// detector would find; factorizing them must report a planar scene, with
// the orthographic model and with the perspective one (the file's
// intrinsics, so the tracks are undistorted first).
func TestChessboardIsPlanar(t *testing.T) {
	data, err := os.ReadFile(opencvDocFile(t, "left_intrinsics.yml"))
	if err != nil {
		t.Fatal(err)
	}
	in, err := ParseIntrinsics(data, "left_intrinsics.yml")
	if err != nil {
		t.Fatal(err)
	}
	root, _, err := decodeYAMLMapping(data)
	if err != nil {
		t.Fatal(err)
	}
	ext, found, err := readCVMatrix(root, "extrinsic_parameters")
	if err != nil || !found || ext.Rows != 13 || ext.Cols != 6 {
		t.Fatalf("extrinsic_parameters: %+v %v %v", ext, found, err)
	}
	const cols, rows, square = 9, 6, 0.025
	nf, np := ext.Rows, cols*rows
	W := mat.NewDense(2*nf, np, nil)
	for f := 0; f < nf; f++ {
		e := ext.Data[6*f : 6*f+6]
		R := Rodrigues([3]float64{e[0], e[1], e[2]})
		for j := 0; j < np; j++ {
			X := [3]float64{square * float64(j%cols), square * float64(j/cols), 0}
			xc := [3]float64{dot3(R[0], X) + e[3], dot3(R[1], X) + e[4], dot3(R[2], X) + e[5]}
			u, v := in.Distort(in.Pixel(xc[0]/xc[2], xc[1]/xc[2]))
			W.Set(2*f, j, u)
			W.Set(2*f+1, j, v)
		}
	}
	for _, o := range []Options{{}, {Model: Perspective, Intrinsics: &in}} {
		rec, err := Factorize(context.Background(), &Measurements{W: W}, o)
		if err != nil {
			t.Fatalf("%s: %v", o.Model, err)
		}
		if !hasWarning(rec, WarnPlanar) {
			t.Errorf("model %q: no planar-scene warning; σ = %.4g, warnings %+v", o.Model, rec.Diagnostics.SingularValues, rec.Diagnostics.Warnings)
		}
	}
}
