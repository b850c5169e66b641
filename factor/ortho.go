package factor

import (
	"context"
	"errors"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// Errors returned when no reconstruction is possible. Match with errors.Is.
var (
	ErrTooFew         = errors.New("too few frames or points")
	ErrLittleRotation = errors.New("too little rotation")
	ErrIncomplete     = errors.New("measurement matrix has missing entries")
	ErrMetricUpgrade  = errors.New("metric upgrade failed")
)

// Factorize recovers cameras and structure from complete measurements with
// the model in opts (see the package documentation for the equations).
func Factorize(ctx context.Context, m *Measurements, opts Options) (*Reconstruction, error) {
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	opts = opts.withDefaults()
	checkShape(m)
	m, undistorted, err := undistortMeasurements(m, opts.Intrinsics)
	if err != nil {
		return nil, err
	}
	var rec *Reconstruction
	switch opts.Model {
	case Orthographic, ScaledOrthographic, Paraperspective:
		rec, err = factorAffine(ctx, m, opts, opts.Model)
	case Perspective:
		rec, err = factorPerspective(ctx, m, opts)
	case Auto:
		rec, err = factorAuto(ctx, m, opts)
	}
	if err != nil {
		return nil, err
	}
	rec.Diagnostics.Undistorted = undistorted
	return rec, nil
}

// undistortMeasurements returns m with every observed point undistorted by
// in (a copy; m itself is not changed), or m itself when in is nil or has
// no distortion.
func undistortMeasurements(m *Measurements, in *Intrinsics) (*Measurements, bool, error) {
	if in == nil || !in.HasDistortion() {
		return m, false, nil
	}
	nf, np := m.Dims()
	out := *m
	out.W = mat.DenseCopyOf(m.W)
	for i := 0; i < nf; i++ {
		xr, yr := out.W.RawRowView(2*i), out.W.RawRowView(2*i+1)
		for j := 0; j < np; j++ {
			if !m.Observed(i, j) {
				continue
			}
			u, v, ok := in.Undistort(xr[j], yr[j])
			if !ok {
				return nil, false, fmt.Errorf("factor: point %d in frame %d at (%.1f, %.1f) px cannot be undistorted (it lies where the distortion model folds over); check that the intrinsics belong to this camera and image size", j, i, xr[j], yr[j])
			}
			xr[j], yr[j] = u, v
		}
	}
	return &out, true, nil
}

func checkShape(m *Measurements) {
	if m == nil || m.W == nil {
		panic("factor: nil measurements")
	}
	r, c := m.W.Dims()
	if r%2 != 0 {
		panic(fmt.Sprintf("factor: W has %d rows, want 2 per frame", r))
	}
	f := r / 2
	if m.Mask != nil && len(m.Mask) != f*c {
		panic(fmt.Sprintf("factor: mask has %d entries, want F×P = %d", len(m.Mask), f*c))
	}
	if m.Frames != nil && len(m.Frames) != f {
		panic(fmt.Sprintf("factor: %d frame indices for %d frames", len(m.Frames), f))
	}
	if m.Tracks != nil && len(m.Tracks) != c {
		panic(fmt.Sprintf("factor: %d track ids for %d points", len(m.Tracks), c))
	}
}

// MinFrames and MinPoints are the smallest inputs the affine models accept:
// three views are needed for a unique metric upgrade of an affine camera
// (Tomasi–Kanade 1992, §3.3: 3F equations for 6 unknowns of L, and two views
// leave a one-parameter family of solutions), and four points in general
// position span the three dimensions of the centred structure.
const (
	MinFrames = 3
	MinPoints = 4
)

// centre subtracts the row means of W, returning W̃ and the means t.
func centre(w *mat.Dense) (*mat.Dense, []float64) {
	r, c := w.Dims()
	wc := mat.NewDense(r, c, nil)
	t := make([]float64, r)
	for i := 0; i < r; i++ {
		row := w.RawRowView(i)
		s := 0.0
		for _, v := range row {
			s += v
		}
		mu := s / float64(c)
		t[i] = mu
		dst := wc.RawRowView(i)
		for j, v := range row {
			dst[j] = v - mu
		}
	}
	return wc, t
}

// rank3 is the truncated factorization W̃ ≈ M̂ Ŝ and the spectrum.
type rank3 struct {
	M, S   *mat.Dense // 2F×k, k×P (k = 3 unless made by factorRankK)
	Values []float64  // singular values, largest first (all of them for the full SVD, the leading Ritz values for the truncated one)
	Resid2 float64    // Σ_{i>k} σ_i² = ‖W̃ − M̂Ŝ‖²_F
}

// factorRank3 computes the rank-3 factorization W̃ ≈ M̂ Ŝ. For
// min(2F, P) > truncatedSVDMinDim it uses the truncated randomized SVD
// (randomizedSVD), which then returns only the leading Ritz values in
// Values; below that the full thin SVD of gonum.
func factorRank3(wc *mat.Dense) (rank3, error) {
	return factorRankK(wc, 3, false)
}

// factorRankK is factorRank3 for rank k (k = 4 for the projective
// factorization); truncated forces the randomized SVD at any size.
func factorRankK(wc *mat.Dense, k int, truncated bool) (rank3, error) {
	r, c := wc.Dims()
	var (
		vals []float64
		u, v *mat.Dense
		res  float64
	)
	if truncated || min(r, c) > truncatedSVDMinDim {
		ps, err := randomizedSVD(wc, k, rsvdConfig{})
		if err != nil {
			return rank3{}, err
		}
		vals, u, v, res = ps.Values, ps.U, ps.V, ps.Resid2
	} else {
		var svd mat.SVD
		if !svd.Factorize(wc, mat.SVDThin) {
			return rank3{}, errors.New("factor: SVD of the measurement matrix did not converge; check the input for huge or degenerate values")
		}
		vals = svd.Values(nil)
		u, v = new(mat.Dense), new(mat.Dense)
		svd.UTo(u)
		svd.VTo(v)
		for i := k; i < len(vals); i++ {
			res += vals[i] * vals[i]
		}
	}
	M := mat.NewDense(r, k, nil)
	S := mat.NewDense(k, c, nil)
	for j := 0; j < k; j++ {
		s := math.Sqrt(vals[j])
		for i := 0; i < r; i++ {
			M.Set(i, j, u.At(i, j)*s)
		}
		for i := 0; i < c; i++ {
			S.Set(j, i, v.At(i, j)*s)
		}
	}
	return rank3{M: M, S: S, Values: vals, Resid2: res}, nil
}

// symQuad returns the coefficients of aᵀ L b in the six entries
// (L11, L12, L13, L22, L23, L33) of a symmetric 3×3 L — the row of a
// metric constraint (Tomasi–Kanade 1992, eq. 16).
func symQuad(a, b []float64) [6]float64 {
	return [6]float64{
		a[0] * b[0], a[0]*b[1] + a[1]*b[0], a[0]*b[2] + a[2]*b[0],
		a[1] * b[1], a[1]*b[2] + a[2]*b[1], a[2] * b[2],
	}
}

// metricL solves the linear least-squares system for the six entries of the
// symmetric L = QQᵀ from î_fᵀLî_f = 1, ĵ_fᵀLĵ_f = 1, î_fᵀLĵ_f = 0
// (Tomasi–Kanade 1992, eq. 16). It returns L and the condition number of the
// 3F×6 system.
func metricL(M *mat.Dense) (*mat.SymDense, float64, error) {
	r, _ := M.Dims()
	f := r / 2
	G := mat.NewDense(3*f, 6, nil)
	c := mat.NewVecDense(3*f, nil)
	g := symQuad // rows of the metric constraints
	for i := 0; i < f; i++ {
		a := M.RawRowView(2 * i)
		b := M.RawRowView(2*i + 1)
		rows := [3][6]float64{g(a, a), g(b, b), g(a, b)}
		rhs := [3]float64{1, 1, 0}
		for k := 0; k < 3; k++ {
			G.SetRow(3*i+k, rows[k][:])
			c.SetVec(3*i+k, rhs[k])
		}
	}
	var svd mat.SVD
	if !svd.Factorize(G, mat.SVDThin) {
		return nil, 0, fmt.Errorf("factor: %w: SVD of the metric constraints did not converge", ErrMetricUpgrade)
	}
	vals := svd.Values(nil)
	cond := math.Inf(1)
	if vals[5] > 0 {
		cond = vals[0] / vals[5]
	}
	if cond > 1e12 {
		return nil, cond, fmt.Errorf("factor: %w: the orthonormality constraints do not determine the upgrade (condition %.3g); the views need more rotation", ErrMetricUpgrade, cond)
	}
	var l mat.VecDense
	svd.SolveVecTo(&l, c, 6)
	L := mat.NewSymDense(3, []float64{
		l.AtVec(0), l.AtVec(1), l.AtVec(2),
		l.AtVec(1), l.AtVec(3), l.AtVec(4),
		l.AtVec(2), l.AtVec(4), l.AtVec(5),
	})
	return L, cond, nil
}

// sqrtPD returns Q with QQᵀ = L, raising eigenvalues below floor×λmax to that
// floor (nearest positive-definite matrix, Higham 1988); fallback reports
// whether any eigenvalue was raised.
func sqrtPD(L *mat.SymDense) (Q *mat.Dense, fallback bool, err error) {
	var eig mat.EigenSym
	if !eig.Factorize(L, true) {
		return nil, false, fmt.Errorf("factor: %w: eigen-decomposition of L failed", ErrMetricUpgrade)
	}
	vals := eig.Values(nil)
	var vecs mat.Dense
	eig.VectorsTo(&vecs)
	lmax := math.Max(vals[0], math.Max(vals[1], vals[2]))
	if !(lmax > 0) {
		return nil, true, fmt.Errorf("factor: %w: L has no positive eigenvalue", ErrMetricUpgrade)
	}
	const floor = 1e-6
	Q = mat.NewDense(3, 3, nil)
	for k := 0; k < 3; k++ {
		lk := vals[k]
		if lk < floor*lmax {
			lk = floor * lmax
			fallback = true
		}
		s := math.Sqrt(lk)
		for i := 0; i < 3; i++ {
			Q.Set(i, k, vecs.At(i, k)*s)
		}
	}
	return Q, fallback, nil
}

// polar2x3 returns the 2×3 matrix with orthonormal rows nearest to A in the
// Frobenius norm: (AAᵀ)^-½ A (the polar factor; Higham, Functions of
// Matrices, 2008, ch. 8). ok is false when A has rank < 2.
func polar2x3(a [2][3]float64) (r [2][3]float64, ok bool) {
	// B = AAᵀ, 2×2 symmetric positive semi-definite.
	b00 := dot3(a[0], a[0])
	b01 := dot3(a[0], a[1])
	b11 := dot3(a[1], a[1])
	// Inverse square root of a 2×2 SPD matrix: with s = √det and
	// τ = √(trace + 2s), B^½ = (B + sI)/τ, so B^-½ = (B + sI)⁻¹ τ.
	det := b00*b11 - b01*b01
	if !(det > 1e-300) {
		return r, false
	}
	s := math.Sqrt(det)
	tau := math.Sqrt(b00 + b11 + 2*s)
	// (B + sI)⁻¹ = [[b11+s, -b01], [-b01, b00+s]] / det(B+sI)
	c00, c01, c11 := b00+s, b01, b11+s
	dd := c00*c11 - c01*c01
	i00, i01, i11 := c11/dd*tau, -c01/dd*tau, c00/dd*tau
	for k := 0; k < 3; k++ {
		r[0][k] = i00*a[0][k] + i01*a[1][k]
		r[1][k] = i01*a[0][k] + i11*a[1][k]
	}
	return r, true
}

func dot3(a, b [3]float64) float64 { return a[0]*b[0] + a[1]*b[1] + a[2]*b[2] }

func cross3(a, b [3]float64) [3]float64 {
	return [3]float64{a[1]*b[2] - a[2]*b[1], a[2]*b[0] - a[0]*b[2], a[0]*b[1] - a[1]*b[0]}
}

// rotationFromRows completes two orthonormal rows with their cross product.
func rotationFromRows(r [2][3]float64) [3][3]float64 {
	return [3][3]float64{r[0], r[1], cross3(r[0], r[1])}
}

// rotationGNStep takes one step updating an orthographic camera given the
// structure. The best 2×3
// block with orthonormal rows is not the polar factor of W̃_f Sᵀ unless
// SSᵀ ∝ I (the "unbalanced" Procrustes problem has no closed form), so each
// rotation takes Gauss–Newton steps on R ← R·exp([δ]×). With A the first two
// rows of R, k its third, C = W̃_f Sᵀ (2×3), G = SSᵀ (3×3) and N = CᵀA,
// the sums over points reduce to
//
//	H = Σ JᵀJ = tr(G)·I − G − [k]× G [k]×ᵀ,
//	g = (N₂₃−N₃₂, N₃₁−N₁₃, N₁₂−N₂₁) + (Gk) × k,   δ = H⁻¹ g,
//
// (J_p = A[X_p]×, the derivative of the residual w_p − A(I+[δ]×)X_p), so a
// step costs O(1) per frame once C and G are formed.
//
// It reports whether the step was large enough to be worth another. It is
// rotationStepB for B = [I 0], with the sums in closed form.
func rotationGNStep(R *[3][3]float64, C [2][3]float64, G [3][3]float64) bool {
	A := [2][3]float64{R[0], R[1]}
	k := R[2]
	var N [3][3]float64 // N = Cᵀ A
	for a := 0; a < 3; a++ {
		for b := 0; b < 3; b++ {
			N[a][b] = C[0][a]*A[0][b] + C[1][a]*A[1][b]
		}
	}
	Gk := [3]float64{dot3(G[0], k), dot3(G[1], k), dot3(G[2], k)}
	gc := cross3(Gk, k)
	g := [3]float64{N[1][2] - N[2][1] + gc[0], N[2][0] - N[0][2] + gc[1], N[0][1] - N[1][0] + gc[2]}
	tr := G[0][0] + G[1][1] + G[2][2]
	K := skew(k)
	KG := mul33(K, G)
	KGKt := mulABt(KG, K)
	var H [3][3]float64
	for a := 0; a < 3; a++ {
		for b := 0; b < 3; b++ {
			H[a][b] = -G[a][b] - KGKt[a][b]
		}
		H[a][a] += tr
	}
	d, ok := solve33(H, g)
	if !ok {
		return false
	}
	*R = mul33(*R, expSO3(d))
	return dot3(d, d) > 1e-30
}

func skew(v [3]float64) [3][3]float64 {
	return [3][3]float64{{0, -v[2], v[1]}, {v[2], 0, -v[0]}, {-v[1], v[0], 0}}
}

func mul33(a, b [3][3]float64) [3][3]float64 {
	var c [3][3]float64
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			c[i][j] = a[i][0]*b[0][j] + a[i][1]*b[1][j] + a[i][2]*b[2][j]
		}
	}
	return c
}

