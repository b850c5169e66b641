// Package rotation holds the rotation maths shared by the refinement
// packages: the exponential and logarithm maps of SO(3) (Rodrigues'
// formula), axis–angle conversions, the nearest rotation to a matrix and a
// few 3-vector helpers. Matrices are [3][3]float64 in row-major order and
// act on column vectors (v' = R·v).
//
// # Conventions
//
// A rotation vector w (the "rvec" of the OpenCV library) has the rotation
// axis w/|w| and the angle θ = |w| radians, right-handed. Exp and Log are
// inverse to each other for θ ∈ [0, π); at θ = π both w and −w give the
// same matrix and Log returns the one whose first non-zero component is
// positive.
//
// # Accuracy
//
// Exp switches to the Taylor series of its coefficients below θ = 1e-4,
// where the closed forms lose digits; Log takes the angle from atan2 of
// the skew and symmetric parts (never acos alone, which loses half the
// digits near 0 and π) and, near π, the axis from the symmetric part.
// Both are accurate to a few units of the last place over the whole range
// (checked against the OpenCV library's Rodrigues in the tests).
package rotation

import "math"

// Identity returns the identity rotation.
func Identity() [3][3]float64 { return [3][3]float64{{1, 0, 0}, {0, 1, 0}, {0, 0, 1}} }

// Exp returns the rotation matrix of the rotation vector w by Rodrigues'
// formula (Murray, Li and Sastry, "A Mathematical Introduction to Robotic
// Manipulation", 1994, §2.2, eq. 2.14):
//
//	R = I + (sin θ/θ)·[w]× + ((1 − cos θ)/θ²)·[w]×²,   θ = |w|,
//
// with [w]× the cross-product matrix (Skew). Below θ = 1e-4 the two
// coefficients are their Taylor series 1 − θ²/6 + θ⁴/120 and
// 1/2 − θ²/24 + θ⁴/720 (truncation below 1e-20).
func Exp(w [3]float64) [3][3]float64 {
	t2 := w[0]*w[0] + w[1]*w[1] + w[2]*w[2]
	var a, b float64
	if t2 < 1e-8 {
		a = 1 - t2/6*(1-t2/20)
		b = 0.5 - t2/24*(1-t2/30)
	} else {
		t := math.Sqrt(t2)
		s, c := math.Sincos(t)
		a = s / t
		b = (1 - c) / t2
	}
	x, y, z := w[0], w[1], w[2]
	return [3][3]float64{
		{1 - b*(y*y+z*z), -a*z + b*x*y, a*y + b*x*z},
		{a*z + b*x*y, 1 - b*(x*x+z*z), -a*x + b*y*z},
		{-a*y + b*x*z, a*x + b*y*z, 1 - b*(x*x+y*y)},
	}
}

