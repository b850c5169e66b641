package factor

// Variable projection (VarPro) for W ≈ [M t][X; 1] over the observed
// entries, written for a structure of dimension r (3 for the model; more
// for the lifted first stage of random starts, below).
//
// # Elimination of the points
//
// Given the cameras U_f = [M_f t_f] every point is a small linear
// least-squares problem,
//
//	X_p(U) = C_p⁻¹ b_p,  C_p = Σ_f ω_fp M_fᵀM_f,  b_p = Σ_f ω_fp M_fᵀ(w_fp − t_f),
//
// over the frames that observe p, so the cost becomes a function of the
// cameras alone, f(U) = C(U, X(U)) (Golub and Pereyra, SIAM J. Numer. Anal.
// 10, 1973). The translation is part of the camera block; the fixed row of
// ones in [X; 1] makes it enter every residual linearly.
//
// # The reduced Gauss–Newton system
//
// With r the weighted residual vector, J_u and J_v its Jacobians with
// respect to the cameras and the points, the reduced Jacobian with
// Kaufman's approximation (the Ruhe–Wedin RW2 variant, Hong, Zach and
// Fitzgibbon, CVPR 2017; the Wiberg Jacobian of Okatani and Deguchi,
// IJCV 72(3), 2007) is J_r = (I − J_v J_v⁺) J_u, and the step solves
//
//	(J_rᵀJ_r + λI) δ = −J_uᵀ r,
//
// i.e. Levenberg–Marquardt damping on the camera block only, the points
// re-eliminated after every step (Hong et al. show this is the joint
// Gauss–Newton step with an undamped point block). For one point with
// observations in frames f₁…f_n, J_u is block-diagonal with blocks
// −I₂ ⊗ x̃ᵀ (x̃ = [X_p; 1]) and J_v stacks −M_f, so its contribution is
//
//	J_rᵀJ_r |_p = (Ω − ΩM C_p⁻¹ MᵀΩ) ⊗ x̃x̃ᵀ,
//
// a (2n×2n) ⊗ ((r+1)×(r+1)) Kronecker product (M the 2n×r stack, Ω the
// weights), and the gradient is Σ −ω_fp e_fp ⊗ x̃. Every point is
// independent, so the sums run in parallel. Up to
// MissingOptions.IterativeAbove frames (default 200) H is formed and
// factored by dense Cholesky; beyond, the step is solved by conjugate
// gradients with products from these point blocks, never forming H
// (missing_cg.go).
//
// # Gauge
//
// f(U) = f(U G) for every affine G = [A b; 0 1] (r² + r dimensions).
// Following Hong and Fitzgibbon (ICCV 2015, their "projection" and
// "retraction"; cited from memory) the cameras are kept in a normal form — after every step
// the stacked M is replaced by √c·Q with M = QR (so MᵀM = cI, c = 2F/3,
// the value true rotations give on average) and t by (I − QQᵀ)t — and the
// step is projected onto the complement of the gauge directions
// {(M A, M b)}: δM ← (I − MMᵀ/c) δM, δt ← (I − MMᵀ/c) δt. J_r annihilates
// the gauge directions exactly, so the projection only removes round-off,
// and the damping λI (not Marquardt's diagonal scaling) keeps the step in
// the complement.
//
// # Damping schedule
//
// λ starts at 1e-2 × the largest diagonal entry of J_rᵀJ_r; after an
// accepted step with gain ratio ρ it is multiplied by max(1/3, 1 − (2ρ−1)³),
// after a rejected one by ν (ν = 2, doubling on every further rejection)
// (Nielsen, IMM-REP-1999-05; Madsen, Nielsen and Tingleff, "Methods for
// non-linear least squares problems", 2004).
//
// # Lifted random starts
//
// On banded (turntable) patterns the rank-3 cost has spurious minima in
// which parts of the sequence are glued together wrongly (a run of frames
// folded onto its mirror image, or compressed, with the residual piled up
// where it meets the rest). A random start therefore first runs VarPro
// with the structure lifted to r = 3 + Lift dimensions — the extra
// dimensions let a folded segment turn round without passing through a
// flat configuration, the over-parameterisation argument of Burer and
// Monteiro (Math. Program. 95, 2003) for low-rank problems — and is then
// truncated to rank 3 by the SVD of M·(X̃X̃ᵀ)^½ (X̃ the centred structure:
// the best rank-3 approximation of the fitted M X̃) before the rank-3 run.
// This stage is our addition to the cited VarPro method; on the 36 × 319
// turntable band of the tests it raises the share of random starts that
// reach the best optimum from 68 % to 100 % (TestIncompleteSuccessRate).

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"time"

	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/blas64"
	"gonum.org/v1/gonum/lapack/lapack64"
	"gonum.org/v1/gonum/mat"
)

