package bundle

import (
	"math"

	"trackfactor/factor"
	"trackfactor/factor/rotation"
)

// Largest parameter blocks: shared ≤ 8 (camera rotation 3 + translation 3
// + focal + k1 of the single-axis model), per camera ≤ 6.
const (
	maxShared = 8
	maxCam    = 6
)

// jacobian holds the derivatives of one projected pixel (u, v), row-major
// with row 0 = u: g (2×ng) by the shared parameters, c (2×nc) by the
// camera's, x (2×3) by the point.
type jacobian struct {
	g [2 * maxShared]float64
	c [2 * maxCam]float64
	x [6]float64
}

// model is a camera parametrisation. Parameters are addressed in the
// reduced order: the ng shared ones first, then nc per camera, camera f's
// at ng + f·nc.
type model interface {
	ng() int
	nc() int
	cams() int
	// project returns camera f's pixel of X and, when jac is not nil, its
	// Jacobians. ok is false when the pixel is undefined (a point at or
	// behind a perspective camera).
	project(f int, X *[3]float64, jac *jacobian) (u, v float64, ok bool)
	// held reports whether reduced parameter i is held by the gauge.
	held(i int) bool
	// update returns a copy with the step d (reduced order) applied.
	update(d []float64) model
	// xNormSq is the squared norm of the non-rotation parameters.
	xNormSq() float64
	// refDir is the unit direction along which the reference point, now
	// at X, is held.
	refDir(X [3]float64) [3]float64
	// renormalize restores the exact gauge after a step (a similarity of
	// the world that leaves every pixel unchanged); ref is the reference
	// point's index in X.
	renormalize(X [][3]float64, ref int)
	// write stores the cameras into cams (same order) and the intrinsics.
	write(cams []factor.Camera, in **factor.Intrinsics)
	// name of the motion ("free" or "single-axis") and the gauge text.
	motion() string
}

// ---------------------------------------------------------------------
// Affine cameras with free motion.
//
// x = s·R[0]·X + t₀,  y = s·R[1]·X + t₁ (factor's affine models). The
// rotation is updated on the right, R ← R·exp([δ]×), δ in world axes, so
// ∂(R·X)/∂δ = −R·[X]× and, row by row, ∂(Rᵢ·X)/∂δ = X × Rᵢ.

type affineModel struct {
	scaled  bool
	R       [][3][3]float64
	T       [][2]float64
	S       []float64
	gauge   int
	heldCam []bool
}

func (m *affineModel) ng() int { return 0 }
func (m *affineModel) nc() int {
	if m.scaled {
		return 6
	}
	return 5
}
func (m *affineModel) cams() int      { return len(m.R) }
func (m *affineModel) motion() string { return "free" }

func (m *affineModel) project(f int, X *[3]float64, jac *jacobian) (float64, float64, bool) {
	R := &m.R[f]
	s := m.S[f]
	p0 := R[0][0]*X[0] + R[0][1]*X[1] + R[0][2]*X[2]
	p1 := R[1][0]*X[0] + R[1][1]*X[1] + R[1][2]*X[2]
	if jac != nil {
		nc := m.nc()
		c0, c1 := jac.c[:nc], jac.c[nc:2*nc]
		a := rotation.Cross(*X, R[0])
		b := rotation.Cross(*X, R[1])
		c0[0], c0[1], c0[2], c0[3], c0[4] = s*a[0], s*a[1], s*a[2], 1, 0
		c1[0], c1[1], c1[2], c1[3], c1[4] = s*b[0], s*b[1], s*b[2], 0, 1
		if m.scaled {
			c0[5], c1[5] = p0, p1
		}
		jac.x = [6]float64{s * R[0][0], s * R[0][1], s * R[0][2], s * R[1][0], s * R[1][1], s * R[1][2]}
	}
	return s*p0 + m.T[f][0], s*p1 + m.T[f][1], true
}

func (m *affineModel) held(i int) bool {
	f := i / m.nc()
	return f == m.gauge || m.heldCam[f]
}

