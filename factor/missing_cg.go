package factor

// The matrix-free camera step of VarPro for long sequences.
//
// The dense step (missing_varpro.go) forms H = J_rᵀJ_r, an n×n matrix
// with n = 2(r+1)·F, and factors it: (8F)² doubles and (8F)³/3 flops per
// iteration, minutes per iteration from about a thousand frames on. Yet
// cameras couple only through the points they share, and on a turntable
// a track spans a limited run of frames, so H is sparse. Following
// Agarwal, Snavely, Seitz and Szeliski ("Bundle Adjustment in the Large",
// ECCV 2010, §4: the reduced camera system solved by conjugate gradients
// with products computed from the point blocks, never forming it, inside
// an inexact-Newton Levenberg–Marquardt loop) the damped system
//
//	(H + λI) δ = −g
//
// is solved by preconditioned conjugate gradients (Hestenes and Stiefel,
// J. Res. NBS 49, 1952; Saad, "Iterative Methods for Sparse Linear
// Systems", 2nd ed., Algorithm 9.1) with
//
//   - the product with H from the point blocks of the file comment of
//     missing_varpro.go: for point p with observations j (frame f_j),
//     q_{j,a} = v_{f_j,a}·x̃, s = Σ_{j,a} z_{j,a} q_{j,a} (z_{j,a} = L⁻¹ω_j m_{j,a},
//     C_p = LLᵀ), and (H v)_{f_j,a} += (ω_j q_{j,a} − z_{j,a}·s) x̃, i.e.
//     H|_p v = ((Ω − ZᵀZ) ⊗ x̃x̃ᵀ) v, O(r) flops per observation;
//   - the block-Jacobi preconditioner: the per-frame diagonal blocks
//     (H_ff + λI), 2(r+1) × 2(r+1), factored by Cholesky (Agarwal et al.
//     §4, "block Jacobi");
//   - the gauge projection P (missing_varpro.go, "Gauge") applied to the
//     preconditioned residual, so that the iteration runs in the
//     complement of the gauge directions, which H maps into itself;
//   - the forcing sequence of inexact Newton methods: stop when
//     ‖r_i‖_{M⁻¹} ≤ η_k ‖r_0‖_{M⁻¹} with η_k = min(0.1, √(‖g_k‖/‖g_0‖))
//     (Dembo, Eisenstat and Steihaug, SIAM J. Numer. Anal. 19(2), 1982:
//     η_k → 0 with the gradient keeps the convergence superlinear; the
//     0.1 cap is the forcing value of Agarwal et al.), or after
//     incCGMaxIter iterations.
//
// Starting from δ₀ = 0 every CG iterate satisfies δᵢᵀ(H + λI)δᵢ = −gᵀδᵢ
// (the residual is orthogonal to the Krylov space that holds δᵢ), so the
// predicted decrease λ‖δ‖² − gᵀδ of the dense step holds for the
// truncated step as well.
//
// The work per iteration is linear in the observations (plus O(F) for
// the vectors) and the memory is 2r doubles per observation plus a few
// vectors of n; nothing of size n² is allocated.

import "math"

// DefaultIterativeAbove is the number of frames (MissingOptions.
// IterativeAbove) above which the camera step is solved by conjugate
// gradients instead of dense Cholesky. At 200 frames the dense system is
// 1600 × 1600 (20 MB, about a second per factorisation on two cores):
// below it the dense step is fast and exact; above it its cubic cost
// dominates the iteration.
const DefaultIterativeAbove = 200

// incCGMaxIter bounds the conjugate-gradient iterations of one step.
const incCGMaxIter = 500

// Linear solvers of the camera step, as reported in RunReport.
const (
	LinearDenseCholesky = "dense-cholesky"
	LinearPCG           = "pcg-block-jacobi"
)

// incCGWork is the workspace of the matrix-free step.
type incCGWork struct {
	d          incDims
	n          int
	nf         int
	chunks     []int
	sc         []*incScratch
	costs      []float64
	gs         [][]float64 // per-chunk gradients, summed into gs[0]
	blks       [][]float64 // per-chunk diagonal blocks fs×fs per frame, summed into blks[0]
	outs       [][]float64 // per-chunk products
	qs         [][]float64 // per-chunk scratch of the product (2 per observation)
	z          []float64   // per observation 2r: L⁻¹ω m_x, L⁻¹ω m_y (0 for weight 0)
	okP        []bool      // point eliminated with a usable C_p
	prec       []float64   // per frame Cholesky factor of H_ff + λI
	precOK     []bool
	r, y, p, q []float64
	g0         float64 // ‖g‖ at the first linearisation of the run
	iters      int     // CG iterations of the last solve
}