// incDims is the layout of a run with structure dimension r: camera row a
// (0 = x, 1 = y) of frame f is u[f·fs + a·cs : +cs] = (m₁ … m_r, t), point p
// is X[p·r : +r].
type incDims struct{ r, cs, fs int }

func incDim(r int) incDims { return incDims{r: r, cs: r + 1, fs: 2 * (r + 1)} }

// incCholN factors the r×r symmetric c (row-major) as LLᵀ into l.
func incCholN(c []float64, r int, l []float64) bool {
	for j := 0; j < r; j++ {
		s := c[j*r+j]
		for k := 0; k < j; k++ {
			s -= l[j*r+k] * l[j*r+k]
		}
		if !(s > 1e-14*c[j*r+j]) || !(s > 0) {
			return false
		}
		d := math.Sqrt(s)
		l[j*r+j] = d
		for i := j + 1; i < r; i++ {
			s := c[i*r+j]
			for k := 0; k < j; k++ {
				s -= l[i*r+k] * l[j*r+k]
			}
			l[i*r+j] = s / d
		}
	}
	return true
}

// incFwdN solves L y = b in place (b becomes y).
func incFwdN(l []float64, r int, b []float64) {
	for i := 0; i < r; i++ {
		s := b[i]
		for k := 0; k < i; k++ {
			s -= l[i*r+k] * b[k]
		}
		b[i] = s / l[i*r+i]
	}
}

// incBwdN solves Lᵀ x = y in place.
func incBwdN(l []float64, r int, y []float64) {
	for i := r - 1; i >= 0; i-- {
		s := y[i]
		for k := i + 1; k < r; k++ {
			s -= l[k*r+i] * y[k]
		}
		y[i] = s / l[i*r+i]
	}
}

// incCholSolve factors the n×n symmetric positive-definite a (upper
// triangle, row-major; overwritten by the factor) and solves a x = b in
// place. It skips the condition estimate of mat.Cholesky, which costs as
// much as the factorization here.
func incCholSolve(a []float64, n int, b []float64) bool {
	t, ok := lapack64.Potrf(blas64.Symmetric{N: n, Stride: n, Data: a, Uplo: blas.Upper})
	if !ok {
		return false
	}
	lapack64.Potrs(t, blas64.General{Rows: n, Cols: 1, Stride: 1, Data: b})
	for _, v := range b {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return false
		}
	}
	return true
}

// incScratch is per-goroutine scratch for the point eliminations.
type incScratch struct {
	c, l, b []float64
	z       []float64 // per observation: L⁻¹ω m_x, L⁻¹ω m_y, ω e_x, ω e_y
	xt, xx  []float64 // x̃ and x̃x̃ᵀ
}

func newIncScratch(d incDims, maxObs int) *incScratch {
	r := d.r
	return &incScratch{c: make([]float64, r*r), l: make([]float64, r*r), b: make([]float64, r),
		z: make([]float64, (2*r+2)*maxObs), xt: make([]float64, r+1), xx: make([]float64, (r+1)*(r+1))}
}

func (pr *incProblem) maxObs() int {
	n := 0
	for p := 0; p < pr.np; p++ {
		n = max(n, pr.pStart[p+1]-pr.pStart[p])
	}
	return n
}