func (m *affineModel) update(d []float64) model {
	nc := m.nc()
	n := &affineModel{scaled: m.scaled, gauge: m.gauge, heldCam: m.heldCam,
		R: make([][3][3]float64, len(m.R)), T: make([][2]float64, len(m.T)), S: make([]float64, len(m.S))}
	for f := range m.R {
		q := d[f*nc : (f+1)*nc]
		n.R[f] = rotation.Mul(m.R[f], rotation.Exp([3]float64{q[0], q[1], q[2]}))
		n.T[f] = [2]float64{m.T[f][0] + q[3], m.T[f][1] + q[4]}
		n.S[f] = m.S[f]
		if m.scaled {
			n.S[f] += q[5]
		}
	}
	return n
}

func (m *affineModel) xNormSq() float64 {
	s := 0.0
	for f := range m.T {
		s += m.T[f][0]*m.T[f][0] + m.T[f][1]*m.T[f][1]
		if m.scaled {
			s += m.S[f] * m.S[f]
		}
	}
	return s
}

// The depth along the gauge camera's viewing direction is free (a
// translation of the world along it changes only the other cameras'
// translations), so the reference point is held along R_g[2].
func (m *affineModel) refDir([3]float64) [3]float64 { return m.R[m.gauge][2] }

func (m *affineModel) renormalize([][3]float64, int) {}

func (m *affineModel) write(cams []factor.Camera, _ **factor.Intrinsics) {
	for f := range cams {
		cams[f].R = m.R[f]
		cams[f].T = [3]float64{m.T[f][0], m.T[f][1], 0}
		cams[f].Scale = m.S[f]
	}
}

// ---------------------------------------------------------------------
// Perspective projection with the Brown–Conrady distortion of
// factor.Intrinsics, shared by the free and the single-axis models.

type lens struct {
	in             factor.Intrinsics
	ratio          float64 // Fy/Fx, kept when the focal length is refined
	refineF, refK1 bool
}

func (l *lens) nShared() int {
	n := 0
	if l.refineF {
		n++
	}
	if l.refK1 {
		n++
	}
	return n
}

// pixel projects camera coordinates Xc. With a non-nil A it returns the
// 2×3 Jacobian ∂(u, v)/∂Xc in A and, in gl, the derivatives by the
// refined lens parameters (focal first, then k1):
//
//	x = Xc₀/Xc₂, y = Xc₁/Xc₂;  (x_d, y_d) = distort(x, y);
//	u = fx·x_d + cx, v = fy·y_d + cy;
//	∂(u,v)/∂Xc = diag(fx, fy)·J_d·(1/Xc₂)·[1 0 −x; 0 1 −y],
//
// J_d the Jacobian of the distortion (the derivative of the
// factor.Intrinsics model in normalised coordinates), ∂u/∂fx = x_d,
// ∂v/∂fx = (fy/fx)·y_d, ∂(u,v)/∂k1 = (fx·x·r², fy·y·r²).
func (l *lens) pixel(Xc [3]float64, A *[6]float64, gl *[2][2]float64) (u, v float64, ok bool) {
	z := Xc[2]
	if !(z > 0) {
		return math.NaN(), math.NaN(), false
	}
	in := &l.in
	x, y := Xc[0]/z, Xc[1]/z
	r2 := x*x + y*y
	rad := 1 + r2*(in.K1+r2*(in.K2+r2*in.K3))
	xd := x*rad + 2*in.P1*x*y + in.P2*(r2+2*x*x)
	yd := y*rad + in.P1*(r2+2*y*y) + 2*in.P2*x*y
	u, v = in.Fx*xd+in.Cx, in.Fy*yd+in.Cy
	if A != nil {
		drad := in.K1 + r2*(2*in.K2+3*r2*in.K3) // dρ/d(r²)
		j00 := rad + 2*x*x*drad + 2*in.P1*y + 6*in.P2*x
		j01 := 2*x*y*drad + 2*in.P1*x + 2*in.P2*y
		j10 := j01
		j11 := rad + 2*y*y*drad + 6*in.P1*y + 2*in.P2*x
		a00, a01 := in.Fx*j00/z, in.Fx*j01/z
		a10, a11 := in.Fy*j10/z, in.Fy*j11/z
		A[0], A[1], A[2] = a00, a01, -(a00*x + a01*y)
		A[3], A[4], A[5] = a10, a11, -(a10*x + a11*y)
		k := 0
		if l.refineF {
			gl[0][k], gl[1][k] = xd, l.ratio*yd
			k++
		}
		if l.refK1 {
			gl[0][k], gl[1][k] = in.Fx*x*r2, in.Fy*y*r2
		}
	}
	return u, v, true
}

