package factor

// Metric upgrade and refinement of the incomplete-data fit.
//
// The affine cameras M (2F×3, px) of the fit are upgraded with the
// Tomasi–Kanade metric constraints (metricL; for the scaled-orthographic
// model the scale-free ones below), Q = L^½ (sqrtPD), A_f = M_f Q, and each
// camera becomes s_f·R_f with R_f from the polar factor of A_f and
// s_f = ½ tr(R_f A_fᵀ) (1 for the orthographic model). The structure moves
// with the upgrade, X ← Q⁻¹X, so the fit is unchanged up to the projection
// onto the model. Then the model's cost
//
//	Σ_{(f,p) observed} ω_fp ‖w_fp − s_f A_f X_p − t_f‖²,  A_f = rows 1–2 of R_f,
//
// is lowered by block-coordinate descent over the observed entries only:
// X_p in closed form, X_p = (Σ ω s_f² A_fᵀA_f)⁻¹ Σ ω s_f A_fᵀ(w_fp − t_f);
// per frame t_f and R_f from the centred sums over its observed points
// (Gauss–Newton steps on the rotation, rotationGNStep) and, for the
// scaled-orthographic model, s_f = Σ_a A_f,a·C_a / tr(A_f G A_fᵀ) with
// C = Σ ω w̃ X̃ᵀ and G = Σ ω X̃X̃ᵀ. Every step lowers the cost.
//
// Scaled-orthographic metric constraints (Poelman and Kanade, IEEE PAMI
// 19(3), 1997, the scaled-orthographic case of the
// paraperspective constraints): per frame
//
//	î_fᵀLî_f − ĵ_fᵀLĵ_f = 0,   î_fᵀLĵ_f = 0,
//
// homogeneous in the six entries of L, solved as the right singular vector
// of the smallest singular value and scaled so the first frame has
// scale 1.