// solvePoint eliminates point p (X_p = C_p⁻¹ b_p), returns its weighted
// cost and leaves the Cholesky factor of C_p in s.l. When C_p is singular
// (all weights zero, or cameras of rank < r) X_p is left as it was and ok
// is false.
func (pr *incProblem) solvePoint(p int, d incDims, u, X []float64, s *incScratch) (cost float64, ok bool) {
	r, cs, fs := d.r, d.cs, d.fs
	k0, k1 := pr.pStart[p], pr.pStart[p+1]
	c, b := s.c, s.b
	clear(c)
	clear(b)
	for k := k0; k < k1; k++ {
		w := pr.wt[k]
		if w == 0 {
			continue
		}
		f := pr.frame[k]
		mx := u[f*fs : f*fs+cs]
		my := u[f*fs+cs : f*fs+2*cs]
		rx, ry := w*(pr.obsX[k]-mx[r]), w*(pr.obsY[k]-my[r])
		for i := 0; i < r; i++ {
			b[i] += mx[i]*rx + my[i]*ry
			wxi, wyi := w*mx[i], w*my[i]
			ci := c[i*r : i*r+r]
			for j := 0; j <= i; j++ {
				ci[j] += wxi*mx[j] + wyi*my[j]
			}
		}
	}
	for i := 0; i < r; i++ {
		for j := 0; j < i; j++ {
			c[j*r+i] = c[i*r+j]
		}
	}
	ok = incCholN(c, r, s.l)
	if !ok {
		// A ridge of 1e-12 × trace keeps nearly singular points finite.
		tr := 0.0
		for i := 0; i < r; i++ {
			tr += c[i*r+i]
		}
		for i := 0; i < r; i++ {
			c[i*r+i] += 1e-12 * tr
		}
		ok = incCholN(c, r, s.l)
	}
	x := X[p*r : p*r+r]
	if ok {
		incFwdN(s.l, r, b)
		incBwdN(s.l, r, b)
		copy(x, b)
	}
	for k := k0; k < k1; k++ {
		w := pr.wt[k]
		if w == 0 {
			continue
		}
		f := pr.frame[k]
		mx := u[f*fs : f*fs+cs]
		my := u[f*fs+cs : f*fs+2*cs]
		ex, ey := pr.obsX[k]-mx[r], pr.obsY[k]-my[r]
		for i := 0; i < r; i++ {
			ex -= mx[i] * x[i]
			ey -= my[i] * x[i]
		}
		cost += w * (ex*ex + ey*ey)
	}
	return cost, ok
}

// evalCost eliminates every point and returns the weighted cost f(U).
func (pr *incProblem) evalCost(u, X []float64, d incDims, b []int, sc []*incScratch) float64 {
	part := make([]float64, len(b)-1)
	incParallel(b, func(c, lo, hi int) {
		s := 0.0
		for p := lo; p < hi; p++ {
			cp, _ := pr.solvePoint(p, d, u, X, sc[c])
			s += cp
		}
		part[c] = s
	})
	s := 0.0
	for _, v := range part {
		s += v
	}
	return s
}

// incRetract puts the cameras in the normal form of the gauge: MᵀM = cI
// and Mᵀt = 0 (see the file comment). It reports false when M has rank
// < r.
func incRetract(u []float64, nf int, d incDims, c float64) bool {
	r, cs := d.r, d.cs
	g := make([]float64, r*r)
	l := make([]float64, r*r)
	for row := 0; row < 2*nf; row++ {
		m := u[row*cs : row*cs+r]
		for i := 0; i < r; i++ {
			for j := 0; j <= i; j++ {
				g[i*r+j] += m[i] * m[j]
			}
		}
	}
	for i := 0; i < r; i++ {
		for j := 0; j < i; j++ {
			g[j*r+i] = g[i*r+j]
		}
	}
	if !incCholN(g, r, l) {
		return false
	}
	// Q = M L⁻ᵀ: row q = L⁻¹ m. Qᵀt = Σ q t.
	qt := make([]float64, r)
	for row := 0; row < 2*nf; row++ {
		m := u[row*cs : row*cs+cs]
		incFwdN(l, r, m[:r])
		for i := 0; i < r; i++ {
			qt[i] += m[i] * m[r]
		}
	}
	sc := math.Sqrt(c)
	for row := 0; row < 2*nf; row++ {
		m := u[row*cs : row*cs+cs]
		for i := 0; i < r; i++ {
			m[r] -= m[i] * qt[i]
		}
		for i := 0; i < r; i++ {
			m[i] *= sc
		}
	}
	return true
}

