package eval

import (
	"math"
	"math/rand/v2"
	"testing"
)

func rotZ(deg float64) [3][3]float64 {
	c, s := math.Cos(deg*math.Pi/180), math.Sin(deg*math.Pi/180)
	return [3][3]float64{{c, -s, 0}, {s, c, 0}, {0, 0, 1}}
}

func rotX(deg float64) [3][3]float64 {
	c, s := math.Cos(deg*math.Pi/180), math.Sin(deg*math.Pi/180)
	return [3][3]float64{{1, 0, 0}, {0, c, -s}, {0, s, c}}
}

func mul(a, b [3][3]float64) [3][3]float64 {
	var c [3][3]float64
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			for k := 0; k < 3; k++ {
				c[i][j] += a[i][k] * b[k][j]
			}
		}
	}
	return c
}

// The angle between rotations about one axis is the difference of their
// angles (a property of the rotation group, common practice); accuracy near
// zero matters for sub-0.1° scores, so 1e-4° and 1e-9° are both checked.
func TestRotationAngle(t *testing.T) {
	for _, want := range []float64{1e-9, 1e-4, 0.2, 10, 90, 179} {
		got := RotationAngleDeg(mul(rotZ(want), rotX(30)), rotX(30))
		if math.Abs(got-want) > 1e-9*math.Max(1, want) {
			t.Errorf("angle %.12g°, want %.12g°", got, want)
		}
	}
}

// Relative rotations do not depend on the world frame: multiplying every
// estimate on the right by one rotation leaves the errors at zero, and a
// known perturbation of one view shows up as that angle.
func TestCompareRotationsGaugeFree(t *testing.T) {
	var truth, est [][3][3]float64
	g := mul(rotX(17), rotZ(-40))
	for i := 0; i < 10; i++ {
		r := mul(rotX(20), rotZ(5*float64(i)))
		truth = append(truth, r)
		est = append(est, mul(r, g))
	}
	e, err := CompareRotations(est, truth, false)
	if err != nil {
		t.Fatal(err)
	}
	if e.MaxDeg > 1e-9 {
		t.Errorf("max error %.3g° for a gauge change only", e.MaxDeg)
	}
	est[3] = mul(rotZ(0.5), est[3])
	e, _ = CompareRotations(est, truth, false)
	if math.Abs(e.MaxDeg-0.5) > 1e-9 {
		t.Errorf("max error %.6f°, want 0.5°", e.MaxDeg)
	}
}

// Umeyama (1991): a known similarity applied to random points is recovered
// exactly, with a reflection only when allowed.
func TestAlignSimilarity(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 1))
	var src, dst [][3]float64
	sim := Similarity{Scale: 2.5, R: mul(rotX(33), rotZ(71)), T: [3]float64{1, -2, 3}}
	for i := 0; i < 50; i++ {
		x := [3]float64{rng.NormFloat64(), rng.NormFloat64(), rng.NormFloat64()}
		src = append(src, x)
		dst = append(dst, sim.Apply(x))
	}
	got, rms, err := AlignSimilarity(src, dst, false)
	if err != nil {
		t.Fatal(err)
	}
	if rms > 1e-12 || math.Abs(got.Scale-2.5) > 1e-12 {
		t.Errorf("rms %.3g, scale %.15g", rms, got.Scale)
	}
	// Mirror the source in z: only a reflection aligns it.
	for i := range src {
		src[i][2] = -src[i][2]
	}
	if _, rms, _ := AlignSimilarity(src, dst, false); rms < 1e-3 {
		t.Errorf("rotation-only alignment of a mirrored set fit too well: %.3g", rms)
	}
	if _, rms, _ := AlignSimilarity(src, dst, true); rms > 1e-12 {
		t.Errorf("reflection allowed: rms %.3g", rms)
	}
}

// CompareAngles measures angles relative to the first frame and matches
// the sense of turning: an estimate that is the truth plus an offset,
// mirrored, is scored as exact; known per-frame errors e_f (zero at the
// first frame, by the definition relative to it) come back as their RMS,
// maximum and standard deviation, computed here by hand.
func TestCompareAngles(t *testing.T) {
	truth := func(f int) float64 { return 2.5*float64(f) + 0.1*float64(f%3) }
	frames := []int{3, 4, 5, 6, 8}
	exact := make([]float64, len(frames))
	for i, f := range frames {
		exact[i] = 40 - truth(f) // offset and opposite sense
	}
	ae, err := CompareAngles(exact, frames, truth)
	if err != nil || ae.RMSDeg > 1e-12 || ae.MaxDeg > 1e-12 || ae.Frames != 5 {
		t.Errorf("mirrored and offset angles: %+v, %v; want 0 error", ae, err)
	}
	e := []float64{0, 0.02, -0.01, 0.03, -0.04}
	est := make([]float64, len(frames))
	for i, f := range frames {
		est[i] = truth(f) + 7 + e[i]
	}
	ae, err = CompareAngles(est, frames, truth)
	if err != nil {
		t.Fatal(err)
	}
	rms := math.Sqrt((0 + 0.0004 + 0.0001 + 0.0009 + 0.0016) / 5) // 0.024495
	mean := (0 + 0.02 - 0.01 + 0.03 - 0.04) / 5                   // 0
	std := math.Sqrt((0.0004+0.0001+0.0009+0.0016)/5 - mean*mean)
	if math.Abs(ae.RMSDeg-rms) > 1e-12 || math.Abs(ae.MaxDeg-0.04) > 1e-12 || math.Abs(ae.StdDeg-std) > 1e-12 {
		t.Errorf("got %+v, want RMS %.6f, max 0.04, std %.6f", ae, rms, std)
	}
	if _, err := CompareAngles([]float64{1}, []int{0}, truth); err == nil {
		t.Error("one angle accepted")
	}
}

// SigmaRatio follows its definition: with errors exactly √3·scale·σ for
// every point the ratios are 1; doubling one of three errors gives the
// median 1 and the RMS ratio √((4+1+1)/3) (σ equal), computed by hand.
// Points without a σ, without an error, or with σ = 0 are left out.
func TestSigmaRatio(t *testing.T) {
	sigma := map[int]float64{1: 0.1, 2: 0.1, 3: 0.1, 4: 0.2, 5: 0}
	errs := map[int]float64{}
	for id, s := range sigma {
		errs[id] = math.Sqrt(3) * 2 * s
	}
	errs[6] = 1
	delete(errs, 4)
	med, rms, n := SigmaRatio(errs, sigma, 2)
	if n != 3 || math.Abs(med-1) > 1e-12 || math.Abs(rms-1) > 1e-12 {
		t.Errorf("exact errors: median %v, RMS %v over %d points; want 1, 1 over 3", med, rms, n)
	}
	errs[2] *= 2
	med, rms, _ = SigmaRatio(errs, sigma, 2)
	if math.Abs(med-1) > 1e-12 || math.Abs(rms-math.Sqrt(2)) > 1e-12 {
		t.Errorf("one error doubled: median %v, RMS %v; want 1, √2", med, rms)
	}
	if _, _, n := SigmaRatio(errs, nil, 1); n != 0 {
		t.Errorf("no σ: %d points", n)
	}
}