// solve33 solves Hx = g by Cramer's rule; ok is false when H is singular.
func solve33(H [3][3]float64, g [3]float64) ([3]float64, bool) {
	det := dot3(H[0], cross3(H[1], H[2]))
	scale := math.Abs(H[0][0]) + math.Abs(H[1][1]) + math.Abs(H[2][2])
	if !(math.Abs(det) > 1e-14*scale*scale*scale) {
		return [3]float64{}, false
	}
	// x = adj(H) g / det with columns of adj from cross products of rows.
	c0, c1, c2 := cross3(H[1], H[2]), cross3(H[2], H[0]), cross3(H[0], H[1])
	var x [3]float64
	for a := 0; a < 3; a++ {
		x[a] = (c0[a]*g[0] + c1[a]*g[1] + c2[a]*g[2]) / det
	}
	return x, true
}

// expSO3 is the rotation exp([w]×) by Rodrigues' formula,
// R = I + sin θ/θ [w]× + (1 − cos θ)/θ² [w]×², θ = |w|.
func expSO3(w [3]float64) [3][3]float64 {
	th2 := dot3(w, w)
	var a, b float64
	if th2 < 1e-12 {
		a, b = 1-th2/6, 0.5-th2/24
	} else {
		th := math.Sqrt(th2)
		a, b = math.Sin(th)/th, (1-math.Cos(th))/th2
	}
	K := skew(w)
	K2 := mul33(K, K)
	var R [3][3]float64
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			R[i][j] = a*K[i][j] + b*K2[i][j]
		}
		R[i][i]++
	}
	return R
}