// incProjectGauge removes from v (a step or gradient of the camera block)
// its components along the gauge directions {(M A, M b)} at the
// normal-form cameras u: every column of δM and δt loses its part in
// span(M).
func incProjectGauge(u, v []float64, nf int, d incDims, c float64) {
	r, cs := d.r, d.cs
	a := make([]float64, cs*r) // a[j·r + i] = (Mᵀ v_col j)_i / c
	for row := 0; row < 2*nf; row++ {
		m := u[row*cs : row*cs+r]
		vr := v[row*cs : row*cs+cs]
		for j := 0; j < cs; j++ {
			aj := a[j*r : j*r+r]
			for i := 0; i < r; i++ {
				aj[i] += m[i] * vr[j]
			}
		}
	}
	for i := range a {
		a[i] /= c
	}
	for row := 0; row < 2*nf; row++ {
		m := u[row*cs : row*cs+r]
		vr := v[row*cs : row*cs+cs]
		for j := 0; j < cs; j++ {
			aj := a[j*r : j*r+r]
			s := 0.0
			for i := 0; i < r; i++ {
				s += m[i] * aj[i]
			}
			vr[j] -= s
		}
	}
}

// incRandomStart draws every camera entry from N(0, 1) (Hong and
// Fitzgibbon, ICCV 2015: random initialisation of the factor that is
// not eliminated) and puts the cameras in normal form.
func incRandomStart(pr *incProblem, d incDims, seed, run uint64) []float64 {
	rng := rand.New(rand.NewPCG(seed, run))
	u := make([]float64, d.fs*pr.nf)
	for {
		for i := range u {
			u[i] = rng.NormFloat64()
		}
		if incRetract(u, pr.nf, d, pr.gaugeC()) {
			return u
		}
	}
}

// incTruncate maps a lifted fit (dimension d.r) to rank 3: with X̃ the
// centred structure and G = (X̃X̃ᵀ)^½, the best rank-3 approximation of
// M X̃ = (MG)(G⁻¹X̃) keeps the top three right singular vectors V₃ of MG,
// so M₃ = M G V₃ and t₃ = t + M x̄.
func incTruncate(pr *incProblem, d incDims, u, X []float64) ([]float64, bool) {
	r, cs := d.r, d.cs
	xm := make([]float64, r)
	for p := 0; p < pr.np; p++ {
		for i := 0; i < r; i++ {
			xm[i] += X[p*r+i] / float64(pr.np)
		}
	}
	S := mat.NewSymDense(r, nil)
	for p := 0; p < pr.np; p++ {
		for i := 0; i < r; i++ {
			for j := i; j < r; j++ {
				S.SetSym(i, j, S.At(i, j)+(X[p*r+i]-xm[i])*(X[p*r+j]-xm[j]))
			}
		}
	}
	var eig mat.EigenSym
	if !eig.Factorize(S, true) {
		return nil, false
	}
	ev := eig.Values(nil)
	var E mat.Dense
	eig.VectorsTo(&E)
	G := mat.NewDense(r, r, nil)
	for i := 0; i < r; i++ {
		for j := 0; j < r; j++ {
			s := 0.0
			for k := 0; k < r; k++ {
				s += E.At(i, k) * math.Sqrt(math.Max(ev[k], 0)) * E.At(j, k)
			}
			G.Set(i, j, s)
		}
	}
	M := mat.NewDense(2*pr.nf, r, nil)
	for row := 0; row < 2*pr.nf; row++ {
		M.SetRow(row, u[row*cs:row*cs+r])
	}
	var B mat.Dense
	B.Mul(M, G)
	var svd mat.SVD
	if !svd.Factorize(&B, mat.SVDThinV) {
		return nil, false
	}
	var V mat.Dense
	svd.VTo(&V)
	var GV mat.Dense
	GV.Mul(G, V.Slice(0, r, 0, 3))
	var M3 mat.Dense
	M3.Mul(M, &GV)
	d3 := incDim(3)
	out := make([]float64, d3.fs*pr.nf)
	for row := 0; row < 2*pr.nf; row++ {
		m := u[row*cs : row*cs+cs]
		t := m[r]
		for i := 0; i < r; i++ {
			t += m[i] * xm[i]
		}
		o := out[row*d3.cs : row*d3.cs+d3.cs]
		o[0], o[1], o[2], o[3] = M3.At(row, 0), M3.At(row, 1), M3.At(row, 2), t
	}
	return out, incRetract(out, pr.nf, d3, pr.gaugeC())
}

