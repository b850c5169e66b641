package factor

// Alternating least squares (ALS) for W ≈ [M t][X; 1] over the observed
// entries, the baseline of the missing-data literature (Wiberg, 1976;
// Buchanan and Fitzgibbon, CVPR 2005, who show its slow "flatlining"
// convergence; Hong and Fitzgibbon, ICCV 2015). One sweep solves every
// camera given the points and then every point given the cameras (the
// VarPro elimination, C_p X_p = b_p),
//
//	U_f = B_f A_f⁻¹,  A_f = Σ_p ω_fp x̃_p x̃_pᵀ,  B_f = Σ_p ω_fp w_fp x̃_pᵀ (2×(r+1)),
//
// each step lowering the cost, so the cost after a sweep is the reduced
// cost f(U) of VarPro and the two solvers' histories compare directly. The
// cameras are put back in the normal form of the gauge (see
// missing_varpro.go) after every sweep, which leaves the cost unchanged.

import "context"

// cameraStep solves every camera in frames lo…hi−1 given the points.
func (pr *incProblem) cameraStep(lo, hi int, d incDims, u, X []float64) {
	r, cs, fs := d.r, d.cs, d.fs
	a := make([]float64, cs*cs)
	l := make([]float64, cs*cs)
	bx := make([]float64, cs)
	by := make([]float64, cs)
	xt := make([]float64, cs)
	for f := lo; f < hi; f++ {
		clear(a)
		clear(bx)
		clear(by)
		for _, k := range pr.fObs[pr.fStart[f]:pr.fStart[f+1]] {
			w := pr.wt[k]
			if w == 0 {
				continue
			}
			copy(xt, X[pr.obsPt[k]*r:pr.obsPt[k]*r+r])
			xt[r] = 1
			for i := 0; i < cs; i++ {
				wi := w * xt[i]
				ai := a[i*cs : i*cs+cs]
				for j := 0; j <= i; j++ {
					ai[j] += wi * xt[j]
				}
				bx[i] += wi * pr.obsX[k]
				by[i] += wi * pr.obsY[k]
			}
		}
		for i := 0; i < cs; i++ {
			for j := 0; j < i; j++ {
				a[j*cs+i] = a[i*cs+j]
			}
		}
		if !incCholN(a, cs, l) {
			continue // too few points in general position: keep the camera
		}
		incFwdN(l, cs, bx)
		incBwdN(l, cs, bx)
		incFwdN(l, cs, by)
		incBwdN(l, cs, by)
		copy(u[f*fs:f*fs+cs], bx)
		copy(u[f*fs+cs:f*fs+2*cs], by)
	}
}

// als runs alternating least squares from the normal-form cameras u.
func (pr *incProblem) als(ctx context.Context, u []float64, d incDims, maxIter int, tol float64, threads int) (*incRun, error) {
	X := make([]float64, d.r*pr.np)
	pb := pr.chunks(threads)
	sc := make([]*incScratch, len(pb)-1)
	mo := pr.maxObs()
	for i := range sc {
		sc[i] = newIncScratch(d, mo)
	}
	cost := pr.evalCost(u, X, d, pb, sc)
	out := &incRun{report: RunReport{Termination: TermIterationLimit, Evaluations: 1}}
	out.report.CostHistory = append(out.report.CostHistory, cost)
	fb := incFrameChunks(pr.nf, threads)
	c := pr.gaugeC()
	for out.report.Iterations < maxIter {
		if err := checkCtx(ctx); err != nil {
			return nil, err
		}
		if cost <= pr.costFloor() {
			out.report.Termination = TermConverged
			break
		}
		incParallel(fb, func(_, lo, hi int) { pr.cameraStep(lo, hi, d, u, X) })
		if !incRetract(u, pr.nf, d, c) {
			out.report.Termination = TermNoProgress
			break
		}
		next := pr.evalCost(u, X, d, pb, sc)
		out.report.Evaluations++
		out.report.Iterations++
		out.report.CostHistory = append(out.report.CostHistory, next)
		rel := (cost - next) / cost
		cost = next
		if rel < tol {
			out.report.Termination = TermConverged
			break
		}
	}
	out.u, out.X, out.cost = u, X, cost
	return out, nil
}