// factorOrthographic is the orthographic Tomasi–Kanade factorization.
func factorOrthographic(ctx context.Context, m *Measurements, opts Options) (*Reconstruction, error) {
	return factorAffine(ctx, m, opts, Orthographic)
}

// checkComplete rejects measurements the complete-data models cannot use.
func checkComplete(m *Measurements, model Model, minPoints int) error {
	if !m.Complete() {
		return fmt.Errorf("factor: %w: the %s factorization needs every point in every frame; keep complete tracks only", ErrIncomplete, model)
	}
	nf, np := m.Dims()
	if nf < MinFrames || np < minPoints {
		return fmt.Errorf("factor: %w: %d frames × %d points; the %s model needs at least %d frames and %d points", ErrTooFew, nf, np, model, MinFrames, minPoints)
	}
	for _, v := range m.W.RawMatrix().Data {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			panic("factor: measurement matrix holds NaN or Inf")
		}
	}
	return nil
}

// affineParams returns the number of free parameters d of an affine model
// fitted to F frames and P points (per frame: rotation 3, image translation
// 2, and the scale for the scaled models; per point 3; less the gauge: world
// rotation 3 and origin 3, and the global scale for the scaled models).
func affineParams(model Model, nf, np int) int {
	if model == Orthographic {
		return 5*nf + 3*np - 6
	}
	return 6*nf + 3*np - 7
}

