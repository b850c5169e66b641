package rotation

import (
	"encoding/json"
	"math"
	"math/rand/v2"
	"os"
	"testing"
)

type rodriguesFile struct {
	Generator      string `json:"generator"`
	VectorToMatrix []struct {
		Rvec   [3]float64    `json:"rvec"`
		Matrix [3][3]float64 `json:"matrix"`
	} `json:"vector_to_matrix"`
	MatrixToVector []struct {
		Matrix [3][3]float64 `json:"matrix"`
		Rvec   [3]float64    `json:"rvec"`
	} `json:"matrix_to_vector"`
}

func loadRodrigues(t *testing.T) rodriguesFile {
	t.Helper()
	b, err := os.ReadFile("testdata/rodrigues.json")
	if err != nil {
		t.Fatal(err)
	}
	var f rodriguesFile
	if err := json.Unmarshal(b, &f); err != nil {
		t.Fatal(err)
	}
	if len(f.VectorToMatrix) < 40 || len(f.MatrixToVector) < 28 {
		t.Fatalf("reference file too short: %d and %d cases", len(f.VectorToMatrix), len(f.MatrixToVector))
	}
	return f
}

func maxAbsDiff(a, b [3][3]float64) float64 {
	m := 0.0
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			m = math.Max(m, math.Abs(a[i][j]-b[i][j]))
		}
	}
	return m
}

// Exp against the OpenCV library's cv2.Rodrigues (vector → matrix), the
// reference vectors of testdata/rodrigues.json (made offline by
// testdata/gen_rodrigues.py, command in its header). Tolerance 1e-14 per
// entry: both evaluate the same closed form in float64, whose entries
// (products of sines and cosines, |entry| ≤ 1) carry rounding of a few
// 1e-16; OpenCV has no small-angle series, so at θ ≤ 1e-5 the two forms
// differ by its cancellation error (≈1e-16/θ² relative in the
// (1 − cos θ)/θ² term, times θ² in the entry: still ≈1e-16).
func TestExpMatchesOpenCVRodrigues(t *testing.T) {
	const tol = 1e-14
	f := loadRodrigues(t)
	worst := 0.0
	for i, c := range f.VectorToMatrix {
		got := Exp(c.Rvec)
		d := maxAbsDiff(got, c.Matrix)
		worst = math.Max(worst, d)
		if d > tol {
			t.Errorf("case %d rvec %v: Exp differs from cv2.Rodrigues by %.3g\n got %v\nwant %v", i, c.Rvec, d, got, c.Matrix)
		}
	}
	t.Logf("%s: %d vectors, worst entry difference %.2g", f.Generator, len(f.VectorToMatrix), worst)
}

// Log against cv2.Rodrigues (matrix → vector). OpenCV's angles lie in
// [0, π], like ours. Tolerance 2e-12 rad per component: the reference
// matrices come from quaternions and are orthonormal to ≈1e-16, but the
// inverse map amplifies that rounding by up to 1/sin θ near π (≈5e3 for
// the case θ = π − 2e-4), and either implementation may carry it.
//
// Within 1e-6 of π the vector is decided by the sign of the tiny skew
// part, and there OpenCV 4.6 was found to return the opposite sign for the
// case θ = π − 2e-7 (its own round trip cv2.Rodrigues(rvec) misses the
// matrix by 2.8e-7, the flipped vector by 8e-10). So in that band the test
// checks the matrix instead: Exp(Log(R)) must reproduce R at least as well
// as OpenCV's vector does, and to 1e-9 at worst.
func TestLogMatchesOpenCVRodrigues(t *testing.T) {
	const tol = 2e-12
	f := loadRodrigues(t)
	worst := 0.0
	for i, c := range f.MatrixToVector {
		got := Log(c.Matrix)
		if Norm(c.Rvec) > math.Pi-1e-6 {
			ours := maxAbsDiff(Exp(got), c.Matrix)
			theirs := maxAbsDiff(Exp(c.Rvec), c.Matrix)
			if ours > math.Max(theirs, 1e-15) || ours > 1e-9 {
				t.Errorf("case %d (θ = π − %.2g): Exp(Log(R)) misses R by %.3g, OpenCV's vector by %.3g", i, math.Pi-Norm(got), ours, theirs)
			}
			t.Logf("case %d near π: round trip %.2g (ours) vs %.2g (OpenCV's vector)", i, ours, theirs)
			continue
		}
		d := 0.0
		for k := 0; k < 3; k++ {
			d = math.Max(d, math.Abs(got[k]-c.Rvec[k]))
		}
		worst = math.Max(worst, d)
		if d > tol {
			t.Errorf("case %d: Log = %v, cv2.Rodrigues = %v (difference %.3g)", i, got, c.Rvec, d)
		}
	}
	t.Logf("%s: %d matrices, worst component difference %.2g rad", f.Generator, len(f.MatrixToVector), worst)
}

