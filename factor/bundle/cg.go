package bundle

// The matrix-free reduced camera system for long sequences.
//
// The Schur path (linear.go) forms S = U − Σ_j W_j V_j⁻¹ W_jᵀ densely and
// factors it: (N)² doubles and N³/3 flops per iteration for N ≈ 6F camera
// parameters — 2.6 GB and about an hour per iteration at 3000 frames.
// Cameras couple only through the points they share, so S is sparse, and
// a product with it costs only a pass over the observations:
//
//	S v = U v − Σ_j W_j (V_j⁻¹ (W_jᵀ v)),
//
// with U = J_cᵀJ_c block-structured (a block per camera, the shared
// block and the shared–camera couplings) and W_j the nc×3 couplings of
// point j's observations (Agarwal, Snavely, Seitz and Szeliski, "Bundle
// Adjustment in the Large", ECCV 2010, §4, the "implicit" Schur
// complement). The damped system S δc = ε_c − Σ_j W_j V_j⁻¹ ε_j (Triggs et
// al. 2000, eq. 21, as in linear.go) is solved by preconditioned
// conjugate gradients (Saad, "Iterative Methods for Sparse Linear
// Systems", 2nd ed., Algorithm 9.1) with
//
//   - the block-Jacobi preconditioner of Agarwal et al. §4: the diagonal
//     blocks of S, per camera S_ff = U_ff + λD_f − Σ_j W_fj V_j⁻¹ W_fjᵀ
//     (nc×nc) and for the shared parameters S_gg (ng×ng), each factored
//     by Cholesky;
//   - the held parameters of the gauge as identity rows and columns (the
//     input's held entries are zeroed before the product and copied to
//     its output), exactly the system holdRows gives the dense path;
//   - the forcing sequence of inexact Newton methods (Dembo, Eisenstat and
//     Steihaug, SIAM J. Numer. Anal. 19(2), 1982; the truncated-Newton LM
//     of Agarwal et al.): stop when ‖r_i‖_{M⁻¹} ≤ η_k ‖r_0‖_{M⁻¹} with
//     η_k = min(0.1, √(g_k/g_0)) (g the largest gradient component, as in
//     the stopping rule), or after cgMaxIter iterations.
//
// From δ₀ = 0 every CG iterate satisfies δᵢᵀSδᵢ = bᵀδᵢ (the residual is
// orthogonal to the Krylov space that holds δᵢ), and the points are
// back-substituted exactly, so the predicted decrease of backSubstitute
// (Madsen, Nielsen and Tingleff 2004, eq. 3.9b) holds for the truncated
// step too.
//
// Memory: nc×3 doubles per observation and O(F·nc²) for the blocks;
// nothing of size N² is allocated. Per iteration: O(observations) per CG
// iteration.

import "math"

// DefaultIterativeAbove is the number of cameras (Options.IterativeAbove)
// above which the Schur solver solves the reduced camera system by
// conjugate gradients. At 200 cameras the dense system is 1200 × 1200
// (11 MB, a fraction of a second per factorisation); beyond it the cubic
// cost of the factorisation and the quadratic memory dominate.
const DefaultIterativeAbove = 200

// DefaultUncertaintyMaxCameras is the default of
// Options.UncertaintyMaxCameras.
const DefaultUncertaintyMaxCameras = 500

// cgMaxIter bounds the conjugate-gradient iterations of one step.
const cgMaxIter = 500

// The linear solvers as reported in Summary.LinearSolver.
const (
	LinearDenseCholesky = "dense-cholesky"   // Schur: S formed and factored
	LinearPCG           = "pcg-block-jacobi" // Schur: S applied matrix-free
	LinearFullCholesky  = "full-cholesky"    // Dense: the full normal equations
)

