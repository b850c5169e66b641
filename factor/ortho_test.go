package factor

import (
	"context"
	"errors"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// orthoScene is a synthetic orthographic configuration made in the test: F
// cameras with random rotations, P points in a box, image translations.
type orthoScene struct {
	R  [][3][3]float64
	T  [][2]float64
	X  [][3]float64
	Wm *mat.Dense
}

func randRotation(rng *rand.Rand) [3][3]float64 {
	// Uniform random rotation from a unit quaternion (Shoemake, Graphics
	// Gems III, 1992).
	q := [4]float64{rng.NormFloat64(), rng.NormFloat64(), rng.NormFloat64(), rng.NormFloat64()}
	n := math.Sqrt(q[0]*q[0] + q[1]*q[1] + q[2]*q[2] + q[3]*q[3])
	w, x, y, z := q[0]/n, q[1]/n, q[2]/n, q[3]/n
	return [3][3]float64{
		{1 - 2*(y*y+z*z), 2 * (x*y - w*z), 2 * (x*z + w*y)},
		{2 * (x*y + w*z), 1 - 2*(x*x+z*z), 2 * (y*z - w*x)},
		{2 * (x*z - w*y), 2 * (y*z + w*x), 1 - 2*(x*x+y*y)},
	}
}

func newOrthoScene(rng *rand.Rand, nf, np int, sigma float64) *orthoScene {
	s := &orthoScene{}
	for i := 0; i < nf; i++ {
		s.R = append(s.R, randRotation(rng))
		s.T = append(s.T, [2]float64{300 + 50*rng.Float64(), 200 + 50*rng.Float64()})
	}
	for j := 0; j < np; j++ {
		s.X = append(s.X, [3]float64{100 * (rng.Float64() - 0.5), 80 * (rng.Float64() - 0.5), 60 * (rng.Float64() - 0.5)})
	}
	s.Wm = mat.NewDense(2*nf, np, nil)
	for i := 0; i < nf; i++ {
		for j := 0; j < np; j++ {
			s.Wm.Set(2*i, j, dot3(s.R[i][0], s.X[j])+s.T[i][0]+sigma*rng.NormFloat64())
			s.Wm.Set(2*i+1, j, dot3(s.R[i][1], s.X[j])+s.T[i][1]+sigma*rng.NormFloat64())
		}
	}
	return s
}

// compare returns the largest rotation-matrix entry error and structure
// error after the gauge of the reconstruction (camera 0 = identity, centroid
// at the origin), trying both mirror images.
func (s *orthoScene) compare(rec *Reconstruction) (rotErr, ptErr float64) {
	R0 := s.R[0]
	var mean [3]float64
	for _, X := range s.X {
		for k := range mean {
			mean[k] += X[k] / float64(len(s.X))
		}
	}
	best := [2]float64{math.Inf(1), math.Inf(1)}
	for _, mirror := range []float64{1, -1} {
		D := [3]float64{1, 1, mirror}
		re, pe := 0.0, 0.0
		for i, cam := range rec.Cameras {
			want := mulABt(s.R[i], R0)
			for a := 0; a < 3; a++ {
				for b := 0; b < 3; b++ {
					re = math.Max(re, math.Abs(cam.R[a][b]-D[a]*want[a][b]*D[b]))
				}
			}
		}
		for j, p := range rec.Points {
			c := [3]float64{s.X[j][0] - mean[0], s.X[j][1] - mean[1], s.X[j][2] - mean[2]}
			for a := 0; a < 3; a++ {
				want := D[a] * dot3(R0[a], c)
				pe = math.Max(pe, math.Abs(p.X[a]-want))
			}
		}
		if re+pe < best[0]+best[1] {
			best = [2]float64{re, pe}
		}
	}
	return best[0], best[1]
}

// Noise-free orthographic data are recovered exactly (Tomasi–Kanade 1992:
// the centred matrix has rank 3 and the metric upgrade is exact), up to the
// global rotation fixed by camera 0 and the mirror ambiguity. Tolerance 1e-9
// relative to the 100-unit scene: double precision leaves ~1e-12.
func TestOrthographicExactRecovery(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	for trial := 0; trial < 20; trial++ {
		s := newOrthoScene(rng, 3+trial, 4+5*trial, 0)
		rec, err := Factorize(context.Background(), &Measurements{W: s.Wm}, Options{})
		if err != nil {
			t.Fatalf("trial %d: %v", trial, err)
		}
		re, pe := s.compare(rec)
		if re > 1e-9 || pe > 1e-9*100 {
			t.Errorf("trial %d (%d frames, %d points): rotation error %.3g, structure error %.3g", trial, len(s.R), len(s.X), re, pe)
		}
		if rec.Diagnostics.RMS > 1e-9 {
			t.Errorf("trial %d: RMS %.3g on noise-free data", trial, rec.Diagnostics.RMS)
		}
		for i, cam := range rec.Cameras {
			if d := math.Abs(det3(cam.R) - 1); d > 1e-12 {
				t.Errorf("camera %d: det R = 1%+.3g", i, d)
			}
		}
		if !rec.Diagnostics.MirrorAmbiguous {
			t.Error("affine model must report the mirror ambiguity")
		}
	}
}

func det3(r [3][3]float64) float64 { return dot3(r[0], cross3(r[1], r[2])) }

// With i.i.d. Gaussian noise σ the RMS residual of a maximum-likelihood fit
// is σ·√(1 − d/n) (Hartley & Zisserman, MVG 2nd ed., §5.1.3 and the affine
// factorization of §18.2, where d = 8F + 3P − 12 for the rank-3 fit). The
// orthographic model applies the same result with d = 5F + 3P − 6. Averaged
// over 300 trials the mean squared residual must match within 2 % (the
// standard error of the mean of 300 χ² samples with thousands of degrees of
// freedom is far below that).
func TestResidualMatchesMLPrediction(t *testing.T) {
	if testing.Short() {
		t.Skip("300 trials; runs in the full suite")
	}
	rng := rand.New(rand.NewPCG(3, 4))
	const nf, np, sigma, trials = 10, 40, 0.5, 300
	var affSum, orthoSum float64
	for trial := 0; trial < trials; trial++ {
		s := newOrthoScene(rng, nf, np, sigma)
		rec, err := Factorize(context.Background(), &Measurements{W: s.Wm}, Options{})
		if err != nil {
			t.Fatal(err)
		}
		affSum += rec.Diagnostics.AffineRMS * rec.Diagnostics.AffineRMS
		orthoSum += rec.Diagnostics.RMS * rec.Diagnostics.RMS
	}
	n := float64(2 * nf * np)
	wantAff := sigma * math.Sqrt(1-float64(8*nf+3*np-12)/n)
	wantOrtho := sigma * math.Sqrt(1-float64(5*nf+3*np-6)/n)
	gotAff := math.Sqrt(affSum / trials)
	gotOrtho := math.Sqrt(orthoSum / trials)
	if math.Abs(gotAff/wantAff-1) > 0.02 {
		t.Errorf("affine rank-3 RMS %.5f, ML prediction %.5f", gotAff, wantAff)
	}
	if math.Abs(gotOrtho/wantOrtho-1) > 0.02 {
		t.Errorf("orthographic RMS %.5f, ML prediction %.5f", gotOrtho, wantOrtho)
	}
	t.Logf("affine %.5f (pred %.5f), orthographic %.5f (pred %.5f)", gotAff, wantAff, gotOrtho, wantOrtho)
}

// A quick version of the check above for the -short loop: the estimated
// noise level σ̂ recovers the σ that made the data within 5 % on one
// 20×200 case (σ̂² is a χ² mean over ~3400 degrees of freedom; its relative
// standard deviation is √(2/3400) ≈ 2.4 %, so 5 % is two standard errors).
func TestNoiseEstimate(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	s := newOrthoScene(rng, 20, 200, 0.3)
	rec, err := Factorize(context.Background(), &Measurements{W: s.Wm}, Options{})
	if err != nil {
		t.Fatal(err)
	}
	if got := rec.Diagnostics.NoiseSigma; math.Abs(got/0.3-1) > 0.05 {
		t.Errorf("σ̂ = %.4f, want 0.3 ± 5 %%", got)
	}
	for _, w := range rec.Diagnostics.Warnings {
		if w.Code != WarnMirror {
			t.Errorf("unexpected warning on good data: %s: %s", w.Code, w.Message)
		}
	}
}

// Views that differ only by an image-plane rotation, scale and shift carry
// no depth information (common practice: a rotation about the viewing axis
// is a 2D similarity of the image): Factorize must refuse.
func TestNoRotationIsAnError(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 8))
	const nf, np = 8, 50
	W := mat.NewDense(2*nf, np, nil)
	for j := 0; j < np; j++ {
		x, y := 200*rng.Float64(), 150*rng.Float64()
		for i := 0; i < nf; i++ {
			th := 0.05 * float64(i)
			c, s := math.Cos(th), math.Sin(th)
			W.Set(2*i, j, c*x-s*y+3*float64(i)+0.1*rng.NormFloat64())
			W.Set(2*i+1, j, s*x+c*y+0.1*rng.NormFloat64())
		}
	}
	_, err := Factorize(context.Background(), &Measurements{W: W}, Options{})
	if !errors.Is(err, ErrLittleRotation) {
		t.Fatalf("got %v, want ErrLittleRotation", err)
	}
}