// spectrum fills the spectral diagnostics of the rank-3 fit and returns the
// noise level σ̂ used for the tests and whether σ₃ is inside the noise.
func spectrum(d *Diagnostics, r3 rank3, nf, np int, dModel int, opts Options) (sigma float64, rankDeficient bool) {
	n := 2 * nf * np
	dAffine := 8*nf + 3*np - 12
	d.Measurements, d.Parameters = n, dModel
	nv := min(len(r3.Values), 10)
	d.SingularValues = append([]float64(nil), r3.Values[:nv]...)
	if len(r3.Values) > 3 && r3.Values[3] > 0 {
		d.RankGap = r3.Values[2] / r3.Values[3]
	} else {
		d.RankGap = math.Inf(1)
	}
	d.AffineRMS = math.Sqrt(r3.Resid2 / float64(n))
	sigma = opts.NoiseSigma
	if sigma == 0 && n > dAffine {
		sigma = math.Sqrt(r3.Resid2 / float64(n-dAffine))
	}
	d.NoiseSigma = sigma
	if n > dModel {
		d.ExpectedRMS = sigma * math.Sqrt(1-float64(dModel)/float64(n))
	}
	// Degeneracy of the spectrum: is σ₃ above what noise alone gives?
	noiseEdge := sigma * (math.Sqrt(float64(2*nf)) + math.Sqrt(float64(np)))
	rankDeficient = r3.Values[2] <= opts.PlanarRatio*noiseEdge || r3.Values[2] <= 1e-9*r3.Values[0]
	return sigma, rankDeficient
}