// cgSystem is the matrix-free linearisation.
type cgSystem struct {
	wobs []float64 // W_t per observation (nc×3, row-major), projected for the reference point
	wg   []float64 // Wg per point (ng×3)
	// U blocks: per camera nc×nc, per camera ng×nc couplings, ng×ng.
	uc, ugf, ugg []float64
	prec         []float64 // Cholesky factors of the damped diagonal blocks of S, per camera
	precOK       []bool
	precG        []float64
	precGOK      bool
	held         []bool
	vm           []float64
	r, y, p, q   []float64
	g0           float64
	iters        int
}

// linearizeCG fills sys (without S) and cs at (m, X) with damping λ.
func (l *linearizer) linearizeCG(m model, X [][3]float64, lambda float64, sys *system, cs *cgSystem) {
	p := l.p
	ng, nc, N := l.ng, l.nc, l.N
	nb := nc * 3
	nf := p.nf
	if len(sys.pd) != p.np() {
		sys.pd = make([]pointData, p.np())
	}
	if len(cs.wobs) != p.nobs()*nb {
		cs.wobs = make([]float64, p.nobs()*nb)
		cs.wg = make([]float64, p.np()*ng*3)
		cs.held = make([]bool, N)
		for i := range cs.held {
			cs.held[i] = m.held(i)
		}
		cs.vm = make([]float64, N)
		cs.r, cs.y, cs.p, cs.q = make([]float64, N), make([]float64, N), make([]float64, N), make([]float64, N)
		cs.prec = make([]float64, nf*nc*nc)
		cs.precOK = make([]bool, nf)
		cs.precG = make([]float64, ng*ng)
		cs.g0 = -1
	}
	for _, w := range l.workers {
		if len(w.uc) != nf*nc*nc {
			w.uc = make([]float64, nf*nc*nc)
			w.ugf = make([]float64, nf*ng*nc)
			w.ugg = make([]float64, ng*ng)
			w.sff = make([]float64, nf*nc*nc)
			w.sgg = make([]float64, ng*ng)
			w.out = make([]float64, N)
		}
	}
	sys.N = N
	sys.S = nil
	sys.lambda = lambda
	refD := m.refDir(X[p.ref])
	sys.refD = refD
	p.parallel(func(c, lo, hi int) {
		w := l.workers[c]
		clear(w.rhs)
		clear(w.grad)
		clear(w.diag)
		clear(w.uc)
		clear(w.ugf)
		clear(w.ugg)
		clear(w.sff)
		clear(w.sgg)
		w.cost, w.gmax, w.ok = 0, 0, true
		for j := lo; j < hi; j++ {
			V, eps, Wg := l.pointBlocks(w, m, &X[j], j, nil, 0)
			k := p.start[j+1] - p.start[j]
			D := l.dampAndProject(w, &V, &eps, &Wg, k, lambda, j == p.ref, refD)
			for a := 0; a < 3; a++ {
				w.gmax = math.Max(w.gmax, math.Abs(eps[a]))
			}
			vi, ok := inv3(V)
			if !ok {
				w.ok = false
				continue
			}
			sys.pd[j] = pointData{vi: vi, eps: eps, d: D}
			o0 := p.start[j]
			copy(cs.wobs[o0*nb:(o0+k)*nb], w.wbuf[:k*nb])
			copy(cs.wg[j*ng*3:(j+1)*ng*3], Wg[:ng*3])
			// rhs −= Y ε_p and the diagonal blocks' Σ Y Wᵀ, Y = W V⁻¹.
			for t := 0; t < k; t++ {
				f := int(p.cam[o0+t])
				wo := w.wbuf[t*nb : (t+1)*nb]
				var y [maxCam * 3]float64
				timesVinv(y[:nb], wo, &vi)
				base := ng + f*nc
				sb := w.sff[f*nc*nc : (f+1)*nc*nc]
				for a := 0; a < nc; a++ {
					w.rhs[base+a] -= y[3*a]*eps[0] + y[3*a+1]*eps[1] + y[3*a+2]*eps[2]
					for b := 0; b < nc; b++ {
						sb[a*nc+b] += y[3*a]*wo[3*b] + y[3*a+1]*wo[3*b+1] + y[3*a+2]*wo[3*b+2]
					}
				}
			}
			var Yg [maxShared * 3]float64
			timesVinv(Yg[:3*ng], Wg[:3*ng], &vi)
			for a := 0; a < ng; a++ {
				y0, y1, y2 := Yg[3*a], Yg[3*a+1], Yg[3*a+2]
				w.rhs[a] -= y0*eps[0] + y1*eps[1] + y2*eps[2]
				for b := 0; b < ng; b++ {
					w.sgg[a*ng+b] += y0*Wg[3*b] + y1*Wg[3*b+1] + y2*Wg[3*b+2]
				}
			}
		}
	})
	// Reduce the workers into worker 0, in worker order.
	w0 := l.workers[0]
	for _, w := range l.workers[1:] {
		addTo(w0.rhs, w.rhs)
		addTo(w0.grad, w.grad)
		addTo(w0.diag, w.diag)
		addTo(w0.uc, w.uc)
		addTo(w0.ugf, w.ugf)
		addTo(w0.ugg, w.ugg)
		addTo(w0.sff, w.sff)
		addTo(w0.sgg, w.sgg)
		w0.cost += w.cost
		w0.gmax = math.Max(w0.gmax, w.gmax)
		w0.ok = w0.ok && w.ok
	}
	cs.uc, cs.ugf, cs.ugg = w0.uc, w0.ugf, w0.ugg
	sys.cost = w0.cost
	sys.ok = w0.ok
	if len(sys.rhs) != N {
		sys.rhs = make([]float64, N)
		sys.grad = make([]float64, N)
		sys.diag = make([]float64, N)
	}
	gmax := w0.gmax
	for i := 0; i < N; i++ {
		sys.diag[i] = clampDiag(w0.diag[i])
		sys.grad[i] = w0.grad[i]
		sys.rhs[i] = w0.grad[i] + w0.rhs[i]
		if cs.held[i] {
			sys.grad[i] = 0
			sys.rhs[i] = 0
		} else {
			gmax = math.Max(gmax, math.Abs(w0.grad[i]))
		}
	}
	sys.gmax = gmax
	// The block-Jacobi preconditioner.
	blk := make([]float64, maxCam*maxCam)
	for f := 0; f < nf; f++ {
		b := blk[:nc*nc]
		base := ng + f*nc
		for a := 0; a < nc; a++ {
			for c := 0; c < nc; c++ {
				b[a*nc+c] = w0.uc[f*nc*nc+a*nc+c] - w0.sff[f*nc*nc+a*nc+c]
			}
			b[a*nc+a] += lambda * sys.diag[base+a]
		}
		holdBlock(b, nc, cs.held[base:base+nc])
		cs.precOK[f] = cholN(b, nc, cs.prec[f*nc*nc:(f+1)*nc*nc])
	}
	if ng > 0 {
		b := make([]float64, ng*ng)
		for a := 0; a < ng; a++ {
			for c := 0; c < ng; c++ {
				b[a*ng+c] = w0.ugg[a*ng+c] - w0.sgg[a*ng+c]
			}
			b[a*ng+a] += lambda * sys.diag[a]
		}
		holdBlock(b, ng, cs.held[:ng])
		cs.precGOK = cholN(b, ng, cs.precG)
	}
}