// incSolveSpec says how one run goes.
type incSolveSpec struct {
	solver  Solver
	maxIter int
	tol     float64
	threads int
	// lift > 0 runs a first VarPro stage in dimension 3 + lift from u0
	// (which must then have that layout) for at most liftIter iterations.
	lift, liftIter int
	// iterative solves the VarPro camera step by conjugate gradients
	// (missing_cg.go) instead of dense Cholesky.
	iterative bool
}

// solve runs one minimisation from u0 (copied).
func (pr *incProblem) solve(ctx context.Context, u0 []float64, sp incSolveSpec) (*incRun, error) {
	start := time.Now()
	u := append([]float64(nil), u0...)
	d3 := incDim(3)
	var lifted *incRun
	if sp.lift > 0 {
		dl := incDim(3 + sp.lift)
		if !incRetract(u, pr.nf, dl, pr.gaugeC()) {
			return nil, fmt.Errorf("factor: %w: the lifted random start has rank < %d", ErrMetricUpgrade, dl.r)
		}
		var err error
		// The lifted stage only has to find the basin: a looser tolerance.
		lifted, err = pr.varpro(ctx, u, dl, sp.liftIter, math.Max(sp.tol, 1e-6), sp.threads, sp.iterative)
		if err != nil {
			return nil, err
		}
		u3, ok := incTruncate(pr, dl, lifted.u, lifted.X)
		if !ok {
			// Degenerate lifted fit (not seen in practice): keep its first
			// three structure dimensions.
			u3 = make([]float64, d3.fs*pr.nf)
			for row := 0; row < 2*pr.nf; row++ {
				copy(u3[row*d3.cs:row*d3.cs+3], lifted.u[row*dl.cs:row*dl.cs+3])
				u3[row*d3.cs+3] = lifted.u[row*dl.cs+dl.r]
			}
		}
		u = u3
	}
	if !incRetract(u, pr.nf, d3, pr.gaugeC()) {
		return nil, fmt.Errorf("factor: %w: the starting cameras have rank < 3; the initial block may be planar", ErrMetricUpgrade)
	}
	var out *incRun
	var err error
	if sp.solver == SolverALS {
		out, err = pr.als(ctx, u, d3, sp.maxIter, sp.tol, sp.threads)
	} else {
		out, err = pr.varpro(ctx, u, d3, sp.maxIter, sp.tol, sp.threads, sp.iterative)
	}
	if err != nil {
		return nil, err
	}
	if lifted != nil {
		out.report.LiftedIterations = lifted.report.Iterations
		out.report.Evaluations += lifted.report.Evaluations
		out.report.CGIterations += lifted.report.CGIterations
		out.report.CGSolves += lifted.report.CGSolves
	}
	s2 := pr.norm.scale * pr.norm.scale
	for i := range out.report.CostHistory {
		out.report.CostHistory[i] *= s2
	}
	out.report.Cost = out.cost * s2
	if n := pr.inlierCount(); n > 0 {
		out.report.RMS = pr.norm.scale * math.Sqrt(out.cost/float64(2*n))
	}
	out.report.Seconds = time.Since(start).Seconds()
	return out, nil
}

// incVPWork is the workspace of one VarPro run.
type incVPWork struct {
	d      incDims
	n      int // unknowns of the camera block
	chunks []int
	hs, gs [][]float64 // per-chunk normal equations and gradients
	sc     []*incScratch
	costs  []float64
	A      []float64
	delta  []float64
}

