// Package eval scores a reconstruction against ground truth: rotation
// errors between views and structure error after a similarity alignment.
// It is used by the demo command and by the tests; it knows nothing of
// images or of how the ground truth was made.
package eval

import (
	"fmt"
	"math"
	"sort"

	"gonum.org/v1/gonum/mat"

	"trackfactor/factor/rotation"
)

// RotationAngleDeg is the angle of the rotation A·Bᵀ, degrees: the
// geodesic distance between rotations A and B, θ = acos((tr(ABᵀ) − 1)/2)
// (Rodrigues; Hartley, Trumpf, Dai and Li, "Rotation averaging", IJCV 2013,
// §2), computed by rotation.Angle, accurate near 0 and π.
func RotationAngleDeg(a, b [3][3]float64) float64 {
	return rotation.Angle(a, b) * 180 / math.Pi
}

func sq(x float64) float64 { return x * x }

// mirror returns D·R·D with D = diag(1, 1, −1): the camera of the mirrored
// (depth-reversed) solution of an affine reconstruction.
func mirror(r [3][3]float64) [3][3]float64 {
	d := [3]float64{1, 1, -1}
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			r[i][j] *= d[i] * d[j]
		}
	}
	return r
}

// RotationErrors compares estimated and true world→camera rotations of the
// same views through their relative rotations R_j R_iᵀ over all pairs
// i < j, which do not depend on the choice of world frame. When
// allowMirror is set the mirrored estimate is tried too and the better of
// the two kept (affine models cannot tell them apart).
type RotationErrors struct {
	MedianDeg, MaxDeg, MeanDeg float64
	Pairs                      int
	Mirrored                   bool // the mirrored estimate matched better
}

// CompareRotations scores est against truth (same length, same order).
func CompareRotations(est, truth [][3][3]float64, allowMirror bool) (RotationErrors, error) {
	if len(est) != len(truth) || len(est) < 2 {
		return RotationErrors{}, fmt.Errorf("eval: need the same number (≥ 2) of estimated and true rotations, got %d and %d", len(est), len(truth))
	}
	score := func(e [][3][3]float64) ([]float64, float64) {
		var errs []float64
		sum := 0.0
		for i := range e {
			for j := i + 1; j < len(e); j++ {
				re := rotation.MulT(e[j], e[i])
				rt := rotation.MulT(truth[j], truth[i])
				a := RotationAngleDeg(re, rt)
				errs = append(errs, a)
				sum += a
			}
		}
		return errs, sum
	}
	errs, sum := score(est)
	out := RotationErrors{}
	if allowMirror {
		m := make([][3][3]float64, len(est))
		for i, r := range est {
			m[i] = mirror(r)
		}
		if e2, s2 := score(m); s2 < sum {
			errs, sum, out.Mirrored = e2, s2, true
		}
	}
	sort.Float64s(errs)
	out.Pairs = len(errs)
	out.MedianDeg = median(errs)
	out.MaxDeg = errs[len(errs)-1]
	out.MeanDeg = sum / float64(len(errs))
	return out, nil
}

func median(s []float64) float64 {
	n := len(s)
	if n%2 == 1 {
		return s[n/2]
	}
	return 0.5 * (s[n/2-1] + s[n/2])
}

// Similarity is x ↦ Scale·R·x + T.
type Similarity struct {
	Scale float64
	R     [3][3]float64
	T     [3]float64
}

// Apply maps a point.
func (s Similarity) Apply(x [3]float64) [3]float64 {
	var y [3]float64
	for i := 0; i < 3; i++ {
		y[i] = s.Scale*(s.R[i][0]*x[0]+s.R[i][1]*x[1]+s.R[i][2]*x[2]) + s.T[i]
	}
	return y
}

// AlignSimilarity finds the similarity minimising Σ‖dst_i − (sR·src_i + t)‖²
// by Umeyama's closed form (IEEE PAMI 13(4), 1991, eqs. 34–43). With
// allowReflection the orthogonal factor may be a reflection (det −1),
// which absorbs the mirror ambiguity of affine reconstructions. It returns
// the transform and the RMS distance after alignment.
func AlignSimilarity(src, dst [][3]float64, allowReflection bool) (Similarity, float64, error) {
	n := len(src)
	if n != len(dst) || n < 3 {
		return Similarity{}, 0, fmt.Errorf("eval: need the same number (≥ 3) of source and target points, got %d and %d", n, len(dst))
	}
	var ms, md [3]float64
	for i := range src {
		for k := 0; k < 3; k++ {
			ms[k] += src[i][k] / float64(n)
			md[k] += dst[i][k] / float64(n)
		}
	}
	cov := mat.NewDense(3, 3, nil)
	varS := 0.0
	for i := range src {
		for a := 0; a < 3; a++ {
			da := dst[i][a] - md[a]
			for b := 0; b < 3; b++ {
				cov.Set(a, b, cov.At(a, b)+da*(src[i][b]-ms[b])/float64(n))
			}
			varS += sq(src[i][a]-ms[a]) / float64(n)
		}
	}
	var svd mat.SVD
	if !svd.Factorize(cov, mat.SVDFull) {
		return Similarity{}, 0, fmt.Errorf("eval: SVD of the cross-covariance failed")
	}
	var u, v mat.Dense
	svd.UTo(&u)
	svd.VTo(&v)
	d := svd.Values(nil)
	S := [3]float64{1, 1, 1}
	if !allowReflection && mat.Det(&u)*mat.Det(&v) < 0 {
		S[2] = -1
	}
	var sim Similarity
	for a := 0; a < 3; a++ {
		for b := 0; b < 3; b++ {
			for k := 0; k < 3; k++ {
				sim.R[a][b] += u.At(a, k) * S[k] * v.At(b, k)
			}
		}
	}
	tr := d[0]*S[0] + d[1]*S[1] + d[2]*S[2]
	if varS == 0 {
		return Similarity{}, 0, fmt.Errorf("eval: the source points all coincide")
	}
	sim.Scale = tr / varS
	rm := Similarity{Scale: sim.Scale, R: sim.R}.Apply(ms)
	for k := 0; k < 3; k++ {
		sim.T[k] = md[k] - rm[k]
	}
	ss := 0.0
	for i := range src {
		y := sim.Apply(src[i])
		ss += sq(y[0]-dst[i][0]) + sq(y[1]-dst[i][1]) + sq(y[2]-dst[i][2])
	}
	return sim, math.Sqrt(ss / float64(n)), nil
}