func addTo(dst, src []float64) {
	for i, v := range src {
		dst[i] += v
	}
}

// holdBlock gives the held parameters of a diagonal block an identity row
// and column.
func holdBlock(b []float64, n int, held []bool) {
	for i := 0; i < n; i++ {
		if !held[i] {
			continue
		}
		for j := 0; j < n; j++ {
			b[i*n+j], b[j*n+i] = 0, 0
		}
		b[i*n+i] = 1
	}
}

// cholN factors the n×n symmetric positive-definite a (row-major) as LLᵀ
// into l (lower triangle); false when a pivot is not positive.
func cholN(a []float64, n int, l []float64) bool {
	clear(l[:n*n])
	for j := 0; j < n; j++ {
		s := a[j*n+j]
		for k := 0; k < j; k++ {
			s -= l[j*n+k] * l[j*n+k]
		}
		if !(s > 1e-14*math.Abs(a[j*n+j])) || !(s > 0) {
			return false
		}
		d := math.Sqrt(s)
		l[j*n+j] = d
		for i := j + 1; i < n; i++ {
			s := a[i*n+j]
			for k := 0; k < j; k++ {
				s -= l[i*n+k] * l[j*n+k]
			}
			l[i*n+j] = s / d
		}
	}
	return true
}

// cholSolveN solves LLᵀx = b in place.
func cholSolveN(l []float64, n int, b []float64) {
	for i := 0; i < n; i++ {
		s := b[i]
		for k := 0; k < i; k++ {
			s -= l[i*n+k] * b[k]
		}
		b[i] = s / l[i*n+i]
	}
	for i := n - 1; i >= 0; i-- {
		s := b[i]
		for k := i + 1; k < n; k++ {
			s -= l[k*n+i] * b[k]
		}
		b[i] = s / l[i*n+i]
	}
}