// Log returns the rotation vector of the rotation matrix R, the inverse of
// Exp, with angle in [0, π]. R must be a rotation (use Nearest first for a
// matrix that is only close to one). The angle is
//
//	θ = atan2(|v|, (tr R − 1)/2),   v = ½·(R₃₂ − R₂₃, R₁₃ − R₃₁, R₂₁ − R₁₂),
//
// since |v| = sin θ and (tr R − 1)/2 = cos θ (Murray, Li and Sastry 1994,
// §2.2, eqs. 2.17–2.18). Then w = θ·v/|v|, except near π (cos θ < −0.9),
// where v is small and poorly determined: there the axis comes from the
// symmetric part, (R + Rᵀ)/2 − cos θ·I = (1 − cos θ)·a·aᵀ, from its column
// of largest diagonal, with the sign of a taken from v (Hartley, Trumpf,
// Dai and Li, "Rotation averaging", IJCV 103, 2013, §2).
func Log(R [3][3]float64) [3]float64 {
	v := [3]float64{
		(R[2][1] - R[1][2]) / 2,
		(R[0][2] - R[2][0]) / 2,
		(R[1][0] - R[0][1]) / 2,
	}
	s := Norm(v)
	c := (R[0][0] + R[1][1] + R[2][2] - 1) / 2
	theta := math.Atan2(s, c)
	if c > -0.9 {
		// θ/sin θ, with its series below θ = 1e-4 (s ≈ θ).
		var k float64
		if s < 1e-4 {
			k = 1 + s*s/6
		} else {
			k = theta / s
		}
		return [3]float64{k * v[0], k * v[1], k * v[2]}
	}
	// Near π: a·aᵀ = (S − cI)/(1 − c), S the symmetric part.
	oc := 1 - c
	var best int
	for i := 1; i < 3; i++ {
		if R[i][i] > R[best][best] {
			best = i
		}
	}
	var a [3]float64
	for j := 0; j < 3; j++ {
		sym := (R[best][j] + R[j][best]) / 2
		if j == best {
			sym -= c
		}
		a[j] = sym / oc
	}
	a = Normalize(a)
	// Sign from the skew part (a·v = sin θ ≥ 0); at exactly π (v = 0) the
	// first non-zero component is made positive.
	d := Dot(a, v)
	if d < 0 || (d == 0 && firstNonZeroNegative(a)) {
		a = [3]float64{-a[0], -a[1], -a[2]}
	}
	return [3]float64{theta * a[0], theta * a[1], theta * a[2]}
}

func firstNonZeroNegative(a [3]float64) bool {
	for _, x := range a {
		if x != 0 {
			return x < 0
		}
	}
	return false
}

// FromAxisAngle returns the rotation by angle (radians, right-handed)
// about axis, which need not be a unit vector (a zero axis gives the
// identity).
func FromAxisAngle(axis [3]float64, angle float64) [3][3]float64 {
	n := Norm(axis)
	if n == 0 {
		return Identity()
	}
	k := angle / n
	return Exp([3]float64{axis[0] * k, axis[1] * k, axis[2] * k})
}

// AxisAngle returns the unit axis and the angle in [0, π] of R; for the
// identity the axis is (0, 0, 1) and the angle 0.
func AxisAngle(R [3][3]float64) (axis [3]float64, angle float64) {
	w := Log(R)
	angle = Norm(w)
	if angle == 0 {
		return [3]float64{0, 0, 1}, 0
	}
	return [3]float64{w[0] / angle, w[1] / angle, w[2] / angle}, angle
}

// RotZ returns the rotation by angle (radians) about the z axis.
func RotZ(angle float64) [3][3]float64 {
	s, c := math.Sincos(angle)
	return [3][3]float64{{c, -s, 0}, {s, c, 0}, {0, 0, 1}}
}

// Angle returns the geodesic distance between rotations a and b, the
// angle of a·bᵀ in [0, π] radians (Hartley et al. 2013, §2).
func Angle(a, b [3][3]float64) float64 {
	return Norm(Log(MulT(a, b)))
}

// Nearest returns the rotation closest to M in the Frobenius norm, the
// orthogonal polar factor with its determinant forced to +1: with the SVD
// M = U Σ Vᵀ, R = U·diag(1, 1, det(U Vᵀ))·Vᵀ (the orthogonal Procrustes
// solution; Umeyama, IEEE PAMI 13(4), 1991, eq. 39). ok is false when M
// has rank below 2 (no unique answer); the identity is returned then.
func Nearest(M [3][3]float64) (R [3][3]float64, ok bool) {
	return nearest(M)
}

// Skew returns the cross-product matrix [v]×, with [v]×·u = v × u.
func Skew(v [3]float64) [3][3]float64 {
	return [3][3]float64{{0, -v[2], v[1]}, {v[2], 0, -v[0]}, {-v[1], v[0], 0}}
}

// Mul returns a·b.
func Mul(a, b [3][3]float64) [3][3]float64 {
	var c [3][3]float64
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			c[i][j] = a[i][0]*b[0][j] + a[i][1]*b[1][j] + a[i][2]*b[2][j]
		}
	}
	return c
}