func newIncVPWork(pr *incProblem, d incDims, threads int) *incVPWork {
	w := &incVPWork{d: d, n: d.fs * pr.nf, chunks: pr.chunks(threads)}
	nc := len(w.chunks) - 1
	mo := pr.maxObs()
	for c := 0; c < nc; c++ {
		w.hs = append(w.hs, make([]float64, w.n*w.n))
		w.gs = append(w.gs, make([]float64, w.n))
		w.sc = append(w.sc, newIncScratch(d, mo))
	}
	w.costs = make([]float64, nc)
	w.A = make([]float64, w.n*w.n)
	w.delta = make([]float64, w.n)
	return w
}

// build eliminates the points and assembles the upper triangle of
// H = J_rᵀJ_r in w.hs[0] and g = J_uᵀr in w.gs[0]; it returns the cost.
func (w *incVPWork) build(pr *incProblem, u, X []float64) float64 {
	incParallel(w.chunks, func(c, lo, hi int) {
		h, g := w.hs[c], w.gs[c]
		clear(h)
		clear(g)
		w.costs[c] = pr.buildRange(lo, hi, w.d, u, X, h, g, w.sc[c])
	})
	cost := w.costs[0]
	n := w.n
	for c := 1; c < len(w.hs); c++ {
		cost += w.costs[c]
		h0, hc := w.hs[0], w.hs[c]
		for i := 0; i < n; i++ {
			r0, rc := h0[i*n+i:(i+1)*n], hc[i*n+i:(i+1)*n]
			for j, v := range rc {
				r0[j] += v
			}
		}
		for i, v := range w.gs[c] {
			w.gs[0][i] += v
		}
	}
	return cost
}

// obsBlock is one observation k of a point at x (x̃ = (x, 1) in xt, L
// its Cholesky factor l) at the cameras u: it returns the weight ω and the
// residual (ex, ey), subtracts the gradient ω·e·x̃ from frame k's block
// of g and writes z = L⁻¹·ω·(m_x, m_y) into z[:2r] (a column of
// Z = L⁻¹(ΩM)ᵀ). ok is false, and nothing is written, for an observation
// of weight 0.
func (pr *incProblem) obsBlock(k int, d incDims, u, x, xt, l, g, z []float64) (w, ex, ey float64, ok bool) {
	r, cs, fs := d.r, d.cs, d.fs
	w = pr.wt[k]
	if w == 0 {
		return 0, 0, 0, false
	}
	f := pr.frame[k]
	mx := u[f*fs : f*fs+cs]
	my := u[f*fs+cs : f*fs+2*cs]
	ex, ey = pr.obsX[k]-mx[r], pr.obsY[k]-my[r]
	for i := 0; i < r; i++ {
		ex -= mx[i] * x[i]
		ey -= my[i] * x[i]
	}
	gf := g[f*fs : f*fs+fs]
	for i := 0; i < cs; i++ {
		gf[i] -= w * ex * xt[i]
		gf[cs+i] -= w * ey * xt[i]
	}
	for i := 0; i < r; i++ {
		z[i] = w * mx[i]
		z[r+i] = w * my[i]
	}
	incFwdN(l, r, z[:r])
	incFwdN(l, r, z[r:2*r])
	return w, ex, ey, true
}