// apply sets out = S v (the damped reduced system with the held rows and
// columns of the identity) from the stored blocks. The point terms are
// summed per thread and the partial sums added in thread order.
func (l *linearizer) apply(sys *system, cs *cgSystem, v, out []float64) {
	p := l.p
	ng, nc := l.ng, l.nc
	nb := nc * 3
	vm := cs.vm
	for i, x := range v {
		if cs.held[i] {
			vm[i] = 0
		} else {
			vm[i] = x
		}
	}
	p.parallel(func(c, lo, hi int) {
		o := l.workers[c].out
		clear(o)
		for j := lo; j < hi; j++ {
			vi := &sys.pd[j].vi
			var t [3]float64
			wg := cs.wg[j*ng*3 : (j+1)*ng*3]
			for a := 0; a < ng; a++ {
				x := vm[a]
				t[0] += wg[3*a] * x
				t[1] += wg[3*a+1] * x
				t[2] += wg[3*a+2] * x
			}
			o0, o1 := p.start[j], p.start[j+1]
			for ob := o0; ob < o1; ob++ {
				wo := cs.wobs[ob*nb : (ob+1)*nb]
				vf := vm[ng+int(p.cam[ob])*nc : ng+int(p.cam[ob])*nc+nc]
				for a, x := range vf {
					t[0] += wo[3*a] * x
					t[1] += wo[3*a+1] * x
					t[2] += wo[3*a+2] * x
				}
			}
			s0 := vi[0]*t[0] + vi[1]*t[1] + vi[2]*t[2]
			s1 := vi[3]*t[0] + vi[4]*t[1] + vi[5]*t[2]
			s2 := vi[6]*t[0] + vi[7]*t[1] + vi[8]*t[2]
			for ob := o0; ob < o1; ob++ {
				wo := cs.wobs[ob*nb : (ob+1)*nb]
				of := o[ng+int(p.cam[ob])*nc : ng+int(p.cam[ob])*nc+nc]
				for a := range of {
					of[a] -= wo[3*a]*s0 + wo[3*a+1]*s1 + wo[3*a+2]*s2
				}
			}
			for a := 0; a < ng; a++ {
				o[a] -= wg[3*a]*s0 + wg[3*a+1]*s1 + wg[3*a+2]*s2
			}
		}
	})
	copy(out, l.workers[0].out)
	for _, w := range l.workers[1:] {
		addTo(out, w.out)
	}
	// U v and the damping.
	for f := 0; f < p.nf; f++ {
		base := ng + f*nc
		ub := cs.uc[f*nc*nc : (f+1)*nc*nc]
		vf := vm[base : base+nc]
		of := out[base : base+nc]
		for a := 0; a < nc; a++ {
			s := 0.0
			for b, x := range vf {
				s += ub[a*nc+b] * x
			}
			of[a] += s
		}
		if ng > 0 {
			ugf := cs.ugf[f*ng*nc : (f+1)*ng*nc]
			for a := 0; a < ng; a++ {
				s := 0.0
				for b, x := range vf {
					s += ugf[a*nc+b] * x
				}
				out[a] += s
			}
			for b := 0; b < nc; b++ {
				s := 0.0
				for a := 0; a < ng; a++ {
					s += ugf[a*nc+b] * vm[a]
				}
				of[b] += s
			}
		}
	}
	for a := 0; a < ng; a++ {
		s := 0.0
		for b := 0; b < ng; b++ {
			s += cs.ugg[a*ng+b] * vm[b]
		}
		out[a] += s
	}
	for i, x := range vm {
		out[i] += sys.lambda * sys.diag[i] * x
	}
	for i, h := range cs.held {
		if h {
			out[i] = v[i]
		}
	}
}