func (l *lens) step(d []float64) lens {
	n := *l
	k := 0
	if l.refineF {
		n.in.Fx += d[k]
		n.in.Fy = n.in.Fx * l.ratio
		k++
	}
	if l.refK1 {
		n.in.K1 += d[k]
	}
	return n
}

func (l *lens) normSq() float64 {
	s := 0.0
	if l.refineF {
		s += l.in.Fx * l.in.Fx
	}
	if l.refK1 {
		s += l.in.K1 * l.in.K1
	}
	return s
}

// mulA3 returns the 2×3 product A·R.
func mulA3(A *[6]float64, R *[3][3]float64) (B [6]float64) {
	for i := 0; i < 2; i++ {
		for j := 0; j < 3; j++ {
			B[3*i+j] = A[3*i]*R[0][j] + A[3*i+1]*R[1][j] + A[3*i+2]*R[2][j]
		}
	}
	return B
}

// ---------------------------------------------------------------------
// Perspective cameras with free motion: X_c = R·X + T, R ← R·exp([δ]×).
// ∂pix/∂X = A·R, ∂pix/∂T = A, ∂pix/∂δ row i = X × (A·R)ᵢ.

type perspModel struct {
	lens
	R       [][3][3]float64
	T       [][3]float64
	gauge   int
	heldCam []bool
	// refDist is the distance of the reference point from the gauge
	// camera's centre, restored after every step (the scale gauge).
	refDist float64
}

func (m *perspModel) ng() int        { return m.nShared() }
func (m *perspModel) nc() int        { return 6 }
func (m *perspModel) cams() int      { return len(m.R) }
func (m *perspModel) motion() string { return "free" }

func (m *perspModel) project(f int, X *[3]float64, jac *jacobian) (float64, float64, bool) {
	R := &m.R[f]
	Xc := rotation.Add(rotation.Apply(*R, *X), m.T[f])
	if jac == nil {
		return m.pixel(Xc, nil, nil)
	}
	var A [6]float64
	var gl [2][2]float64
	u, v, ok := m.pixel(Xc, &A, &gl)
	if !ok {
		return u, v, false
	}
	B := mulA3(&A, R)
	jac.x = B
	c := jac.c[:12]
	for i := 0; i < 2; i++ {
		row := [3]float64{B[3*i], B[3*i+1], B[3*i+2]}
		d := rotation.Cross(*X, row)
		c[6*i], c[6*i+1], c[6*i+2] = d[0], d[1], d[2]
		c[6*i+3], c[6*i+4], c[6*i+5] = A[3*i], A[3*i+1], A[3*i+2]
	}
	ng := m.ng()
	for i := 0; i < 2; i++ {
		for k := 0; k < ng; k++ {
			jac.g[i*ng+k] = gl[i][k]
		}
	}
	return u, v, true
}

func (m *perspModel) held(i int) bool {
	ng := m.ng()
	if i < ng {
		return false
	}
	f := (i - ng) / 6
	return f == m.gauge || m.heldCam[f]
}

func (m *perspModel) update(d []float64) model {
	ng := m.ng()
	n := &perspModel{lens: m.step(d[:ng]), gauge: m.gauge, heldCam: m.heldCam, refDist: m.refDist,
		R: make([][3][3]float64, len(m.R)), T: make([][3]float64, len(m.T))}
	for f := range m.R {
		q := d[ng+6*f : ng+6*f+6]
		n.R[f] = rotation.Mul(m.R[f], rotation.Exp([3]float64{q[0], q[1], q[2]}))
		n.T[f] = [3]float64{m.T[f][0] + q[3], m.T[f][1] + q[4], m.T[f][2] + q[5]}
	}
	return n
}