// factorAffine runs an affine model (orthographic, scaled orthographic or
// paraperspective) on complete measurements: centring, rank-3 SVD, the
// model's metric upgrade, refinement, gauge fixing and diagnostics.
func factorAffine(ctx context.Context, m *Measurements, opts Options, model Model) (*Reconstruction, error) {
	if err := checkComplete(m, model, MinPoints); err != nil {
		return nil, err
	}
	nf, np := m.Dims()
	var intr Intrinsics
	defaulted := false
	if model == Paraperspective {
		intr, defaulted = resolveIntrinsics(m, opts)
	}
	opts.progress("factorize", 0, 3)
	wc, t := centre(m.W)
	r3, err := factorRank3(wc)
	if err != nil {
		return nil, err
	}
	if err := checkCtx(ctx); err != nil {
		return nil, err
	}
	opts.progress("factorize", 1, 3)

	n := 2 * nf * np
	dModel := affineParams(model, nf, np)
	rec := &Reconstruction{Model: model}
	d := &rec.Diagnostics
	d.MirrorAmbiguous = true
	sigma, rankDeficient := spectrum(d, r3, nf, np, dModel, opts)
	if rankDeficient && similarityOnly(wc, sigma) {
		return nil, fmt.Errorf("factor: %w: every view is a 2D similarity of the first (the part did not turn out of the image plane); capture views with at least %.1f° of rotation", ErrLittleRotation, opts.MinRotationDeg)
	}

	var cams []affineCam
	switch model {
	case Orthographic:
		cams, err = upgradeOrthographic(r3.M, d)
	case ScaledOrthographic:
		cams, err = upgradeScaled(r3.M, nil, d)
	case Paraperspective:
		cams, err = upgradeScaled(r3.M, &paraFrame{intr: intr, t: t}, d)
	}
	if err != nil {
		return nil, err
	}
	S := mat.NewDense(3, np, nil)
	conv, err := refineAffine(ctx, wc, cams, S, model != Orthographic, opts)
	if err != nil {
		return nil, err
	}
	d.InitialRMS = conv.InitialRMS
	d.Iterations = conv.Iterations
	d.Convergence = append(d.Convergence, conv)
	opts.progress("factorize", 2, 3)

	unit := 1.0
	if model == Paraperspective {
		unit = intr.Fx
	}
	gaugeAffine(cams, S, model != Orthographic, unit)
	rots := make([][3][3]float64, nf)
	for i := range cams {
		rots[i] = cams[i].R
	}
	rec.Cameras = make([]Camera, nf)
	for i, c := range cams {
		cam := Camera{Frame: i, R: c.R, T: [3]float64{t[2*i], t[2*i+1], 0}, Scale: c.c}
		if model == Paraperspective {
			cam.Scale = c.c * intr.Fx
			z := intr.Fx / cam.Scale
			x, y := intr.Normalize(t[2*i], t[2*i+1])
			cam.T = [3]float64{x * z, y * z, z}
		}
		if m.Frames != nil {
			cam.Frame = m.Frames[i]
		}
		rec.Cameras[i] = cam
	}
	if model == Paraperspective {
		in := intr
		rec.Intrinsics = &in
	}
	rec.Points = makePoints(m, S)
	fillResiduals(rec, m)
	_ = n
	opts.progress("factorize", 3, 3)

	spread := rotationSpreadDeg(rots)
	d.RotationSpreadDeg = spread
	if err := checkSpread(d, spread, rankDeficient, opts); err != nil {
		return nil, err
	}
	if defaulted {
		d.Warn(WarnDefaultIntrinsics, fmt.Sprintf("no intrinsics given: the %s model assumed the principal point (%.1f, %.1f) px and the focal length %.1f px (%.1f × the larger image side); give --intrinsics for reliable depth", model, intr.Cx, intr.Cy, intr.Fx, DefaultFocalFactor))
	}
	addConvergenceWarnings(d)
	addWarnings(rec, rankDeficient, opts)
	return rec, nil
}

// checkSpread fails when the recovered views span too little rotation. A
// near-planar scene (rankDeficient) whose views are not mere similarities
// is exempt: there the upgrade itself is unreliable and the planar-scene
// warning says so. After a metric-upgrade fallback a collapsed spread
// means the upgrade failed, not that the part did not turn.
func checkSpread(d *Diagnostics, spread float64, rankDeficient bool, opts Options) error {
	if spread >= opts.MinRotationDeg || rankDeficient {
		return nil
	}
	if d.MetricFallback {
		return fmt.Errorf("factor: %w: the metric constraints have no positive-definite solution and the views collapse to %.2f° of rotation; the camera model does not fit these tracks (try another model) or outliers remain", ErrMetricUpgrade, spread)
	}
	return fmt.Errorf("factor: %w: the views span %.2f° (at least %.1f° needed to recover depth); capture a wider arc", ErrLittleRotation, spread, opts.MinRotationDeg)
}

// makePoints turns the 3×P structure into Points.
func makePoints(m *Measurements, S *mat.Dense) []Point {
	nf, np := m.Dims()
	pts := make([]Point, np)
	for j := 0; j < np; j++ {
		p := Point{Track: j, X: [3]float64{S.At(0, j), S.At(1, j), S.At(2, j)}}
		for i := 0; i < nf; i++ {
			if m.Observed(i, j) {
				p.Views++
			}
		}
		if m.Tracks != nil {
			p.Track = m.Tracks[j]
		}
		pts[j] = p
	}
	return pts
}

// upgradeOrthographic is the Tomasi–Kanade metric upgrade: L from metricL,
// Q = sqrtPD(L), each camera the polar factor of its rows of M̂Q.
func upgradeOrthographic(Mh *mat.Dense, d *Diagnostics) ([]affineCam, error) {
	L, cond, err := metricL(Mh)
	if err != nil {
		return nil, err
	}
	d.MetricCondition = cond
	Q, fallback, err := sqrtPD(L)
	if err != nil {
		return nil, err
	}
	d.MetricFallback = fallback
	var M mat.Dense
	M.Mul(Mh, Q)
	nf := M.RawMatrix().Rows / 2
	cams := make([]affineCam, nf)
	for i := range cams {
		a := [2][3]float64{
			{M.At(2*i, 0), M.At(2*i, 1), M.At(2*i, 2)},
			{M.At(2*i+1, 0), M.At(2*i+1, 1), M.At(2*i+1, 2)},
		}
		r, ok := polar2x3(a)
		if !ok {
			return nil, fmt.Errorf("factor: %w: camera %d has rank < 2 after the upgrade", ErrMetricUpgrade, i)
		}
		cams[i] = affineCam{R: rotationFromRows(r), E: [2][3]float64{{1, 0, 0}, {0, 1, 0}}, c: 1}
	}
	return cams, nil
}

// affineCam is one affine camera: its 2×3 projection block is P = c·E·R,
// with E fixed by the model ([I 0] for the (scaled) orthographic model,
// D·[1 0 −x; 0 1 −y] for paraperspective), c the free scale (1 for the
// orthographic model) and R the world→camera rotation.
type affineCam struct {
	R [3][3]float64
	E [2][3]float64
	c float64
}