// MulT returns a·bᵀ.
func MulT(a, b [3][3]float64) [3][3]float64 {
	var c [3][3]float64
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			c[i][j] = a[i][0]*b[j][0] + a[i][1]*b[j][1] + a[i][2]*b[j][2]
		}
	}
	return c
}

// TMul returns aᵀ·b.
func TMul(a, b [3][3]float64) [3][3]float64 {
	var c [3][3]float64
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			c[i][j] = a[0][i]*b[0][j] + a[1][i]*b[1][j] + a[2][i]*b[2][j]
		}
	}
	return c
}

// Transpose returns aᵀ.
func Transpose(a [3][3]float64) [3][3]float64 {
	return [3][3]float64{
		{a[0][0], a[1][0], a[2][0]},
		{a[0][1], a[1][1], a[2][1]},
		{a[0][2], a[1][2], a[2][2]},
	}
}

// Apply returns R·v.
func Apply(R [3][3]float64, v [3]float64) [3]float64 {
	return [3]float64{Dot(R[0], v), Dot(R[1], v), Dot(R[2], v)}
}

// ApplyT returns Rᵀ·v.
func ApplyT(R [3][3]float64, v [3]float64) [3]float64 {
	return [3]float64{
		R[0][0]*v[0] + R[1][0]*v[1] + R[2][0]*v[2],
		R[0][1]*v[0] + R[1][1]*v[1] + R[2][1]*v[2],
		R[0][2]*v[0] + R[1][2]*v[1] + R[2][2]*v[2],
	}
}

// Det returns the determinant of a.
func Det(a [3][3]float64) float64 { return Dot(a[0], Cross(a[1], a[2])) }

// Dot returns a·b.
func Dot(a, b [3]float64) float64 { return a[0]*b[0] + a[1]*b[1] + a[2]*b[2] }

// Cross returns a × b.
func Cross(a, b [3]float64) [3]float64 {
	return [3]float64{a[1]*b[2] - a[2]*b[1], a[2]*b[0] - a[0]*b[2], a[0]*b[1] - a[1]*b[0]}
}

// Norm returns |a|.
func Norm(a [3]float64) float64 { return math.Sqrt(Dot(a, a)) }

// Normalize returns a/|a| (a zero vector is returned as it is).
func Normalize(a [3]float64) [3]float64 {
	n := Norm(a)
	if n == 0 {
		return a
	}
	return [3]float64{a[0] / n, a[1] / n, a[2] / n}
}

// Sub returns a − b.
func Sub(a, b [3]float64) [3]float64 { return [3]float64{a[0] - b[0], a[1] - b[1], a[2] - b[2]} }

// Add returns a + b.
func Add(a, b [3]float64) [3]float64 { return [3]float64{a[0] + b[0], a[1] + b[1], a[2] + b[2]} }

// Scale returns k·a.
func Scale(k float64, a [3]float64) [3]float64 { return [3]float64{k * a[0], k * a[1], k * a[2]} }

// AngleBetween returns the angle between the vectors a and b in [0, π]
// radians, from atan2(|a × b|, a·b) (accurate at 0 and π).
func AngleBetween(a, b [3]float64) float64 {
	return math.Atan2(Norm(Cross(a, b)), Dot(a, b))
}

// Basis returns two unit vectors e1, e2 that complete the unit vector a to
// a right-handed orthonormal basis (e1 × e2 = a).
func Basis(a [3]float64) (e1, e2 [3]float64) {
	a = Normalize(a)
	// The coordinate axis least aligned with a.
	i := 0
	for j := 1; j < 3; j++ {
		if math.Abs(a[j]) < math.Abs(a[i]) {
			i = j
		}
	}
	var ref [3]float64
	ref[i] = 1
	e1 = Normalize(Cross(ref, a))
	e2 = Cross(a, e1)
	return e1, e2
}