func (m *perspModel) xNormSq() float64 {
	s := m.normSq()
	for f := range m.T {
		s += rotation.Dot(m.T[f], m.T[f])
	}
	return s
}

func (m *perspModel) centre(f int) [3]float64 {
	return rotation.Scale(-1, rotation.ApplyT(m.R[f], m.T[f]))
}

// A scaling of the world about the gauge camera's centre C leaves that
// camera and every pixel unchanged, so the reference point is held along
// its line of sight from C (to first order in the step; renormalize
// restores its distance exactly).
func (m *perspModel) refDir(X [3]float64) [3]float64 {
	return rotation.Normalize(rotation.Sub(X, m.centre(m.gauge)))
}

// renormalize scales the world about C by k = refDist/|X_ref − C|:
// X' = C + k(X − C), T_f' = k·T_f + (k − 1)·R_f·C (then R_f X' + T_f' =
// k·(R_f X + T_f), the same pixel), which leaves the gauge camera as it
// is.
func (m *perspModel) renormalize(X [][3]float64, ref int) {
	C := m.centre(m.gauge)
	d := rotation.Norm(rotation.Sub(X[ref], C))
	if !(d > 0) || m.refDist == 0 {
		return
	}
	k := m.refDist / d
	if k == 1 {
		return
	}
	for i := range X {
		X[i] = rotation.Add(C, rotation.Scale(k, rotation.Sub(X[i], C)))
	}
	for f := range m.T {
		if f == m.gauge {
			continue
		}
		RC := rotation.Apply(m.R[f], C)
		m.T[f] = rotation.Add(rotation.Scale(k, m.T[f]), rotation.Scale(k-1, RC))
	}
}

func (m *perspModel) write(cams []factor.Camera, in **factor.Intrinsics) {
	for f := range cams {
		cams[f].R = m.R[f]
		cams[f].T = m.T[f]
		cams[f].Scale = m.in.Fx / m.T[f][2]
	}
	li := m.in
	*in = &li
}

// ---------------------------------------------------------------------
// Single-axis motion: R_f = R_c·Rz(θ_f), T_f = T_c, in a world whose z
// axis is the turntable axis and whose origin lies on it. Shared
// parameters: δ_c (R_c ← R_c·exp([δ_c]×)), T_c (2 for affine, 3 for
// perspective), then the lens's; per camera: θ_f. With Y = Rz(θ_f)·X,
// ∂(R_f X)/∂δ_c = −R_c·[Y]× and ∂(R_f X)/∂θ_f = R_f·(e_z × X).

type axisModel struct {
	persp   bool
	lens            // perspective only
	s       float64 // affine scale (held)
	Rc      [3][3]float64
	Tc      [3]float64
	theta   []float64
	Rf      [][3][3]float64 // R_c·Rz(θ_f), cached
	gauge   int
	heldCam []bool
}

func newAxisModel(persp bool, l lens, s float64, Rc [3][3]float64, Tc [3]float64, theta []float64, gauge int, heldCam []bool) *axisModel {
	m := &axisModel{persp: persp, lens: l, s: s, Rc: Rc, Tc: Tc, theta: theta, gauge: gauge, heldCam: heldCam}
	m.Rf = make([][3][3]float64, len(theta))
	for f, t := range theta {
		m.Rf[f] = rotation.Mul(Rc, rotation.RotZ(t))
	}
	return m
}

func (m *axisModel) nT() int {
	if m.persp {
		return 3
	}
	return 2
}
func (m *axisModel) ng() int {
	if m.persp {
		return 6 + m.nShared()
	}
	return 5
}
func (m *axisModel) nc() int        { return 1 }
func (m *axisModel) cams() int      { return len(m.theta) }
func (m *axisModel) motion() string { return "single-axis" }