// er returns E·R (2×3).
func (a *affineCam) er() [2][3]float64 {
	var P [2][3]float64
	for r := 0; r < 2; r++ {
		for k := 0; k < 3; k++ {
			P[r][k] = a.E[r][0]*a.R[0][k] + a.E[r][1]*a.R[1][k] + a.E[r][2]*a.R[2][k]
		}
	}
	return P
}

// block returns P = c·E·R.
func (a *affineCam) block() [2][3]float64 {
	P := a.er()
	for r := range P {
		for k := range P[r] {
			P[r][k] *= a.c
		}
	}
	return P
}

func stackBlocks(cams []affineCam) *mat.Dense {
	A := mat.NewDense(2*len(cams), 3, nil)
	for i := range cams {
		P := cams[i].block()
		A.SetRow(2*i, P[0][:])
		A.SetRow(2*i+1, P[1][:])
	}
	return A
}

// affineStructure solves S = (AᵀA)⁻¹ Aᵀ W̃ (A the stacked blocks), the
// least-squares structure given the cameras.
func affineStructure(cams []affineCam, wc, S *mat.Dense) error {
	A := stackBlocks(cams)
	var H mat.Dense
	H.Mul(A.T(), A)
	var AtW mat.Dense
	AtW.Mul(A.T(), wc)
	var chol mat.Cholesky
	if !chol.Factorize(mat.NewSymDense(3, H.RawMatrix().Data)) {
		return fmt.Errorf("factor: %w: the viewing directions are all parallel", ErrLittleRotation)
	}
	return chol.SolveTo(S, &AtW)
}

// affineCost is ‖W̃ − A S‖²_F.
func affineCost(cams []affineCam, wc, S *mat.Dense) float64 {
	r, c := wc.Dims()
	s0, s1, s2 := S.RawRowView(0), S.RawRowView(1), S.RawRowView(2)
	cost := 0.0
	for i := 0; i < r; i++ {
		P := cams[i/2].block()[i%2]
		row := wc.RawRowView(i)
		for j := 0; j < c; j++ {
			d := row[j] - (P[0]*s0[j] + P[1]*s1[j] + P[2]*s2[j])
			cost += d * d
		}
	}
	return cost
}

// affineCameras updates every camera given the structure: Gauss–Newton
// steps on R (rotationStepB) and, when freeScale, the closed-form scale
// c = ⟨C, E R⟩ / tr(E R G Rᵀ Eᵀ), with C = W̃_f Sᵀ and G = S Sᵀ.
func affineCameras(cams []affineCam, wc, S *mat.Dense, freeScale bool) {
	var WS mat.Dense
	WS.Mul(wc, S.T())
	var Gd mat.Dense
	Gd.Mul(S, S.T())
	var G [3][3]float64
	for a := 0; a < 3; a++ {
		for b := 0; b < 3; b++ {
			G[a][b] = Gd.At(a, b)
		}
	}
	for i := range cams {
		C := [2][3]float64{
			{WS.At(2*i, 0), WS.At(2*i, 1), WS.At(2*i, 2)},
			{WS.At(2*i+1, 0), WS.At(2*i+1, 1), WS.At(2*i+1, 2)},
		}
		cam := &cams[i]
		for step := 0; step < 3; step++ {
			var B [2][3]float64 // c·E
			for r := 0; r < 2; r++ {
				for k := 0; k < 3; k++ {
					B[r][k] = cam.c * cam.E[r][k]
				}
			}
			moved := rotationStepB(&cam.R, B, C, G)
			if freeScale {
				P := cam.er()
				num, den := 0.0, 0.0
				for r := 0; r < 2; r++ {
					num += dot3(C[r], P[r])
					gp := [3]float64{dot3(G[0], P[r]), dot3(G[1], P[r]), dot3(G[2], P[r])}
					den += dot3(P[r], gp)
				}
				if den > 0 && num > 0 {
					cam.c = num / den
				}
			}
			if !moved {
				break
			}
		}
	}
}

// rotationStepB takes one Gauss–Newton step on R ← R·exp([δ]×) for
// min Σ_p ‖w_p − B R X_p‖² (B a fixed 2×3 matrix), given C = Σ w_p X_pᵀ and
// G = Σ X_p X_pᵀ. With J_p = B R [X_p]×, K = RᵀBᵀBR, M = RᵀBᵀ and the
// skew matrices S_i = [e_i]×, the sums over points reduce to
//
//	JᵀJ = −Σ_ij G_ij S_i K S_j,   δ = (JᵀJ)⁻¹ vex(K G − M C),
//
// vex(N) = (N₁₂ − N₂₁, N₂₀ − N₀₂, N₀₁ − N₁₀) (the sum of cross products
// Σ a_p × b_p for N = Σ a_p b_pᵀ). For B = [I 0] this is rotationGNStep.
// It reports whether the step was large enough to be worth another.
func rotationStepB(R *[3][3]float64, B, C [2][3]float64, G [3][3]float64) bool {
	var BR [2][3]float64
	for r := 0; r < 2; r++ {
		for k := 0; k < 3; k++ {
			BR[r][k] = B[r][0]*R[0][k] + B[r][1]*R[1][k] + B[r][2]*R[2][k]
		}
	}
	var K, MC [3][3]float64
	for a := 0; a < 3; a++ {
		for b := 0; b < 3; b++ {
			K[a][b] = BR[0][a]*BR[0][b] + BR[1][a]*BR[1][b]
			MC[a][b] = BR[0][a]*C[0][b] + BR[1][a]*C[1][b]
		}
	}
	KG := mul33(K, G)
	N := [3][3]float64{}
	for a := 0; a < 3; a++ {
		for b := 0; b < 3; b++ {
			N[a][b] = KG[a][b] - MC[a][b]
		}
	}
	g := [3]float64{N[1][2] - N[2][1], N[2][0] - N[0][2], N[0][1] - N[1][0]}
	var H [3][3]float64
	for i := 0; i < 3; i++ {
		var ei [3]float64
		ei[i] = 1
		Si := skew(ei)
		SiK := mul33(Si, K)
		for j := 0; j < 3; j++ {
			if G[i][j] == 0 {
				continue
			}
			var ej [3]float64
			ej[j] = 1
			T := mul33(SiK, skew(ej))
			for a := 0; a < 3; a++ {
				for b := 0; b < 3; b++ {
					H[a][b] -= G[i][j] * T[a][b]
				}
			}
		}
	}
	dlt, ok := solve33(H, g)
	if !ok {
		return false
	}
	*R = mul33(*R, expSO3(dlt))
	return dot3(dlt, dlt) > 1e-30
}

