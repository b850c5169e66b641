package factor

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// paraFrame carries what the paraperspective metric upgrade needs besides
// M̂: the intrinsics and the image of the centroid in every frame (the row
// means t of W).
type paraFrame struct {
	intr Intrinsics
	t    []float64
}

// position returns the normalised image position (x_f, y_f) of the
// centroid in frame f, the "position term" of paraperspective.
func (p *paraFrame) position(f int) (x, y float64) {
	return p.intr.Normalize(p.t[2*f], p.t[2*f+1])
}

// resolveIntrinsics returns Options.Intrinsics or, when nil, the defaults:
// DefaultIntrinsics of Options.ImageWidth × ImageHeight, or, when those are
// zero too, a principal point at the centre of the bounding box of all
// measurements and a focal length of DefaultFocalFactor × its larger side.
// defaulted reports that the defaults were used.
func resolveIntrinsics(m *Measurements, opts Options) (in Intrinsics, defaulted bool) {
	if opts.Intrinsics != nil {
		return *opts.Intrinsics, false
	}
	if opts.ImageWidth > 0 && opts.ImageHeight > 0 {
		return DefaultIntrinsics(float64(opts.ImageWidth), float64(opts.ImageHeight)), true
	}
	xmin, ymin := math.Inf(1), math.Inf(1)
	xmax, ymax := math.Inf(-1), math.Inf(-1)
	nf, np := m.Dims()
	for i := 0; i < nf; i++ {
		xr, yr := m.W.RawRowView(2*i), m.W.RawRowView(2*i+1)
		for j := 0; j < np; j++ {
			if !m.Observed(i, j) {
				continue
			}
			xmin, xmax = math.Min(xmin, xr[j]), math.Max(xmax, xr[j])
			ymin, ymax = math.Min(ymin, yr[j]), math.Max(ymax, yr[j])
		}
	}
	side := math.Max(math.Max(xmax-xmin, ymax-ymin), 1)
	f := DefaultFocalFactor * side
	return Intrinsics{Fx: f, Fy: f, Cx: (xmin + xmax) / 2, Cy: (ymin + ymax) / 2}, true
}