func (m *axisModel) project(f int, X *[3]float64, jac *jacobian) (float64, float64, bool) {
	R := &m.Rf[f]
	var A [6]float64
	var gl [2][2]float64
	var u, v float64
	if m.persp {
		Xc := rotation.Add(rotation.Apply(*R, *X), m.Tc)
		if jac == nil {
			return m.pixel(Xc, nil, nil)
		}
		var ok bool
		u, v, ok = m.pixel(Xc, &A, &gl)
		if !ok {
			return u, v, false
		}
	} else {
		u = m.s*rotation.Dot(R[0], *X) + m.Tc[0]
		v = m.s*rotation.Dot(R[1], *X) + m.Tc[1]
		if jac == nil {
			return u, v, true
		}
		A = [6]float64{m.s, 0, 0, 0, m.s, 0}
	}
	ng := m.ng()
	B := mulA3(&A, R)      // ∂pix/∂X
	Bc := mulA3(&A, &m.Rc) // for δ_c
	Y := rotation.Apply(rotation.RotZ(m.theta[f]), *X)
	zx := [3]float64{-X[1], X[0], 0} // e_z × X
	for i := 0; i < 2; i++ {
		row := [3]float64{Bc[3*i], Bc[3*i+1], Bc[3*i+2]}
		d := rotation.Cross(Y, row)
		g := jac.g[i*ng : (i+1)*ng]
		g[0], g[1], g[2] = d[0], d[1], d[2]
		if m.persp {
			g[3], g[4], g[5] = A[3*i], A[3*i+1], A[3*i+2]
			for k := 0; k < m.nShared(); k++ {
				g[6+k] = gl[i][k]
			}
		} else {
			g[3], g[4] = 0, 0
			g[3+i] = 1
		}
		jac.c[i] = B[3*i]*zx[0] + B[3*i+1]*zx[1] + B[3*i+2]*zx[2]
	}
	jac.x = B
	return u, v, true
}

// Held: the rotation of R_c about the axis, δ_c[2] (R_c·Rz(φ)·Rz(θ_f −
// φ) is the same camera, so R_c's azimuth and an offset of all angles
// are one freedom), θ of the gauge camera (a rotation of the world about
// the axis, the points turning with it), θ of cameras without enough
// observations and, for perspective, T_c's third component (the scale of
// the world).
func (m *axisModel) held(i int) bool {
	ng := m.ng()
	if i < ng {
		return i == 2 || m.persp && i == 5
	}
	f := i - ng
	return f == m.gauge || m.heldCam[f]
}

func (m *axisModel) update(d []float64) model {
	ng := m.ng()
	Rc := rotation.Mul(m.Rc, rotation.Exp([3]float64{d[0], d[1], d[2]}))
	Tc := m.Tc
	for k := 0; k < m.nT(); k++ {
		Tc[k] += d[3+k]
	}
	l := m.lens
	if m.persp {
		l = m.step(d[6:ng])
	}
	theta := make([]float64, len(m.theta))
	for f := range theta {
		theta[f] = m.theta[f] + d[ng+f]
	}
	return newAxisModel(m.persp, l, m.s, Rc, Tc, theta, m.gauge, m.heldCam)
}

func (m *axisModel) xNormSq() float64 {
	s := rotation.Dot(m.Tc, m.Tc)
	for _, t := range m.theta {
		s += t * t
	}
	if m.persp {
		s += m.normSq()
	}
	return s
}

// A translation along the axis is free (it changes T_c only), so the
// reference point is held along e_z.
func (m *axisModel) refDir([3]float64) [3]float64 { return [3]float64{0, 0, 1} }

func (m *axisModel) renormalize([][3]float64, int) {}

func (m *axisModel) write(cams []factor.Camera, in **factor.Intrinsics) {
	for f := range cams {
		cams[f].R = m.Rf[f]
		if m.persp {
			cams[f].T = m.Tc
			cams[f].Scale = m.in.Fx / m.Tc[2]
		} else {
			cams[f].T = [3]float64{m.Tc[0], m.Tc[1], 0}
			cams[f].Scale = m.s
		}
	}
	if m.persp {
		li := m.in
		*in = &li
	}
}