func newIncCGWork(pr *incProblem, d incDims, threads int) *incCGWork {
	w := &incCGWork{d: d, n: d.fs * pr.nf, nf: pr.nf, chunks: pr.chunks(threads), g0: -1}
	nc := len(w.chunks) - 1
	mo := pr.maxObs()
	fs2 := d.fs * d.fs
	for c := 0; c < nc; c++ {
		w.sc = append(w.sc, newIncScratch(d, mo))
		w.gs = append(w.gs, make([]float64, w.n))
		w.blks = append(w.blks, make([]float64, pr.nf*fs2))
		w.outs = append(w.outs, make([]float64, w.n))
		w.qs = append(w.qs, make([]float64, 2*mo))
	}
	w.costs = make([]float64, nc)
	w.z = make([]float64, 2*d.r*len(pr.wt))
	w.okP = make([]bool, pr.np)
	w.prec = make([]float64, pr.nf*fs2)
	w.precOK = make([]bool, pr.nf)
	w.r = make([]float64, w.n)
	w.y = make([]float64, w.n)
	w.p = make([]float64, w.n)
	w.q = make([]float64, w.n)
	return w
}

// build eliminates the points at the cameras u and stores what the
// products need: z per observation, the gradient g = J_uᵀr (gs[0]) and
// the diagonal blocks of H (blks[0]). It returns the cost.
func (w *incCGWork) build(pr *incProblem, u, X []float64) float64 {
	d := w.d
	r, cs, fs := d.r, d.cs, d.fs
	fs2 := fs * fs
	incParallel(w.chunks, func(c, lo, hi int) {
		g, blk, s := w.gs[c], w.blks[c], w.sc[c]
		clear(g)
		clear(blk)
		xt, xx := s.xt, s.xx
		cost := 0.0
		for p := lo; p < hi; p++ {
			cp, ok := pr.solvePoint(p, d, u, X, s)
			cost += cp
			w.okP[p] = ok
			k0, k1 := pr.pStart[p], pr.pStart[p+1]
			if !ok {
				clear(w.z[2*r*k0 : 2*r*k1])
				continue
			}
			x := X[p*r : p*r+r]
			copy(xt, x)
			xt[r] = 1
			for i := 0; i < cs; i++ {
				for j := 0; j < cs; j++ {
					xx[i*cs+j] = xt[i] * xt[j]
				}
			}
			for k := k0; k < k1; k++ {
				zk := w.z[2*r*k : 2*r*k+2*r]
				wt, _, _, ok := pr.obsBlock(k, d, u, x, xt, s.l, g, zk)
				if !ok {
					clear(zk)
					continue
				}
				f := pr.frame[k]
				// Diagonal block of frame f: Π_jj ⊗ x̃x̃ᵀ with
				// Π_jj = ω I₂ − [z_x z_y]ᵀ[z_x z_y].
				var pxx, pxy, pyy float64
				for i := 0; i < r; i++ {
					pxx += zk[i] * zk[i]
					pxy += zk[i] * zk[r+i]
					pyy += zk[r+i] * zk[r+i]
				}
				pi := [4]float64{wt - pxx, -pxy, -pxy, wt - pyy}
				b := blk[f*fs2 : f*fs2+fs2]
				for a := 0; a < 2; a++ {
					for bb := 0; bb < 2; bb++ {
						v := pi[2*a+bb]
						for i := 0; i < cs; i++ {
							row := b[(a*cs+i)*fs+bb*cs : (a*cs+i)*fs+bb*cs+cs]
							xi := xx[i*cs : i*cs+cs]
							for j := range row {
								row[j] += v * xi[j]
							}
						}
					}
				}
			}
		}
		w.costs[c] = cost
	})
	cost := w.costs[0]
	for c := 1; c < len(w.gs); c++ {
		cost += w.costs[c]
		for i, v := range w.gs[c] {
			w.gs[0][i] += v
		}
		for i, v := range w.blks[c] {
			w.blks[0][i] += v
		}
	}
	return cost
}

// maxDiag is the largest diagonal entry of H.
func (w *incCGWork) maxDiag() float64 {
	fs := w.d.fs
	m := 0.0
	for f := 0; f < w.nf; f++ {
		b := w.blks[0][f*fs*fs:]
		for i := 0; i < fs; i++ {
			m = math.Max(m, b[i*fs+i])
		}
	}
	return m
}