// A flat point set seen from rotating cameras has a rank-2 centred matrix
// (Tomasi–Kanade 1992: rank W̃ = rank S): the planar warning must fire, and
// must stay silent on the 3D scene of the same size.
func TestPlanarSceneWarns(t *testing.T) {
	rng := rand.New(rand.NewPCG(9, 10))
	s := newOrthoScene(rng, 12, 60, 0)
	for j := range s.X {
		s.X[j][2] = 0
	}
	for i := range s.R {
		for j := range s.X {
			s.Wm.Set(2*i, j, dot3(s.R[i][0], s.X[j])+s.T[i][0]+0.2*rng.NormFloat64())
			s.Wm.Set(2*i+1, j, dot3(s.R[i][1], s.X[j])+s.T[i][1]+0.2*rng.NormFloat64())
		}
	}
	rec, err := Factorize(context.Background(), &Measurements{W: s.Wm}, Options{})
	if err != nil {
		t.Fatalf("planar scene must still reconstruct (with a warning): %v", err)
	}
	if !hasWarning(rec, WarnPlanar) {
		t.Errorf("no %s warning; σ = %v", WarnPlanar, rec.Diagnostics.SingularValues)
	}
	good := newOrthoScene(rng, 12, 60, 0.2)
	rec, err = Factorize(context.Background(), &Measurements{W: good.Wm}, Options{})
	if err != nil {
		t.Fatal(err)
	}
	if hasWarning(rec, WarnPlanar) {
		t.Errorf("planar warning on a 3D scene; σ = %v", rec.Diagnostics.SingularValues)
	}
}