// Log(Exp(w)) = w for |w| < π, and Exp(Log(R)) = R for the reference
// matrices — including the angles near and at π, where the vector's sign
// is a convention but the matrix is not (definition of the logarithm of
// SO(3), Murray, Li and Sastry 1994, §2.2). Tolerance 1e-12 (vector
// components: the near-π cases lose digits as described above) and 1e-14
// (matrix entries: rounding only).
func TestExpLogRoundTrip(t *testing.T) {
	f := loadRodrigues(t)
	for i, c := range f.VectorToMatrix {
		th := Norm(c.Rvec)
		if th >= math.Pi-1e-3 {
			// Same rotation, vector not unique (or wrapped beyond π).
			if d := maxAbsDiff(Exp(Log(c.Matrix)), c.Matrix); d > 1e-14 {
				t.Errorf("case %d (θ = %.9g): Exp(Log(R)) off by %.3g", i, th, d)
			}
			continue
		}
		w := Log(Exp(c.Rvec))
		for k := 0; k < 3; k++ {
			if math.Abs(w[k]-c.Rvec[k]) > 1e-12*math.Max(1, th) {
				t.Errorf("case %d: Log(Exp(%v)) = %v", i, c.Rvec, w)
				break
			}
		}
	}
	for i, c := range f.MatrixToVector {
		if d := maxAbsDiff(Exp(Log(c.Matrix)), c.Matrix); d > 1e-14 {
			t.Errorf("matrix case %d: Exp(Log(R)) off by %.3g", i, d)
		}
	}
}

// Exp gives a proper rotation: RᵀR = I and det R = +1 (definition of
// SO(3)); and the axis is fixed, R·a = a (Euler's theorem). Random vectors
// of every length in (0, 3π). Tolerance 1e-14 (rounding of entries ≤ 1).
func TestExpIsRotationAboutItsAxis(t *testing.T) {
	g := rand.New(rand.NewPCG(7, 11))
	for n := 0; n < 2000; n++ {
		w := [3]float64{g.NormFloat64(), g.NormFloat64(), g.NormFloat64()}
		w = Scale(3*math.Pi*g.Float64()/Norm(w), w)
		R := Exp(w)
		if d := maxAbsDiff(TMul(R, R), Identity()); d > 1e-14 {
			t.Fatalf("w = %v: RᵀR − I = %.3g", w, d)
		}
		if d := Det(R); math.Abs(d-1) > 1e-14 {
			t.Fatalf("w = %v: det R = %.17g", w, d)
		}
		if d := Norm(Sub(Apply(R, w), w)); d > 1e-14*Norm(w) {
			t.Fatalf("w = %v: R·w − w = %.3g", w, d)
		}
	}
}

// The small-angle branch of Exp joins the closed form continuously: at the
// switch (θ² = 1e-8) both must agree to rounding. Exp(w) ≈ I + [w]× to
// first order (definition of the exponential). Tolerance 1e-16 relative
// on the first-order part.
func TestExpSmallAngleBranch(t *testing.T) {
	w := Normalize([3]float64{0.3, -0.5, 0.8})
	for _, th := range []float64{0.99e-4, 1.01e-4} {
		R := Exp(Scale(th, w))
		// Closed form, evaluated directly here.
		s, c := math.Sincos(th)
		K := Skew(w)
		K2 := Mul(K, K)
		var want [3][3]float64
		for i := 0; i < 3; i++ {
			for j := 0; j < 3; j++ {
				want[i][j] = Identity()[i][j] + s*K[i][j] + (1-c)*K2[i][j]
			}
		}
		if d := maxAbsDiff(R, want); d > 1e-16 {
			t.Errorf("θ = %g: series and closed form differ by %.3g", th, d)
		}
	}
	// R ≈ I + [w]×: R₃₂ = w₀, R₁₃ = w₁, R₂₁ = w₂; the second-order terms
	// are ≈1e-18, so 1e-17 absolute separates first order from an error.
	w1 := [3]float64{1e-9, -2e-9, 3e-9}
	R := Exp(w1)
	if math.Abs(R[2][1]-w1[0]) > 1e-17 || math.Abs(R[0][2]-w1[1]) > 1e-17 || math.Abs(R[1][0]-w1[2]) > 1e-17 {
		t.Errorf("first order of Exp at 1e-9: %v", R)
	}
}