import (
	"context"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// incMetricScaled solves the scaled-orthographic metric constraints for L and
// returns the condition number σ₁/σ₅ of the 2F×6 system (σ₆ ≈ 0 is the
// solution; σ₅ ≈ 0 would leave a family).
func incMetricScaled(M *mat.Dense) (*mat.SymDense, float64, error) {
	r, _ := M.Dims()
	f := r / 2
	if f < 3 {
		return nil, 0, fmt.Errorf("factor: %w: the scaled-orthographic upgrade needs 3 frames", ErrMetricUpgrade)
	}
	G := mat.NewDense(2*f, 6, nil)
	g := symQuad // rows of the metric constraints
	for i := 0; i < f; i++ {
		a, b := M.RawRowView(2*i), M.RawRowView(2*i+1)
		aa, bb, ab := g(a, a), g(b, b), g(a, b)
		for k := 0; k < 6; k++ {
			G.Set(2*i, k, aa[k]-bb[k])
			G.Set(2*i+1, k, ab[k])
		}
	}
	var svd mat.SVD
	if !svd.Factorize(G, mat.SVDThinV) {
		return nil, 0, fmt.Errorf("factor: %w: SVD of the metric constraints did not converge", ErrMetricUpgrade)
	}
	vals := svd.Values(nil)
	cond := math.Inf(1)
	if vals[4] > 0 {
		cond = vals[0] / vals[4]
	}
	if cond > 1e12 {
		return nil, cond, fmt.Errorf("factor: %w: the scaled-orthographic constraints leave a family of upgrades (condition %.3g); the views need more rotation", ErrMetricUpgrade, cond)
	}
	var v mat.Dense
	svd.VTo(&v)
	l := make([]float64, 6)
	for k := range l {
		l[k] = v.At(k, 5)
	}
	L := mat.NewSymDense(3, []float64{l[0], l[1], l[2], l[1], l[3], l[4], l[2], l[4], l[5]})
	a0, b0 := M.RawRowView(0), M.RawRowView(1)
	s2 := (mat.Inner(mat.NewVecDense(3, a0), L, mat.NewVecDense(3, a0)) + mat.Inner(mat.NewVecDense(3, b0), L, mat.NewVecDense(3, b0))) / 2
	if s2 == 0 {
		return nil, cond, fmt.Errorf("factor: %w: the first frame's scale is zero after the upgrade", ErrMetricUpgrade)
	}
	L.ScaleSym(1/s2, L)
	return L, cond, nil
}

// incOrtho is the metric model over the recovered frames and points.
type incOrtho struct {
	R  [][3][3]float64
	s  []float64
	t  [][2]float64
	X  [][3]float64
	ok []bool // point has an inlier observation
}

func incUpgrade(ctx context.Context, m *Measurements, st *incState, opts Options, mo MissingOptions, rep *MissingReport) (*Reconstruction, error) {
	pr := st.prob
	nf, np := pr.nf, pr.np
	sc := pr.norm.scale
	M := mat.NewDense(2*nf, 3, nil)
	t := make([]float64, 2*nf)
	for f := 0; f < nf; f++ {
		for a := 0; a < 2; a++ {
			U := st.u[8*f+4*a : 8*f+4*a+4]
			M.Set(2*f+a, 0, sc*U[0])
			M.Set(2*f+a, 1, sc*U[1])
			M.Set(2*f+a, 2, sc*U[2])
			t[2*f+a] = sc*U[3] + [2]float64{pr.norm.cx, pr.norm.cy}[a]
		}
	}
	opts.progress("incomplete: metric upgrade", 0, 2)
	var L *mat.SymDense
	var cond float64
	var err error
	scaled := opts.Model == ScaledOrthographic
	if scaled {
		L, cond, err = incMetricScaled(M)
	} else {
		L, cond, err = metricL(M)
	}
	if err != nil {
		return nil, err
	}
	Q, fallback, err := sqrtPD(L)
	if err != nil {
		return nil, err
	}
	var Qi mat.Dense
	if err := Qi.Inverse(Q); err != nil {
		return nil, fmt.Errorf("factor: %w: the upgrade matrix is singular", ErrMetricUpgrade)
	}
	var A mat.Dense
	A.Mul(M, Q)
	ms := &incOrtho{R: make([][3][3]float64, nf), s: make([]float64, nf), t: make([][2]float64, nf),
		X: make([][3]float64, np), ok: make([]bool, np)}
	for f := 0; f < nf; f++ {
		a := [2][3]float64{
			{A.At(2*f, 0), A.At(2*f, 1), A.At(2*f, 2)},
			{A.At(2*f+1, 0), A.At(2*f+1, 1), A.At(2*f+1, 2)},
		}
		r, ok := polar2x3(a)
		if !ok {
			return nil, fmt.Errorf("factor: %w: camera of frame %d has rank < 2 after the upgrade", ErrMetricUpgrade, incFrameID(m, st.frames[f]))
		}
		ms.R[f] = rotationFromRows(r)
		ms.s[f] = 1
		if scaled {
			ms.s[f] = (dot3(r[0], a[0]) + dot3(r[1], a[1])) / 2
		}
		ms.t[f] = [2]float64{t[2*f], t[2*f+1]}
	}
	for p := 0; p < np; p++ {
		for k := pr.pStart[p]; k < pr.pStart[p+1]; k++ {
			if pr.wt[k] > 0 {
				ms.ok[p] = true
				break
			}
		}
		x := st.X[3*p : 3*p+3]
		for a := 0; a < 3; a++ {
			ms.X[p][a] = Qi.At(a, 0)*x[0] + Qi.At(a, 1)*x[1] + Qi.At(a, 2)*x[2]
		}
	}
	threads := mo.Threads
	pb := pr.chunks(threads)
	fb := incFrameChunks(nf, threads)
	incParallel(pb, func(_, lo, hi int) { ms.pointStep(pr, lo, hi) })
	cost := ms.cost(pr)
	n := pr.inlierCount()
	rec := &Reconstruction{Model: opts.Model}
	d := &rec.Diagnostics
	d.InitialRMS = math.Sqrt(cost / float64(2*n))
	iters := 0
	refine := Convergence{Stage: "refine", Termination: StopIterationLimit, Tolerance: opts.Tolerance, InitialRMS: d.InitialRMS}
	for it := 0; it < opts.Iterations; it++ {
		if err := checkCtx(ctx); err != nil {
			return nil, err
		}
		incParallel(fb, func(_, lo, hi int) { ms.cameraStep(pr, lo, hi, scaled) })
		incParallel(pb, func(_, lo, hi int) { ms.pointStep(pr, lo, hi) })
		c := ms.cost(pr)
		iters++
		refine.Changes = append(refine.Changes, (cost-c)/cost)
		if cost-c <= opts.Tolerance*cost {
			refine.Termination = StopConverged
			if c > cost {
				refine.Termination = StopStalled
			}
			cost = math.Min(cost, c)
			break
		}
		cost = c
	}
	refine.Iterations = iters
	refine.FinalRMS = math.Sqrt(cost / float64(2*n))
	affine := incAffineConvergence(rep)
	affine.Tolerance = mo.Tolerance
	d.Convergence = append(d.Convergence, affine, refine)
	opts.progress("incomplete: metric upgrade", 1, 2)
	ms.anchor()

	// Assemble the reconstruction.
	d.Iterations = iters
	d.MirrorAmbiguous = true
	d.MetricFallback = fallback
	d.MetricCondition = cond
	d.AffineRMS = rep.AffineRMS
	d.SingularValues = append([]float64(nil), st.block[:min(10, len(st.block))]...)
	if len(st.block) > 3 && st.block[3] > 0 {
		d.RankGap = st.block[2] / st.block[3]
	} else {
		d.RankGap = math.Inf(1)
	}
	kept := 0
	for p := 0; p < np; p++ {
		if ms.ok[p] {
			kept++
		} else {
			rep.UnrecoveredTracks = append(rep.UnrecoveredTracks, incTrackID(m, st.points[p]))
		}
	}
	nParams := 5*nf + 3*kept - 6
	if scaled {
		nParams = 6*nf + 3*kept - 7
	}
	d.Measurements, d.Parameters = 2*n, nParams
	sigma := opts.NoiseSigma
	if sigma == 0 {
		sigma = rep.AffineNoiseSigma
	}
	d.NoiseSigma = sigma
	if 2*n > nParams {
		d.ExpectedRMS = sigma * math.Sqrt(1-float64(nParams)/float64(2*n))
	}
	rec.Cameras = make([]Camera, nf)
	for f := 0; f < nf; f++ {
		rec.Cameras[f] = Camera{Frame: incFrameID(m, st.frames[f]), R: ms.R[f],
			T: [3]float64{ms.t[f][0], ms.t[f][1], 0}, Scale: ms.s[f]}
	}
	nfAll, _ := m.Dims()
	for p := 0; p < np; p++ {
		if !ms.ok[p] {
			continue
		}
		col := st.points[p]
		views := 0
		for f := 0; f < nfAll; f++ {
			if m.Observed(f, col) {
				views++
			}
		}
		rec.Points = append(rec.Points, Point{Track: incTrackID(m, col), X: ms.X[p], Views: views})
	}
	ms.fillResiduals(pr, rec)
	d.RotationSpreadDeg = rotationSpreadDeg(ms.R)
	if d.RotationSpreadDeg < opts.MinRotationDeg {
		return nil, fmt.Errorf("factor: %w: the views span %.2f° (at least %.1f° needed to recover depth); capture a wider arc", ErrLittleRotation, d.RotationSpreadDeg, opts.MinRotationDeg)
	}
	// Planarity: σ₃ of the initial block against the largest singular value
	// noise alone would give, σ̂(√(2k) + √n) (as in the complete case).
	rankDeficient := false
	if len(st.block) >= 3 {
		edge := sigma * (math.Sqrt(float64(2*st.blockN[0])) + math.Sqrt(float64(st.blockN[1])))
		rankDeficient = st.block[2] <= opts.PlanarRatio*edge || st.block[2] <= 1e-9*st.block[0]
	}
	addWarnings(rec, rankDeficient, opts)
	opts.progress("incomplete: metric upgrade", 2, 2)
	return rec, nil
}

// pointStep solves the points lo…hi−1 given the cameras.
func (ms *incOrtho) pointStep(pr *incProblem, lo, hi int) {
	sc := pr.norm.scale
	cx, cy := pr.norm.cx, pr.norm.cy
	for p := lo; p < hi; p++ {
		var c [6]float64
		var b [3]float64
		for k := pr.pStart[p]; k < pr.pStart[p+1]; k++ {
			w := pr.wt[k]
			if w == 0 {
				continue
			}
			f := pr.frame[k]
			R, s := &ms.R[f], ms.s[f]
			rx := s * w * (sc*pr.obsX[k] + cx - ms.t[f][0])
			ry := s * w * (sc*pr.obsY[k] + cy - ms.t[f][1])
			ws := w * s * s
			i, j := R[0], R[1]
			for a := 0; a < 3; a++ {
				b[a] += i[a]*rx + j[a]*ry
			}
			c[0] += ws * (i[0]*i[0] + j[0]*j[0])
			c[1] += ws * (i[0]*i[1] + j[0]*j[1])
			c[2] += ws * (i[0]*i[2] + j[0]*j[2])
			c[3] += ws * (i[1]*i[1] + j[1]*j[1])
			c[4] += ws * (i[1]*i[2] + j[1]*j[2])
			c[5] += ws * (i[2]*i[2] + j[2]*j[2])
		}
		l, ok := incChol3(c)
		if !ok {
			continue // two parallel views: keep the upgraded point
		}
		y0, y1, y2 := incFwd3(l, b[0], b[1], b[2])
		x0, x1, x2 := incBwd3(l, y0, y1, y2)
		ms.X[p] = [3]float64{x0, x1, x2}
	}
}

// cameraStep updates the rotation, scale and translation of frames
// lo…hi−1 given the points.
func (ms *incOrtho) cameraStep(pr *incProblem, lo, hi int, scaled bool) {
	sc := pr.norm.scale
	cx, cy := pr.norm.cx, pr.norm.cy
	for f := lo; f < hi; f++ {
		obs := pr.fObs[pr.fStart[f]:pr.fStart[f+1]]
		var W float64
		var mw [2]float64
		var mx [3]float64
		for _, k := range obs {
			w := pr.wt[k]
			if w == 0 {
				continue
			}
			x := ms.X[pr.obsPt[k]]
			W += w
			mw[0] += w * (sc*pr.obsX[k] + cx)
			mw[1] += w * (sc*pr.obsY[k] + cy)
			for a := 0; a < 3; a++ {
				mx[a] += w * x[a]
			}
		}
		if W == 0 {
			continue
		}
		mw[0] /= W
		mw[1] /= W
		for a := range mx {
			mx[a] /= W
		}
		var C [2][3]float64
		var G [3][3]float64
		for _, k := range obs {
			w := pr.wt[k]
			if w == 0 {
				continue
			}
			x := ms.X[pr.obsPt[k]]
			dx := [3]float64{x[0] - mx[0], x[1] - mx[1], x[2] - mx[2]}
			wx := w * (sc*pr.obsX[k] + cx - mw[0])
			wy := w * (sc*pr.obsY[k] + cy - mw[1])
			for a := 0; a < 3; a++ {
				C[0][a] += wx * dx[a]
				C[1][a] += wy * dx[a]
				for b := 0; b < 3; b++ {
					G[a][b] += w * dx[a] * dx[b]
				}
			}
		}
		s := ms.s[f]
		Cs := C
		for a := 0; a < 2; a++ {
			for b := 0; b < 3; b++ {
				Cs[a][b] /= s
			}
		}
		for step := 0; step < 3; step++ {
			if !rotationGNStep(&ms.R[f], Cs, G) {
				break
			}
		}
		R := ms.R[f]
		if scaled {
			num := dot3(R[0], C[0]) + dot3(R[1], C[1])
			den := 0.0
			for a := 0; a < 2; a++ {
				Ga := [3]float64{dot3(G[0], R[a]), dot3(G[1], R[a]), dot3(G[2], R[a])}
				den += dot3(R[a], Ga)
			}
			if den > 0 && num > 0 {
				s = num / den
				ms.s[f] = s
			}
		}
		ms.t[f] = [2]float64{mw[0] - s*dot3(R[0], mx), mw[1] - s*dot3(R[1], mx)}
	}
}

// residual returns the px residual of observation k.
func (ms *incOrtho) residual(pr *incProblem, k int) (ex, ey float64) {
	f, x := pr.frame[k], ms.X[pr.obsPt[k]]
	R, s := &ms.R[f], ms.s[f]
	ex = pr.norm.scale*pr.obsX[k] + pr.norm.cx - (s*dot3(R[0], x) + ms.t[f][0])
	ey = pr.norm.scale*pr.obsY[k] + pr.norm.cy - (s*dot3(R[1], x) + ms.t[f][1])
	return
}

// cost is the weighted sum of squared residuals, px².
func (ms *incOrtho) cost(pr *incProblem) float64 {
	c := 0.0
	for k, w := range pr.wt {
		if w == 0 {
			continue
		}
		ex, ey := ms.residual(pr, k)
		c += w * (ex*ex + ey*ey)
	}
	return c
}

// anchor rotates the world so the first camera is the identity, scales it
// so the first camera has scale 1, and moves the origin to the centroid of
// the points with inliers.
func (ms *incOrtho) anchor() {
	R0 := ms.R[0]
	for f := range ms.R {
		ms.R[f] = mulABt(ms.R[f], R0)
	}
	s0 := ms.s[0]
	for f := range ms.s {
		ms.s[f] /= s0
	}
	var c [3]float64
	n := 0.0
	for p, x := range ms.X {
		y := [3]float64{dot3(R0[0], x), dot3(R0[1], x), dot3(R0[2], x)}
		for a := range y {
			y[a] *= s0
		}
		ms.X[p] = y
		if ms.ok[p] {
			for a := range c {
				c[a] += y[a]
			}
			n++
		}
	}
	if n == 0 {
		return
	}
	for a := range c {
		c[a] /= n
	}
	for p := range ms.X {
		for a := range c {
			ms.X[p][a] -= c[a]
		}
	}
	for f := range ms.t {
		ms.t[f][0] += ms.s[f] * dot3(ms.R[f][0], c)
		ms.t[f][1] += ms.s[f] * dot3(ms.R[f][1], c)
	}
}

// fillResiduals sets the per-camera, per-point and overall RMS residuals
// over the inlier observations (rec.Points holds the points with inliers,
// in order).
func (ms *incOrtho) fillResiduals(pr *incProblem, rec *Reconstruction) {
	camSS := make([]float64, pr.nf)
	camN := make([]int, pr.nf)
	total, count := 0.0, 0
	j := 0
	for p := 0; p < pr.np; p++ {
		if !ms.ok[p] {
			continue
		}
		ss, cnt := 0.0, 0
		for k := pr.pStart[p]; k < pr.pStart[p+1]; k++ {
			if pr.wt[k] == 0 {
				continue
			}
			ex, ey := ms.residual(pr, k)
			e := ex*ex + ey*ey
			ss += e
			cnt += 2
			camSS[pr.frame[k]] += e
			camN[pr.frame[k]] += 2
		}
		rec.Points[j].RMS = math.Sqrt(ss / float64(cnt))
		total += ss
		count += cnt
		j++
	}
	for f := range rec.Cameras {
		if camN[f] > 0 {
			rec.Cameras[f].RMS = math.Sqrt(camSS[f] / float64(camN[f]))
		}
	}
	if count > 0 {
		rec.Diagnostics.RMS = math.Sqrt(total / float64(count))
	}
}

// incAffineConvergence summarises the best run of the affine fit in the
// package's Convergence form: Changes are the relative cost decreases of
// its accepted iterations.
func incAffineConvergence(rep *MissingReport) Convergence {
	c := Convergence{Stage: string(rep.Solver), Iterations: rep.Iterations}
	h := rep.CostHistory
	for i := 1; i < len(h); i++ {
		c.Changes = append(c.Changes, (h[i-1]-h[i])/h[i-1])
	}
	switch rep.Termination {
	case TermConverged:
		c.Termination = StopConverged
	case TermIterationLimit:
		c.Termination = StopIterationLimit
	default:
		c.Termination = StopStalled
	}
	if rep.Best < len(rep.Runs) && rep.Observations > 0 {
		r := rep.Runs[rep.Best]
		c.FinalRMS = r.RMS
		if len(h) > 0 {
			c.InitialRMS = math.Sqrt(h[0] / float64(rep.Observations))
		}
	}
	return c
}