// buildRange adds the contributions of points lo…hi−1 (see the file
// comment): per point the Kronecker product Π ⊗ x̃x̃ᵀ with
// Π = Ω − ΩM C⁻¹MᵀΩ = Ω − ZᵀZ, Z = L⁻¹(ΩM)ᵀ, C = LLᵀ.
func (pr *incProblem) buildRange(lo, hi int, d incDims, u, X, H, g []float64, s *incScratch) float64 {
	r, cs, fs := d.r, d.cs, d.fs
	n := fs * pr.nf
	zs := 2*r + 2
	xt, xx := s.xt, s.xx
	cost := 0.0
	for p := lo; p < hi; p++ {
		cp, ok := pr.solvePoint(p, d, u, X, s)
		cost += cp
		if !ok {
			continue
		}
		k0, k1 := pr.pStart[p], pr.pStart[p+1]
		x := X[p*r : p*r+r]
		copy(xt, x)
		xt[r] = 1
		for j := 0; j < k1-k0; j++ {
			k := k0 + j
			zj := s.z[zs*j : zs*j+zs]
			w, ex, ey, ok := pr.obsBlock(k, d, u, x, xt, s.l, g, zj)
			if !ok {
				clear(zj)
				continue
			}
			zj[2*r], zj[2*r+1] = w*ex, w*ey
		}
		for i := 0; i < cs; i++ {
			for j := 0; j < cs; j++ {
				xx[i*cs+j] = xt[i] * xt[j]
			}
		}
		// For each pair of observations (j1 ≤ j2) and row a of the first,
		// both rows b of the second go at once: the 2×2 block of Π times
		// x̃x̃ᵀ fills cs rows of 2cs contiguous entries. With j1 = j2 and
		// a = 1 the b = 0 half lands in the lower triangle, which nothing
		// reads.
		for j1 := 0; j1 < k1-k0; j1++ {
			w1 := pr.wt[k0+j1]
			if w1 == 0 {
				continue
			}
			f1 := pr.frame[k0+j1]
			for a := 0; a < 2; a++ {
				za := s.z[zs*j1+r*a : zs*j1+r*a+r]
				base := (f1*fs + a*cs) * n
				for j2 := j1; j2 < k1-k0; j2++ {
					if pr.wt[k0+j2] == 0 {
						continue
					}
					zb := s.z[zs*j2 : zs*j2+2*r]
					p0, p1 := 0.0, 0.0
					for i, v := range za {
						p0 -= v * zb[i]
						p1 -= v * zb[r+i]
					}
					if j2 == j1 {
						if a == 0 {
							p0 += w1
						} else {
							p1 += w1
						}
					}
					addOuter2(H[base+pr.frame[k0+j2]*fs:], n, p0, p1, xx, cs)
				}
			}
		}
	}
	return cost
}

// addOuter2 adds [p0·xx | p1·xx] (cs rows of 2cs entries; xx is cs×cs,
// row-major) to the block of h (row stride n) that starts at h[0];
// unrolled for the rank-3 (cs = 4) and the default lifted (cs = 5)
// layouts.
func addOuter2(h []float64, n int, p0, p1 float64, xx []float64, cs int) {
	if cs == 4 {
		xx = xx[:16]
		for i := 0; i < 4; i++ {
			row := h[i*n : i*n+8 : i*n+8]
			x := xx[4*i : 4*i+4 : 4*i+4]
			x0, x1, x2, x3 := x[0], x[1], x[2], x[3]
			row[0] += p0 * x0
			row[1] += p0 * x1
			row[2] += p0 * x2
			row[3] += p0 * x3
			row[4] += p1 * x0
			row[5] += p1 * x1
			row[6] += p1 * x2
			row[7] += p1 * x3
		}
		return
	}
	if cs == 5 {
		xx = xx[:25]
		for i := 0; i < 5; i++ {
			row := h[i*n : i*n+10 : i*n+10]
			x := xx[5*i : 5*i+5 : 5*i+5]
			x0, x1, x2, x3, x4 := x[0], x[1], x[2], x[3], x[4]
			row[0] += p0 * x0
			row[1] += p0 * x1
			row[2] += p0 * x2
			row[3] += p0 * x3
			row[4] += p0 * x4
			row[5] += p1 * x0
			row[6] += p1 * x1
			row[7] += p1 * x2
			row[8] += p1 * x3
			row[9] += p1 * x4
		}
		return
	}
	for i := 0; i < cs; i++ {
		row := h[i*n : i*n+2*cs]
		r0, r1 := row[:cs], row[cs:]
		x := xx[cs*i : cs*i+cs]
		for j, v := range x {
			r0[j] += p0 * v
			r1[j] += p1 * v
		}
	}
}