func hasWarning(rec *Reconstruction, code string) bool {
	for _, w := range rec.Diagnostics.Warnings {
		if w.Code == code {
			return true
		}
	}
	return false
}

func TestTooFewIsAnError(t *testing.T) {
	rng := rand.New(rand.NewPCG(11, 12))
	for _, c := range []struct{ nf, np int }{{2, 50}, {10, 3}} {
		s := newOrthoScene(rng, c.nf, c.np, 0)
		if _, err := Factorize(context.Background(), &Measurements{W: s.Wm}, Options{}); !errors.Is(err, ErrTooFew) {
			t.Errorf("%d frames × %d points: got %v, want ErrTooFew", c.nf, c.np, err)
		}
	}
}

// The polar factor is the nearest matrix with orthonormal rows (Higham,
// Functions of Matrices, 2008, Thm 8.4): rows orthonormal, and A = R·H with
// H symmetric positive definite.
func TestPolar2x3(t *testing.T) {
	rng := rand.New(rand.NewPCG(13, 14))
	for k := 0; k < 100; k++ {
		var a [2][3]float64
		for i := range a {
			for j := range a[i] {
				a[i][j] = rng.NormFloat64()
			}
		}
		r, ok := polar2x3(a)
		if !ok {
			t.Fatal("full-rank matrix rejected")
		}
		if e := math.Abs(dot3(r[0], r[0])-1) + math.Abs(dot3(r[1], r[1])-1) + math.Abs(dot3(r[0], r[1])); e > 1e-12 {
			t.Fatalf("rows not orthonormal: %g", e)
		}
		// H = A Rᵀ (2×2) must be symmetric positive definite.
		h01, h10 := dot3(a[0], r[1]), dot3(a[1], r[0])
		if math.Abs(h01-h10) > 1e-12 {
			t.Fatalf("A Rᵀ not symmetric: %g vs %g", h01, h10)
		}
	}
}

func BenchmarkFactorize200x2000(b *testing.B) { benchFactorize(b, 100, 2000) }
func BenchmarkFactorize1000x5000(b *testing.B) {
	if testing.Short() {
		b.Skip("large")
	}
	benchFactorize(b, 500, 5000)
}

func benchFactorize(b *testing.B, nf, np int) {
	rng := rand.New(rand.NewPCG(15, 16))
	s := newOrthoScene(rng, nf, np, 0.2)
	m := &Measurements{W: s.Wm}
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if _, err := Factorize(context.Background(), m, Options{}); err != nil {
			b.Fatal(err)
		}
	}
}