// upgradeScaled is the metric upgrade of the scaled-orthographic (para ==
// nil) and paraperspective models (Poelman and Kanade, "A paraperspective
// factorization method for shape and motion recovery", PAMI 19(3), 1997,
// §3.2–3.3).
//
// Paraperspective projects point s_p in frame f, in normalised coordinates,
// as m_f·s_p + x_f with
//
//	m_f = (i_f − x_f k_f)/z_f,   n_f = (j_f − y_f k_f)/z_f,
//
// (x_f, y_f) the normalised image of the centroid and z_f its depth, so
// |m_f|² = (1+x_f²)/z_f², |n_f|² = (1+y_f²)/z_f², m_f·n_f = x_f y_f/z_f²
// and the rows m̂_f, n̂_f of M̂ (divided by f_x, f_y) satisfy, with L = QQᵀ,
//
//	m̂ᵀLm̂/(1+x²) − n̂ᵀLn̂/(1+y²) = 0,
//	m̂ᵀLn̂ − (x y/2)(m̂ᵀLm̂/(1+x²) + n̂ᵀLn̂/(1+y²)) = 0,
//
// two homogeneous equations per frame in the six entries of L (x = y = 0
// gives the scaled-orthographic constraints |m|² = |n|², m·n = 0). L is the
// right singular vector of the smallest singular value of this 2F×6
// system, with the one scale fix that the mean of 1/z_f² is 1 (the global
// scale is later fixed again by gaugeAffine). Each camera is then
// recovered from its block P_f = [m_f; n_f] = M̂_f Q in closed form:
// with E_f = [1 0 −x_f; 0 1 −y_f], P_f = E_f R_f / z_f, so R_f maximises
// ⟨E_fᵀP_f, R⟩ over rotations (orthogonal Procrustes) and
// 1/z_f = ⟨P_f, E_f R_f⟩/‖E_f R_f‖². For scaled orthography E_f = [I 0].
func upgradeScaled(Mh *mat.Dense, para *paraFrame, d *Diagnostics) ([]affineCam, error) {
	r, _ := Mh.Dims()
	nf := r / 2
	g := symQuad // rows of the metric constraints
	// Normalised rows of M̂ and the positions.
	rows := make([][2][3]float64, nf)
	pos := make([][2]float64, nf)
	for i := 0; i < nf; i++ {
		fx, fy := 1.0, 1.0
		if para != nil {
			fx, fy = para.intr.Fx, para.intr.Fy
			pos[i][0], pos[i][1] = para.position(i)
		}
		for k := 0; k < 3; k++ {
			rows[i][0][k] = Mh.At(2*i, k) / fx
			rows[i][1][k] = Mh.At(2*i+1, k) / fy
		}
	}
	G := mat.NewDense(2*nf, 6, nil)
	// qf holds the coefficients of (m̂ᵀLm̂/(1+x²) + n̂ᵀLn̂/(1+y²))/2 = 1/z².
	qf := make([][6]float64, nf)
	for i := 0; i < nf; i++ {
		a, b := rows[i][0][:], rows[i][1][:]
		x, y := pos[i][0], pos[i][1]
		gaa, gbb, gab := g(a, a), g(b, b), g(a, b)
		var e1, e2 [6]float64
		for k := 0; k < 6; k++ {
			ua, ub := gaa[k]/(1+x*x), gbb[k]/(1+y*y)
			e1[k] = ua - ub
			e2[k] = gab[k] - x*y/2*(ua+ub)
			qf[i][k] = (ua + ub) / 2
		}
		G.SetRow(2*i, e1[:])
		G.SetRow(2*i+1, e2[:])
	}
	var svd mat.SVD
	if !svd.Factorize(G, mat.SVDFull) {
		return nil, fmt.Errorf("factor: %w: SVD of the metric constraints did not converge", ErrMetricUpgrade)
	}
	vals := svd.Values(nil)
	if len(vals) < 6 {
		vals = append(vals, make([]float64, 6-len(vals))...)
	}
	cond := math.Inf(1)
	if vals[4] > 0 {
		cond = vals[0] / vals[4]
	}
	d.MetricCondition = cond
	if cond > 1e12 {
		return nil, fmt.Errorf("factor: %w: the metric constraints do not determine the upgrade (condition %.3g); the views need more rotation", ErrMetricUpgrade, cond)
	}
	var V mat.Dense
	svd.VTo(&V)
	l := mat.Col(nil, 5, &V)
	mean := 0.0
	for i := 0; i < nf; i++ {
		for k := 0; k < 6; k++ {
			mean += qf[i][k] * l[k]
		}
	}
	mean /= float64(nf)
	if mean == 0 || math.IsNaN(mean) {
		return nil, fmt.Errorf("factor: %w: the metric solution gives no scale; check the tracks and the camera model", ErrMetricUpgrade)
	}
	for k := range l {
		l[k] /= mean // also fixes the sign: the mean of 1/z² is +1
	}
	L := mat.NewSymDense(3, []float64{
		l[0], l[1], l[2],
		l[1], l[3], l[4],
		l[2], l[4], l[5],
	})
	Q, fallback, err := sqrtPD(L)
	if err != nil {
		return nil, err
	}
	d.MetricFallback = fallback
	var q [3][3]float64
	for a := 0; a < 3; a++ {
		for b := 0; b < 3; b++ {
			q[a][b] = Q.At(a, b)
		}
	}
	cams := make([]affineCam, nf)
	for i := 0; i < nf; i++ {
		var P [2][3]float64 // normalised block M̂_f Q
		for rr := 0; rr < 2; rr++ {
			for k := 0; k < 3; k++ {
				P[rr][k] = rows[i][rr][0]*q[0][k] + rows[i][rr][1]*q[1][k] + rows[i][rr][2]*q[2][k]
			}
		}
		x, y := pos[i][0], pos[i][1]
		E0 := [2][3]float64{{1, 0, -x}, {0, 1, -y}}
		var A [3][3]float64 // E0ᵀ P
		for a := 0; a < 3; a++ {
			for b := 0; b < 3; b++ {
				A[a][b] = E0[0][a]*P[0][b] + E0[1][a]*P[1][b]
			}
		}
		R, ok := nearestRotation(A)
		if !ok {
			return nil, fmt.Errorf("factor: %w: camera %d has rank < 2 after the upgrade", ErrMetricUpgrade, i)
		}
		cam := affineCam{R: R, E: E0, c: 1}
		ER := cam.er()
		num := dot3(P[0], ER[0]) + dot3(P[1], ER[1])
		den := dot3(ER[0], ER[0]) + dot3(ER[1], ER[1])
		if !(num > 0) {
			return nil, fmt.Errorf("factor: %w: camera %d gets a non-positive scale", ErrMetricUpgrade, i)
		}
		cam.c = num / den
		if para != nil { // pixel units: E = diag(fx, fy)·E0
			for k := 0; k < 3; k++ {
				cam.E[0][k] *= para.intr.Fx
				cam.E[1][k] *= para.intr.Fy
			}
		}
		cams[i] = cam
	}
	return cams, nil
}

// nearestRotation returns the rotation R maximising ⟨R, A⟩ (the orthogonal
// Procrustes problem): with A = UΣVᵀ, R = U diag(1, 1, det(UVᵀ)) Vᵀ
// (Umeyama, PAMI 13(4), 1991). ok is false when rank A < 2.
func nearestRotation(a [3][3]float64) ([3][3]float64, bool) {
	A := mat.NewDense(3, 3, []float64{a[0][0], a[0][1], a[0][2], a[1][0], a[1][1], a[1][2], a[2][0], a[2][1], a[2][2]})
	var svd mat.SVD
	if !svd.Factorize(A, mat.SVDFull) {
		return [3][3]float64{}, false
	}
	s := svd.Values(nil)
	if !(s[1] > 1e-12*s[0]) {
		return [3][3]float64{}, false
	}
	var U, V mat.Dense
	svd.UTo(&U)
	svd.VTo(&V)
	var UV mat.Dense
	UV.Mul(&U, V.T())
	dsign := 1.0
	if mat.Det(&UV) < 0 {
		dsign = -1
	}
	var R [3][3]float64
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			R[i][j] = U.At(i, 0)*V.At(j, 0) + U.At(i, 1)*V.At(j, 1) + dsign*U.At(i, 2)*V.At(j, 2)
		}
	}
	return R, true
}