// refineAffine sets the world gauge (camera 0 = identity), solves the
// structure and refines cameras and structure by block-coordinate descent;
// every step lowers the cost ‖W̃ − A S‖²_F. S (3×P) receives the structure.
func refineAffine(ctx context.Context, wc *mat.Dense, cams []affineCam, S *mat.Dense, freeScale bool, opts Options) (Convergence, error) {
	R0 := cams[0].R
	for i := range cams {
		cams[i].R = mulABt(cams[i].R, R0)
	}
	n := float64(wc.RawMatrix().Rows * wc.RawMatrix().Cols)
	conv := Convergence{Stage: "refine", Tolerance: opts.Tolerance, Termination: StopConverged}
	if err := affineStructure(cams, wc, S); err != nil {
		return conv, err
	}
	cost := affineCost(cams, wc, S)
	conv.InitialRMS = math.Sqrt(cost / n)
	if opts.Iterations < 0 {
		conv.FinalRMS = conv.InitialRMS
		return conv, nil
	}
	conv.Termination = StopIterationLimit
	for it := 0; it < opts.Iterations; it++ {
		if err := checkCtx(ctx); err != nil {
			return conv, err
		}
		saved := append([]affineCam(nil), cams...)
		savedS := mat.DenseCopyOf(S)
		affineCameras(cams, wc, S, freeScale)
		if err := affineStructure(cams, wc, S); err != nil {
			return conv, err
		}
		c := affineCost(cams, wc, S)
		conv.Iterations++
		change := 0.0
		if cost > 0 {
			change = (cost - c) / cost
		}
		conv.Changes = append(conv.Changes, change)
		if c > cost {
			// Rounding at the optimum (a Gauss–Newton step is not a
			// guaranteed descent): keep the better iterate.
			copy(cams, saved)
			S.Copy(savedS)
			conv.Termination = StopConverged
			if change < -1e-9 {
				conv.Termination = StopStalled
			}
			break
		}
		if cost-c <= opts.Tolerance*cost {
			cost = c
			conv.Termination = StopConverged
			break
		}
		cost = c
	}
	conv.FinalRMS = math.Sqrt(cost / n)
	return conv, nil
}

// gaugeAffine re-anchors the world after refinement, camera 0 = identity
// (R_f ← R_f R₀ᵀ, S ← R₀ S), and, for the scaled models, fixes the global
// scale so that the cameras' scales unit·c_f (px per world unit: unit = Fx
// for paraperspective, 1 otherwise) average 1 (c_f ← c_f/μ, S ← μS).
func gaugeAffine(cams []affineCam, S *mat.Dense, scaled bool, unit float64) {
	R0 := cams[0].R
	for i := range cams {
		cams[i].R = mulABt(cams[i].R, R0)
	}
	R0m := mat.NewDense(3, 3, []float64{
		R0[0][0], R0[0][1], R0[0][2],
		R0[1][0], R0[1][1], R0[1][2],
		R0[2][0], R0[2][1], R0[2][2]})
	var S0 mat.Dense
	S0.Mul(R0m, S)
	S.Copy(&S0)
	if scaled {
		mu := 0.0
		for _, c := range cams {
			mu += c.c
		}
		mu *= unit / float64(len(cams))
		if mu > 0 {
			for i := range cams {
				cams[i].c /= mu
			}
			S.Scale(mu, S)
		}
	}
}

// addConvergenceWarnings warns about iterative stages that did not meet
// their tolerance.
func addConvergenceWarnings(d *Diagnostics) {
	refined := false
	if k := len(d.Convergence); k > 0 && d.Convergence[k-1].Stage == "refine" && d.Convergence[k-1].Termination == StopConverged {
		// An initialisation that stopped early is harmless once the
		// model's own least-squares refinement converged after it.
		refined = true
	}
	for _, c := range d.Convergence {
		if refined && c.Stage != "refine" {
			continue
		}
		if c.Termination == StopConverged || c.Stage == "refine" && c.Termination == StopIterationLimit && c.FinalRMS <= c.InitialRMS {
			// A refinement that hit its bound while still improving is
			// not a trust problem: its result is never worse than its start.
			continue
		}
		last := math.NaN()
		if len(c.Changes) > 0 {
			last = c.Changes[len(c.Changes)-1]
		}
		d.Warn(WarnNotConverged, fmt.Sprintf("the %s stage stopped (%s) after %d iterations with a change of %.3g per iteration (tolerance %.3g): the result may be inaccurate; raise the iteration limit or check the camera model", c.Stage, c.Termination, c.Iterations, last, c.Tolerance))
	}
}