// apply sets out = (H + λI) v from the point blocks (see the file
// comment). Per-chunk partial products are summed in chunk order, so the
// result depends on the thread count but not on the scheduling.
func (w *incCGWork) apply(pr *incProblem, X, v, out []float64, lambda float64) {
	d := w.d
	r, cs, fs := d.r, d.cs, d.fs
	incParallel(w.chunks, func(c, lo, hi int) {
		o, q := w.outs[c], w.qs[c]
		clear(o)
		var sbuf [16]float64
		s := sbuf[:r]
		var xtb [16]float64
		xt := xtb[:cs]
		for p := lo; p < hi; p++ {
			if !w.okP[p] {
				continue
			}
			copy(xt, X[p*r:p*r+r])
			xt[r] = 1
			clear(s)
			k0, k1 := pr.pStart[p], pr.pStart[p+1]
			for k := k0; k < k1; k++ {
				if pr.wt[k] == 0 {
					continue
				}
				f := pr.frame[k]
				vx := v[f*fs : f*fs+cs]
				vy := v[f*fs+cs : f*fs+2*cs]
				q0, q1 := 0.0, 0.0
				for i, x := range xt {
					q0 += vx[i] * x
					q1 += vy[i] * x
				}
				j := 2 * (k - k0)
				q[j], q[j+1] = q0, q1
				zk := w.z[2*r*k : 2*r*k+2*r]
				for i := 0; i < r; i++ {
					s[i] += zk[i]*q0 + zk[r+i]*q1
				}
			}
			for k := k0; k < k1; k++ {
				wt := pr.wt[k]
				if wt == 0 {
					continue
				}
				f := pr.frame[k]
				j := 2 * (k - k0)
				zk := w.z[2*r*k : 2*r*k+2*r]
				p0, p1 := wt*q[j], wt*q[j+1]
				for i := 0; i < r; i++ {
					p0 -= zk[i] * s[i]
					p1 -= zk[r+i] * s[i]
				}
				ox := o[f*fs : f*fs+cs]
				oy := o[f*fs+cs : f*fs+2*cs]
				for i, x := range xt {
					ox[i] += p0 * x
					oy[i] += p1 * x
				}
			}
		}
	})
	copy(out, w.outs[0])
	for c := 1; c < len(w.outs); c++ {
		for i, x := range w.outs[c] {
			out[i] += x
		}
	}
	for i, x := range v {
		out[i] += lambda * x
	}
}

// factorPrec factors the damped diagonal blocks H_ff + λI.
func (w *incCGWork) factorPrec(lambda float64) {
	fs := w.d.fs
	fs2 := fs * fs
	a := make([]float64, fs2)
	for f := 0; f < w.nf; f++ {
		copy(a, w.blks[0][f*fs2:f*fs2+fs2])
		for i := 0; i < fs; i++ {
			a[i*fs+i] += lambda
		}
		w.precOK[f] = incCholN(a, fs, w.prec[f*fs2:f*fs2+fs2])
	}
}

// precondition sets y = M⁻¹ r (the block-Jacobi inverse; a block whose
// factorisation failed acts as 1/λ).
func (w *incCGWork) precondition(r, y []float64, lambda float64) {
	fs := w.d.fs
	fs2 := fs * fs
	copy(y, r)
	for f := 0; f < w.nf; f++ {
		yf := y[f*fs : f*fs+fs]
		if !w.precOK[f] {
			for i := range yf {
				yf[i] /= lambda
			}
			continue
		}
		l := w.prec[f*fs2 : f*fs2+fs2]
		incFwdN(l, fs, yf)
		incBwdN(l, fs, yf)
	}
}

func incDot(a, b []float64) float64 {
	s := 0.0
	for i, x := range a {
		s += x * b[i]
	}
	return s
}

// solve sets delta to the truncated PCG solution of (H + λI) δ = −g at
// the normal-form cameras u (projected onto the gauge complement). It
// reports false when the iteration broke down (non-positive curvature or
// a non-finite value, possible only through round-off).
func (w *incCGWork) solve(pr *incProblem, u, X []float64, lambda float64, delta []float64) bool {
	g := w.gs[0]
	gn := math.Sqrt(incDot(g, g))
	if w.g0 < 0 {
		w.g0 = gn
	}
	eta := 0.1
	if w.g0 > 0 {
		eta = math.Min(eta, math.Sqrt(gn/w.g0))
	}
	c := pr.gaugeC()
	w.factorPrec(lambda)
	x, r, y, p, q := delta, w.r, w.y, w.p, w.q
	clear(x)
	for i, v := range g {
		r[i] = -v
	}
	w.precondition(r, y, lambda)
	incProjectGauge(u, y, pr.nf, w.d, c)
	copy(p, y)
	ry := incDot(r, y)
	ry0 := ry
	w.iters = 0
	if !(ry > 0) {
		return ry == 0
	}
	for w.iters < incCGMaxIter {
		w.apply(pr, X, p, q, lambda)
		pq := incDot(p, q)
		if !(pq > 0) || math.IsInf(pq, 0) {
			// Round-off at convergence (p ≈ 0) once some progress is made;
			// a breakdown otherwise.
			return w.iters > 0
		}
		alpha := ry / pq
		for i := range x {
			x[i] += alpha * p[i]
			r[i] -= alpha * q[i]
		}
		w.iters++
		w.precondition(r, y, lambda)
		incProjectGauge(u, y, pr.nf, w.d, c)
		ryN := incDot(r, y)
		if math.IsNaN(ryN) || math.IsInf(ryN, 0) {
			return false
		}
		// A value ≤ 0 is round-off at convergence.
		if ryN <= eta*eta*ry0 {
			break
		}
		beta := ryN / ry
		ry = ryN
		for i := range p {
			p[i] = y[i] + beta*p[i]
		}
	}
	return true
}