// varpro runs damped Gauss–Newton on the reduced cost f(U) (see the file
// comment) from the normal-form cameras u (layout d). With iterative the
// camera step is solved by preconditioned conjugate gradients without
// forming H (missing_cg.go); otherwise H is formed and factored.
func (pr *incProblem) varpro(ctx context.Context, u []float64, d incDims, maxIter int, tol float64, threads int, iterative bool) (*incRun, error) {
	n := d.fs * pr.nf
	var (
		build   func(u, X []float64) float64
		maxDiag func() float64
		grad    func() []float64
		step    func(u, X []float64, lambda float64, delta []float64) bool
		chunks  []int
		sc      []*incScratch
	)
	out := &incRun{report: RunReport{Termination: TermIterationLimit, Evaluations: 1, LinearSolver: LinearDenseCholesky}}
	if iterative {
		w := newIncCGWork(pr, d, threads)
		build = func(u, X []float64) float64 { return w.build(pr, u, X) }
		maxDiag = w.maxDiag
		grad = func() []float64 { return w.gs[0] }
		step = func(u, X []float64, lambda float64, delta []float64) bool {
			ok := w.solve(pr, u, X, lambda, delta)
			out.report.CGIterations += w.iters
			out.report.CGSolves++
			for i := range delta {
				delta[i] = -delta[i] // solve returns δ of (H + λI)δ = −g; the loop negates
			}
			return ok
		}
		chunks, sc = w.chunks, w.sc
		out.report.LinearSolver = LinearPCG
	} else {
		w := newIncVPWork(pr, d, threads)
		build = func(u, X []float64) float64 { return w.build(pr, u, X) }
		maxDiag = func() float64 {
			m := 0.0
			for i := 0; i < n; i++ {
				m = math.Max(m, w.hs[0][i*n+i])
			}
			return m
		}
		grad = func() []float64 { return w.gs[0] }
		step = func(_, _ []float64, lambda float64, delta []float64) bool {
			H := w.hs[0]
			for i := 0; i < n; i++ {
				copy(w.A[i*n+i:(i+1)*n], H[i*n+i:(i+1)*n])
				w.A[i*n+i] += lambda
			}
			copy(delta, grad())
			return incCholSolve(w.A, n, delta)
		}
		chunks, sc = w.chunks, w.sc
	}
	c := pr.gaugeC()
	X := make([]float64, d.r*pr.np)
	XT := make([]float64, d.r*pr.np)
	uT := make([]float64, n)
	dl := make([]float64, n)
	cost := build(u, X)
	out.report.CostHistory = append(out.report.CostHistory, cost)
	md := maxDiag()
	lambda := 1e-2 * md
	nu := 2.0
	for out.report.Iterations < maxIter {
		if err := checkCtx(ctx); err != nil {
			return nil, err
		}
		if cost <= pr.costFloor() || md == 0 {
			out.report.Termination = TermConverged
			break
		}
		g := grad()
		incProjectGauge(u, g, pr.nf, d, c)
		accepted := false
		var costT float64
		for !accepted {
			if err := checkCtx(ctx); err != nil {
				return nil, err
			}
			if lambda > 1e12*md {
				out.report.Termination = TermNoProgress
				break
			}
			// step leaves the solution of (H + λI) x = g in dl.
			if !step(u, X, lambda, dl) {
				lambda *= nu
				nu *= 2
				continue
			}
			incProjectGauge(u, dl, pr.nf, d, c)
			dd, gd := 0.0, 0.0
			for i := range dl {
				dl[i] = -dl[i]
				dd += dl[i] * dl[i]
				gd += g[i] * dl[i]
				uT[i] = u[i] + dl[i]
			}
			pred := lambda*dd - gd // predicted decrease of Σω‖e‖²
			ok := incRetract(uT, pr.nf, d, c)
			if ok {
				copy(XT, X)
				costT = pr.evalCost(uT, XT, d, chunks, sc)
				out.report.Evaluations++
			}
			if ok && costT < cost {
				rho := 1.0
				if pred > 0 {
					rho = (cost - costT) / pred
				}
				lambda *= math.Max(1.0/3, 1-math.Pow(2*rho-1, 3))
				nu = 2
				accepted = true
			} else {
				lambda *= nu
				nu *= 2
			}
		}
		if !accepted {
			break
		}
		out.report.Iterations++
		rel := (cost - costT) / cost
		u, uT = uT, u
		out.report.CostHistory = append(out.report.CostHistory, costT)
		if rel < tol {
			cost = costT
			X, XT = XT, X
			out.report.Termination = TermConverged
			break
		}
		cost = build(u, X)
		md = maxDiag()
	}
	out.u, out.X, out.cost = u, X, cost
	return out, nil
}