// FromAxisAngle, AxisAngle, RotZ and Angle agree with each other and with
// the definition of a rotation about z (handbook: Rz(θ) = [c −s 0; s c 0;
// 0 0 1]). Tolerance 1e-14.
func TestAxisAngleHelpers(t *testing.T) {
	for _, th := range []float64{-2.5, -0.1, 0, 0.7, 3.0} {
		R := FromAxisAngle([3]float64{0, 0, 2}, th)
		if d := maxAbsDiff(R, RotZ(th)); d > 1e-14 {
			t.Errorf("θ = %g: FromAxisAngle(z) and RotZ differ by %.3g", th, d)
		}
		ax, a := AxisAngle(R)
		if math.Abs(a-math.Abs(th)) > 1e-14 {
			t.Errorf("θ = %g: angle %.17g", th, a)
		}
		if th != 0 && math.Abs(ax[2]-math.Copysign(1, th)) > 1e-14 {
			t.Errorf("θ = %g: axis %v", th, ax)
		}
		if d := Angle(R, Identity()); math.Abs(d-math.Abs(th)) > 1e-14 {
			t.Errorf("θ = %g: Angle to identity %.17g", th, d)
		}
	}
}

// Nearest returns the orthogonal polar factor: for a rotation scaled and
// slightly perturbed it recovers a rotation (RᵀR = I, det +1) closer to
// M than the original rotation is (least-squares optimality, Umeyama
// 1991); a reflection input gives a proper rotation; a rank-1 matrix is
// refused.
func TestNearest(t *testing.T) {
	g := rand.New(rand.NewPCG(3, 5))
	for n := 0; n < 200; n++ {
		R0 := Exp([3]float64{g.NormFloat64(), g.NormFloat64(), g.NormFloat64()})
		var M [3][3]float64
		for i := 0; i < 3; i++ {
			for j := 0; j < 3; j++ {
				M[i][j] = 2*R0[i][j] + 0.01*g.NormFloat64()
			}
		}
		R, ok := Nearest(M)
		if !ok {
			t.Fatal("Nearest failed on a full-rank matrix")
		}
		if d := maxAbsDiff(TMul(R, R), Identity()); d > 1e-14 || math.Abs(Det(R)-1) > 1e-14 {
			t.Fatalf("not a rotation: %v", R)
		}
		if Angle(R, R0) > 0.02 {
			t.Fatalf("Nearest moved %.3g rad from the rotation it perturbed", Angle(R, R0))
		}
		// For ‖M − cR‖ with any c, the polar factor maximises tr(RᵀM).
		tr := func(A [3][3]float64) float64 { s := TMul(A, M); return s[0][0] + s[1][1] + s[2][2] }
		if tr(R) < tr(R0)-1e-12 {
			t.Fatalf("tr(RᵀM) = %g < tr(R0ᵀM) = %g", tr(R), tr(R0))
		}
	}
	refl := [3][3]float64{{1, 0, 0}, {0, 1, 0}, {0, 0, -1}}
	if R, ok := Nearest(refl); !ok || math.Abs(Det(R)-1) > 1e-14 {
		t.Errorf("reflection: %v, %v", R, ok)
	}
	if _, ok := Nearest([3][3]float64{{1, 2, 3}, {2, 4, 6}, {3, 6, 9}}); ok {
		t.Error("rank-1 matrix accepted")
	}
}

// Basis completes a unit vector to a right-handed orthonormal frame
// (definition); checked for the axes and random directions.
func TestBasis(t *testing.T) {
	g := rand.New(rand.NewPCG(1, 2))
	dirs := [][3]float64{{1, 0, 0}, {0, 1, 0}, {0, 0, 1}, {0, 0, -1}}
	for n := 0; n < 100; n++ {
		dirs = append(dirs, Normalize([3]float64{g.NormFloat64(), g.NormFloat64(), g.NormFloat64()}))
	}
	for _, a := range dirs {
		e1, e2 := Basis(a)
		c := Cross(e1, e2)
		if math.Abs(Norm(e1)-1) > 1e-15 || math.Abs(Dot(e1, a)) > 1e-15 || Norm(Sub(c, a)) > 1e-15 {
			t.Fatalf("a = %v: e1 = %v, e2 = %v", a, e1, e2)
		}
	}
}