// mulABt returns A·Bᵀ for 3×3 matrices.
func mulABt(a, b [3][3]float64) [3][3]float64 {
	var c [3][3]float64
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			c[i][j] = a[i][0]*b[j][0] + a[i][1]*b[j][1] + a[i][2]*b[j][2]
		}
	}
	return c
}

// rotationSpreadDeg is the largest angle between camera 0's viewing
// direction and any other camera's.
func rotationSpreadDeg(rots [][3][3]float64) float64 {
	best := 0.0
	for _, R := range rots {
		c := dot3(R[2], rots[0][2])
		c = math.Max(-1, math.Min(1, c))
		best = math.Max(best, math.Acos(c))
	}
	return best * 180 / math.Pi
}

// similarityOnly reports whether every frame's centred points are explained,
// within the noise, by a 2D similarity (rotation, scale) of frame 0's: then
// the views carry no information about depth. The test fits the 2×2 linear
// map A_f (least squares) from frame 0 to frame f and compares the residual
// of the best similarity with that of the general linear map.
func similarityOnly(wc *mat.Dense, sigma float64) bool {
	r, c := wc.Dims()
	x0, y0 := wc.RawRowView(0), wc.RawRowView(1)
	var sxx, sxy, syy float64
	for j := 0; j < c; j++ {
		sxx += x0[j] * x0[j]
		sxy += x0[j] * y0[j]
		syy += y0[j] * y0[j]
	}
	tol := 9 * sigma * sigma * float64(c) // 3σ per point on average
	for i := 2; i < r; i += 2 {
		xf, yf := wc.RawRowView(i), wc.RawRowView(i+1)
		// Similarity fit: [xf; yf] ≈ [[a, -b], [b, a]] [x0; y0].
		var num1, num2 float64
		for j := 0; j < c; j++ {
			num1 += xf[j]*x0[j] + yf[j]*y0[j]
			num2 += yf[j]*x0[j] - xf[j]*y0[j]
		}
		den := sxx + syy
		if den == 0 {
			return true
		}
		a, b := num1/den, num2/den
		res := 0.0
		for j := 0; j < c; j++ {
			dx := xf[j] - (a*x0[j] - b*y0[j])
			dy := yf[j] - (b*x0[j] + a*y0[j])
			res += dx*dx + dy*dy
		}
		if res > tol+1e-18*den {
			return false
		}
	}
	return true
}

// fillResiduals computes per-camera, per-point and overall RMS residuals of
// the model's projection (Reconstruction.Project) over the observed entries.
func fillResiduals(rec *Reconstruction, m *Measurements) {
	nf, np := m.Dims()
	camSS := make([]float64, nf)
	camN := make([]int, nf)
	ptSS := make([]float64, np)
	ptN := make([]int, np)
	total, count := 0.0, 0
	for i := 0; i < nf; i++ {
		cam := &rec.Cameras[i]
		xr, yr := m.W.RawRowView(2*i), m.W.RawRowView(2*i+1)
		for j := 0; j < np; j++ {
			if !m.Observed(i, j) {
				continue
			}
			px, py := rec.project(cam, rec.Points[j].X)
			dx, dy := xr[j]-px, yr[j]-py
			e := dx*dx + dy*dy
			camSS[i] += e
			camN[i] += 2
			ptSS[j] += e
			ptN[j] += 2
			total += e
			count += 2
		}
	}
	for i := range rec.Cameras {
		if camN[i] > 0 {
			rec.Cameras[i].RMS = math.Sqrt(camSS[i] / float64(camN[i]))
		}
	}
	for j := range rec.Points {
		if ptN[j] > 0 {
			rec.Points[j].RMS = math.Sqrt(ptSS[j] / float64(ptN[j]))
		}
	}
	if count > 0 {
		rec.Diagnostics.RMS = math.Sqrt(total / float64(count))
	}
}

func addWarnings(rec *Reconstruction, rankDeficient bool, opts Options) {
	d := &rec.Diagnostics
	if rankDeficient {
		d.Warn(WarnPlanar, fmt.Sprintf("the points lie close to a plane (σ₃/σ₄ = %.3g): depth and rotations are unreliable; film a part with depth relief or add out-of-plane features", d.RankGap))
	}
	if d.MetricFallback {
		d.Warn(WarnMetricFallback, "the metric upgrade needed the nearest positive-definite fallback: rotations may be distorted; check the tracks for outliers and that the camera model fits the set-up")
	}
	if d.RMS > opts.HighResidualFactor*d.ExpectedRMS && d.RMS > d.ExpectedRMS+0.05 {
		d.Warn(WarnHighResidual, fmt.Sprintf("the residual (%.3f px) is far above the %.3f px expected from the noise: the camera model may not fit (try a perspective model) or outlier tracks remain", d.RMS, d.ExpectedRMS))
	}
	if d.MirrorAmbiguous {
		d.Warn(WarnMirror, "affine models cannot tell the structure from its mirror image: depth may be reversed; a perspective model or refinement resolves it")
	}
}