// precondition sets y = M⁻¹ r with the block-Jacobi factors (a block
// whose factorisation failed acts through its damped diagonal).
func (l *linearizer) precondition(sys *system, cs *cgSystem, r, y []float64) {
	ng, nc := l.ng, l.nc
	copy(y, r)
	diagOnly := func(lo, hi int) {
		for i := lo; i < hi; i++ {
			if cs.held[i] {
				continue
			}
			y[i] /= sys.lambda*sys.diag[i] + sys.diag[i]
		}
	}
	if ng > 0 {
		if cs.precGOK {
			cholSolveN(cs.precG, ng, y[:ng])
		} else {
			diagOnly(0, ng)
		}
	}
	for f := 0; f < l.p.nf; f++ {
		base := ng + f*nc
		if cs.precOK[f] {
			cholSolveN(cs.prec[f*nc*nc:(f+1)*nc*nc], nc, y[base:base+nc])
		} else {
			diagOnly(base, base+nc)
		}
	}
}

func dot(a, b []float64) float64 {
	s := 0.0
	for i, x := range a {
		s += x * b[i]
	}
	return s
}

// solveCamerasCG solves S δc = rhs by truncated PCG (see the file
// comment); ok is false when the iteration broke down (S not positive
// definite along a search direction, or a non-finite value).
func (l *linearizer) solveCamerasCG(sys *system, cs *cgSystem) ([]float64, bool) {
	N := sys.N
	if N == 0 {
		return nil, true
	}
	if cs.g0 < 0 {
		cs.g0 = sys.gmax
	}
	eta := 0.1
	if cs.g0 > 0 {
		eta = math.Min(eta, math.Sqrt(sys.gmax/cs.g0))
	}
	x := make([]float64, N)
	r, y, p, q := cs.r, cs.y, cs.p, cs.q
	copy(r, sys.rhs)
	l.precondition(sys, cs, r, y)
	copy(p, y)
	ry := dot(r, y)
	ry0 := ry
	cs.iters = 0
	if ry == 0 {
		return x, true
	}
	if !(ry > 0) {
		return nil, false
	}
	for cs.iters < cgMaxIter {
		l.apply(sys, cs, p, q)
		pq := dot(p, q)
		if !(pq > 0) || math.IsInf(pq, 0) {
			if cs.iters > 0 && !math.IsNaN(pq) {
				break // round-off at convergence
			}
			return nil, false
		}
		alpha := ry / pq
		for i := range x {
			x[i] += alpha * p[i]
			r[i] -= alpha * q[i]
		}
		cs.iters++
		l.precondition(sys, cs, r, y)
		ryN := dot(r, y)
		if math.IsNaN(ryN) || math.IsInf(ryN, 0) {
			return nil, false
		}
		if ryN <= eta*eta*ry0 {
			break
		}
		beta := ryN / ry
		ry = ryN
		for i := range p {
			p[i] = y[i] + beta*p[i]
		}
	}
	for i := range x {
		if math.IsNaN(x[i]) || math.IsInf(x[i], 0) {
			return nil, false
		}
	}
	return x, true
}
