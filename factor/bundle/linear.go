package bundle

import (
	"math"
	"sync"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/mat"
)

// The Levenberg–Marquardt step solves the damped normal equations
//
//	(JᵀWJ + λ·D) δ = −JᵀW r,   D = diag(JᵀWJ) clamped to [1e-6, 1e32],
//
// (Marquardt's scaling; the clamp keeps D positive for parameters the data
// hardly see; the bounds are those of the Ceres solver) with W the robust
// weights ρ'(|r|²) of the observations (iteratively reweighted least
// squares: J and r scaled by √ρ'). Ordering the unknowns as cameras c
// (with the shared parameters first) and points p, the system is
//
//	[ U   W ] [δc]   [ε_c]
//	[ Wᵀ  V ] [δp] = [ε_p],   ε = −JᵀW r,
//
// with V block-diagonal (one 3×3 block V_j per point). Eliminating the
// points gives the reduced camera system (Triggs, McLauchlan, Hartley and
// Fitzgibbon, "Bundle Adjustment — A Modern Synthesis", 2000, §6.1,
// eq. 21)
//
//	S δc = ε_c − Σ_j W_j V_j⁻¹ ε_j,   S = U − Σ_j W_j V_j⁻¹ W_jᵀ,
//
// solved by dense Cholesky for up to Options.IterativeAbove cameras
// (default 200) and beyond by matrix-free preconditioned conjugate
// gradients (cg.go), then the points by back-substitution, one
// independent 3×3 solve each:
//
//	δp_j = V_j⁻¹ (ε_j − W_jᵀ δc).
//
// W_j is sparse: only the cameras that see point j (and the shared
// parameters) couple to it, so S receives one block per pair of views of
// each point — the cost of building S is Σ_j k_j² blocks for k_j views.
// Held parameters (the gauge) get an identity row and column and a zero
// right-hand side, which fixes δ = 0 for them and leaves the rest of the
// system as if they were absent. The reference point is held along one
// direction d: its block becomes P V P + d dᵀ and its couplings W P, with
// P = I − d dᵀ, so its step has no component along d.

const (
	minDiag = 1e-6
	maxDiag = 1e32
)

func clampDiag(v float64) float64 { return math.Min(math.Max(v, minDiag), maxDiag) }

// pointData keeps what the back-substitution needs of each point.
type pointData struct {
	vi  [9]float64 // (V + λD)⁻¹, projected for the reference point
	eps [3]float64 // −J_pᵀ W r, projected for the reference point
	d   [3]float64 // the point's damping diagonal D
}

// system is one linearisation.
type system struct {
	N      int
	S      []float64 // N×N row-major, upper triangle: the reduced (or, for Dense, the full) damped system
	rhs    []float64 // its right-hand side
	grad   []float64 // ε_c = −J_cᵀ W r, zero for held parameters
	diag   []float64 // D of the camera parameters
	pd     []pointData
	lambda float64
	cost   float64
	gmax   float64
	refD   [3]float64
	ok     bool
}

// worker is one thread's accumulators and scratch.
type worker struct {
	S, rhs, grad, diag []float64
	wbuf, ybuf, wt     []float64
	runs               []int
	cost, gmax         float64
	ok                 bool
	// The matrix-free path (cg.go): compact U blocks (U_ff per camera,
	// U_gf per camera, U_gg), the Schur terms of the diagonal blocks
	// (Σ W V⁻¹ Wᵀ per camera and for the shared block) and a product
	// accumulator. Nil for the dense path.
	uc, ugf, ugg, sff, sgg, out []float64
}

type linearizer struct {
	p       *problem
	ng, nc  int
	N       int
	workers []*worker
}

func newLinearizer(p *problem, m model) *linearizer {
	l := &linearizer{p: p, ng: m.ng(), nc: m.nc()}
	l.N = l.ng + p.nf*l.nc
	for c := 0; c < len(p.chunks)-1; c++ {
		// S (N×N) is allocated by the first dense linearisation, so the
		// matrix-free path never holds it.
		l.workers = append(l.workers, &worker{
			rhs: make([]float64, l.N), grad: make([]float64, l.N), diag: make([]float64, l.N),
		})
	}
	return l
}

// pointBlocks accumulates one point's observations: V (3×3), ε_p, the
// shared coupling Wg (ng×3) and, per observation t, W_t = J_cᵀ J_x (nc×3)
// in w.wbuf; and, unless S is nil, the camera terms U (upper triangle,
// row stride stride), ε_c and diag(U).
func (l *linearizer) pointBlocks(w *worker, m model, X *[3]float64, j int, S []float64, stride int) (V [9]float64, eps [3]float64, Wg [maxShared * 3]float64) {
	p := l.p
	ng, nc := l.ng, l.nc
	nb := nc * 3
	o0, o1 := p.start[j], p.start[j+1]
	if need := (o1 - o0) * nb; len(w.wbuf) < need {
		w.wbuf = make([]float64, 2*need)
		w.ybuf = make([]float64, 2*need)
	}
	var jac jacobian
	for t := 0; t < o1-o0; t++ {
		o := o0 + t
		f := int(p.cam[o])
		u, v, ok := m.project(f, X, &jac)
		if !ok {
			w.ok = false
			continue
		}
		r0, r1 := u-p.uv[o][0], v-p.uv[o][1]
		rho, wt := p.loss.eval(r0*r0 + r1*r1)
		w.cost += 0.5 * rho
		sw := math.Sqrt(wt)
		if sw != 1 {
			r0 *= sw
			r1 *= sw
			for i := 0; i < 2*nc; i++ {
				jac.c[i] *= sw
			}
			for i := 0; i < 2*ng; i++ {
				jac.g[i] *= sw
			}
			for i := range jac.x {
				jac.x[i] *= sw
			}
		}
		jc0, jc1 := jac.c[:nc], jac.c[nc:2*nc]
		jx0, jx1 := jac.x[:3], jac.x[3:]
		for a := 0; a < 3; a++ {
			eps[a] -= jx0[a]*r0 + jx1[a]*r1
			for b := 0; b < 3; b++ {
				V[3*a+b] += jx0[a]*jx0[b] + jx1[a]*jx1[b]
			}
		}
		base := ng + f*nc
		wo := w.wbuf[t*nb : (t+1)*nb]
		for a := 0; a < nc; a++ {
			for b := 0; b < 3; b++ {
				wo[3*a+b] = jc0[a]*jx0[b] + jc1[a]*jx1[b]
			}
		}
		jg0, jg1 := jac.g[:ng], jac.g[ng:2*ng]
		for a := 0; a < ng; a++ {
			for b := 0; b < 3; b++ {
				Wg[3*a+b] += jg0[a]*jx0[b] + jg1[a]*jx1[b]
			}
		}
		if w.uc != nil {
			// The compact camera blocks of the matrix-free path (cg.go):
			// U_ff per camera, U_gf per camera and U_gg.
			ub := w.uc[f*nc*nc : (f+1)*nc*nc]
			for a := 0; a < nc; a++ {
				w.grad[base+a] -= jc0[a]*r0 + jc1[a]*r1
				w.diag[base+a] += jc0[a]*jc0[a] + jc1[a]*jc1[a]
				for b := 0; b < nc; b++ {
					ub[a*nc+b] += jc0[a]*jc0[b] + jc1[a]*jc1[b]
				}
			}
			if ng > 0 {
				ugf := w.ugf[f*ng*nc : (f+1)*ng*nc]
				for a := 0; a < ng; a++ {
					w.grad[a] -= jg0[a]*r0 + jg1[a]*r1
					w.diag[a] += jg0[a]*jg0[a] + jg1[a]*jg1[a]
					for b := 0; b < ng; b++ {
						w.ugg[a*ng+b] += jg0[a]*jg0[b] + jg1[a]*jg1[b]
					}
					for b := 0; b < nc; b++ {
						ugf[a*nc+b] += jg0[a]*jc0[b] + jg1[a]*jc1[b]
					}
				}
			}
			continue
		}
		if S == nil {
			continue
		}
		for a := 0; a < nc; a++ {
			w.grad[base+a] -= jc0[a]*r0 + jc1[a]*r1
			w.diag[base+a] += jc0[a]*jc0[a] + jc1[a]*jc1[a]
			row := S[(base+a)*stride:]
			for b := a; b < nc; b++ {
				row[base+b] += jc0[a]*jc0[b] + jc1[a]*jc1[b]
			}
		}
		for a := 0; a < ng; a++ {
			w.grad[a] -= jg0[a]*r0 + jg1[a]*r1
			w.diag[a] += jg0[a]*jg0[a] + jg1[a]*jg1[a]
			row := S[a*stride:]
			for b := a; b < ng; b++ {
				row[b] += jg0[a]*jg0[b] + jg1[a]*jg1[b]
			}
			for b := 0; b < nc; b++ {
				row[base+b] += jg0[a]*jc0[b] + jg1[a]*jc1[b]
			}
		}
	}
	return V, eps, Wg
}

// dampAndProject adds λD to V and, for the reference point, applies the
// projection P = I − d dᵀ to V, ε and the couplings; it returns D.
func (l *linearizer) dampAndProject(w *worker, V *[9]float64, eps *[3]float64, Wg *[maxShared * 3]float64, k int, lambda float64, isRef bool, d [3]float64) [3]float64 {
	var D [3]float64
	for a := 0; a < 3; a++ {
		D[a] = clampDiag(V[4*a])
		V[4*a] += lambda * D[a]
	}
	if !isRef {
		return D
	}
	var P [9]float64
	for a := 0; a < 3; a++ {
		for b := 0; b < 3; b++ {
			P[3*a+b] = -d[a] * d[b]
		}
		P[4*a]++
	}
	*V = mul33(mul33(P, *V), P)
	for a := 0; a < 3; a++ {
		for b := 0; b < 3; b++ {
			V[3*a+b] += d[a] * d[b]
		}
	}
	*eps = mul33v(P, *eps)
	nb := l.nc * 3
	for t := 0; t < k; t++ {
		rowsTimesP(w.wbuf[t*nb:(t+1)*nb], l.nc, &P)
	}
	rowsTimesP(Wg[:l.ng*3], l.ng, &P)
	return D
}

// rowsTimesP replaces the n×3 matrix A by A·P (P symmetric).
func rowsTimesP(A []float64, n int, P *[9]float64) {
	for a := 0; a < n; a++ {
		x0, x1, x2 := A[3*a], A[3*a+1], A[3*a+2]
		A[3*a] = x0*P[0] + x1*P[3] + x2*P[6]
		A[3*a+1] = x0*P[1] + x1*P[4] + x2*P[7]
		A[3*a+2] = x0*P[2] + x1*P[5] + x2*P[8]
	}
}

func mul33(a, b [9]float64) (c [9]float64) {
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			c[3*i+j] = a[3*i]*b[j] + a[3*i+1]*b[3+j] + a[3*i+2]*b[6+j]
		}
	}
	return c
}

// timesVinv sets y = x·V⁻¹ for each 3-row block of x (the blocks of
// Y = W V⁻¹), vi the row-major V⁻¹.
func timesVinv(y, x []float64, vi *[9]float64) {
	for a := 0; a+2 < len(x); a += 3 {
		x0, x1, x2 := x[a], x[a+1], x[a+2]
		y[a] = x0*vi[0] + x1*vi[3] + x2*vi[6]
		y[a+1] = x0*vi[1] + x1*vi[4] + x2*vi[7]
		y[a+2] = x0*vi[2] + x1*vi[5] + x2*vi[8]
	}
}

func mul33v(a [9]float64, v [3]float64) [3]float64 {
	return [3]float64{a[0]*v[0] + a[1]*v[1] + a[2]*v[2], a[3]*v[0] + a[4]*v[1] + a[5]*v[2], a[6]*v[0] + a[7]*v[1] + a[8]*v[2]}
}

// inv3 inverts a symmetric positive-definite 3×3 matrix by its adjugate;
// ok is false when it is not positive definite (to rounding).
func inv3(a [9]float64) (inv [9]float64, ok bool) {
	c00 := a[4]*a[8] - a[5]*a[7]
	c01 := a[5]*a[6] - a[3]*a[8]
	c02 := a[3]*a[7] - a[4]*a[6]
	det := a[0]*c00 + a[1]*c01 + a[2]*c02
	scale := math.Abs(a[0]) + math.Abs(a[4]) + math.Abs(a[8])
	if !(a[0] > 0) || !(a[0]*a[4]-a[1]*a[3] > 0) || !(det > 1e-14*scale*scale*scale) {
		return inv, false
	}
	id := 1 / det
	inv[0] = c00 * id
	inv[1] = (a[2]*a[7] - a[1]*a[8]) * id
	inv[2] = (a[1]*a[5] - a[2]*a[4]) * id
	inv[3] = c01 * id
	inv[4] = (a[0]*a[8] - a[2]*a[6]) * id
	inv[5] = (a[2]*a[3] - a[0]*a[5]) * id
	inv[6] = c02 * id
	inv[7] = (a[1]*a[6] - a[0]*a[7]) * id
	inv[8] = (a[0]*a[4] - a[1]*a[3]) * id
	return inv, true
}

// linearize builds the damped reduced camera system at (m, X).
func (l *linearizer) linearize(m model, X [][3]float64, lambda float64, sys *system) {
	p := l.p
	ng, nc, N := l.ng, l.nc, l.N
	nb := nc * 3
	if sys.pd == nil || len(sys.pd) != p.np() {
		sys.pd = make([]pointData, p.np())
	}
	sys.N = N
	sys.lambda = lambda
	refD := m.refDir(X[p.ref])
	sys.refD = refD
	for _, w := range l.workers {
		if len(w.S) != N*N {
			w.S = make([]float64, N*N)
		}
		w.uc = nil
	}
	p.parallel(func(c, lo, hi int) {
		w := l.workers[c]
		clear(w.S)
		clear(w.rhs)
		clear(w.grad)
		clear(w.diag)
		w.cost, w.gmax, w.ok = 0, 0, true
		for j := lo; j < hi; j++ {
			V, eps, Wg := l.pointBlocks(w, m, &X[j], j, w.S, N)
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
			timesVinv(w.ybuf[:k*nb], w.wbuf[:k*nb], &vi)
			var Yg [maxShared * 3]float64
			timesVinv(Yg[:3*ng], Wg[:3*ng], &vi)
			// S −= Y Wᵀ over the pairs of views (upper triangle), and
			// rhs −= Y ε_p. Views of consecutive cameras form runs whose
			// blocks are contiguous in a row of S; with Wᵀ stored as three
			// rows (wt), each run is three vector updates (floats.AddScaled,
			// SIMD in gonum).
			kn := k * nc
			if len(w.wt) < 3*kn {
				w.wt = make([]float64, 6*kn)
			}
			wt0, wt1, wt2 := w.wt[:kn], w.wt[kn:2*kn], w.wt[2*kn:3*kn]
			for t := 0; t < k; t++ {
				wv := w.wbuf[t*nb : (t+1)*nb]
				for b := 0; b < nc; b++ {
					wt0[t*nc+b], wt1[t*nc+b], wt2[t*nc+b] = wv[3*b], wv[3*b+1], wv[3*b+2]
				}
			}
			w.runs = w.runs[:0]
			for t := 0; t < k; t++ {
				if t == 0 || p.cam[o0+t] != p.cam[o0+t-1]+1 {
					w.runs = append(w.runs, t)
				}
			}
			w.runs = append(w.runs, k)
			r0 := 0
			for t1 := 0; t1 < k; t1++ {
				if t1 == w.runs[r0+1] {
					r0++
				}
				b1 := ng + int(p.cam[o0+t1])*nc
				y := w.ybuf[t1*nb : (t1+1)*nb]
				for a := 0; a < nc; a++ {
					w.rhs[b1+a] -= y[3*a]*eps[0] + y[3*a+1]*eps[1] + y[3*a+2]*eps[2]
				}
				for a := 0; a < nc; a++ {
					y0, y1, y2 := y[3*a], y[3*a+1], y[3*a+2]
					srow := w.S[(b1+a)*N : (b1+a+1)*N]
					for r := r0; r < len(w.runs)-1; r++ {
						lo, hi := w.runs[r], w.runs[r+1]
						if r == r0 {
							lo = t1
						}
						c0 := ng + int(p.cam[o0+lo])*nc
						seg := srow[c0 : c0+(hi-lo)*nc]
						floats.AddScaled(seg, -y0, wt0[lo*nc:hi*nc])
						floats.AddScaled(seg, -y1, wt1[lo*nc:hi*nc])
						floats.AddScaled(seg, -y2, wt2[lo*nc:hi*nc])
					}
				}
			}
			for a := 0; a < ng; a++ {
				y0, y1, y2 := Yg[3*a], Yg[3*a+1], Yg[3*a+2]
				w.rhs[a] -= y0*eps[0] + y1*eps[1] + y2*eps[2]
				row := w.S[a*N:]
				for b := a; b < ng; b++ {
					row[b] -= y0*Wg[3*b] + y1*Wg[3*b+1] + y2*Wg[3*b+2]
				}
				for t2 := 0; t2 < k; t2++ {
					b2 := ng + int(p.cam[o0+t2])*nc
					wv := w.wbuf[t2*nb : (t2+1)*nb]
					for b := 0; b < nc; b++ {
						row[b2+b] -= y0*wv[3*b] + y1*wv[3*b+1] + y2*wv[3*b+2]
					}
				}
			}
		}
	})
	// Reduce the workers into worker 0 (rows split over two goroutines).
	w0 := l.workers[0]
	for _, w := range l.workers[1:] {
		var wg sync.WaitGroup
		half := N / 2
		for _, r := range [][2]int{{0, half}, {half, N}} {
			wg.Add(1)
			go func(lo, hi int) {
				defer wg.Done()
				a, b := w0.S[lo*N:hi*N], w.S[lo*N:hi*N]
				for i := range a {
					a[i] += b[i]
				}
			}(r[0], r[1])
		}
		wg.Wait()
		for i := 0; i < N; i++ {
			w0.rhs[i] += w.rhs[i]
			w0.grad[i] += w.grad[i]
			w0.diag[i] += w.diag[i]
		}
		w0.cost += w.cost
		w0.gmax = math.Max(w0.gmax, w.gmax)
		w0.ok = w0.ok && w.ok
	}
	sys.S = w0.S
	sys.cost = w0.cost
	sys.ok = w0.ok
	if sys.rhs == nil || len(sys.rhs) != N {
		sys.rhs = make([]float64, N)
		sys.grad = make([]float64, N)
		sys.diag = make([]float64, N)
	}
	gmax := w0.gmax
	for i := 0; i < N; i++ {
		sys.diag[i] = clampDiag(w0.diag[i])
		sys.grad[i] = w0.grad[i]
		sys.rhs[i] = w0.grad[i] + w0.rhs[i]
		sys.S[i*N+i] += lambda * sys.diag[i]
		if m.held(i) {
			sys.grad[i] = 0
		} else {
			gmax = math.Max(gmax, math.Abs(w0.grad[i]))
		}
	}
	sys.gmax = gmax
	holdRows(sys.S, sys.rhs, N, m)
}

// holdRows gives every held parameter an identity row and column (upper
// triangle) and a zero right-hand side.
func holdRows(S, rhs []float64, N int, m model) {
	nh := 0
	for i := 0; i < N; i++ {
		if !m.held(i) {
			continue
		}
		nh++
		for j := 0; j < i; j++ {
			S[j*N+i] = 0
		}
		row := S[i*N : (i+1)*N]
		for j := i + 1; j < N; j++ {
			row[j] = 0
		}
		row[i] = 1
		rhs[i] = 0
	}
}

// solveCameras solves S δc = rhs by Cholesky; ok is false when S is not
// positive definite.
func solveCameras(sys *system) ([]float64, bool) {
	N := sys.N
	if N == 0 {
		return nil, true
	}
	var ch mat.Cholesky
	if !ch.Factorize(mat.NewSymDense(N, sys.S)) {
		return nil, false
	}
	dc := mat.NewVecDense(N, nil)
	if err := ch.SolveVecTo(dc, mat.NewVecDense(N, sys.rhs)); err != nil {
		// A Condition error still comes with a solution; reject only
		// non-finite ones.
		for _, v := range dc.RawVector().Data {
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return nil, false
			}
		}
	}
	return dc.RawVector().Data, true
}

// backSubstitute returns the point steps for the camera step dc and the
// model decrease predicted by the damped quadratic model,
// ½·δᵀ(λDδ + ε) (Madsen, Nielsen and Tingleff, "Methods for Non-Linear
// Least Squares Problems", 2004, eq. 3.9b).
func (l *linearizer) backSubstitute(m model, X [][3]float64, sys *system, dc []float64) ([][3]float64, float64) {
	p := l.p
	ng, nc := l.ng, l.nc
	dX := make([][3]float64, p.np())
	preds := make([]float64, len(p.chunks)-1)
	d := sys.refD
	p.parallel(func(c, lo, hi int) {
		var jac jacobian
		pred := 0.0
		for j := lo; j < hi; j++ {
			pd := &sys.pd[j]
			t := pd.eps
			for o := p.start[j]; o < p.start[j+1]; o++ {
				f := int(p.cam[o])
				u, v, ok := m.project(f, &X[j], &jac)
				if !ok {
					continue
				}
				r0, r1 := u-p.uv[o][0], v-p.uv[o][1]
				_, wt := p.loss.eval(r0*r0 + r1*r1)
				sw := math.Sqrt(wt)
				base := ng + f*nc
				q0, q1 := 0.0, 0.0
				for a := 0; a < nc; a++ {
					q0 += jac.c[a] * dc[base+a]
					q1 += jac.c[nc+a] * dc[base+a]
				}
				for a := 0; a < ng; a++ {
					q0 += jac.g[a] * dc[a]
					q1 += jac.g[ng+a] * dc[a]
				}
				// Both J_x and J_c carry √w: the product carries w.
				q0 *= wt
				q1 *= wt
				_ = sw
				for a := 0; a < 3; a++ {
					t[a] -= jac.x[a]*q0 + jac.x[3+a]*q1
				}
			}
			if j == p.ref {
				k := d[0]*t[0] + d[1]*t[1] + d[2]*t[2]
				t = [3]float64{t[0] - k*d[0], t[1] - k*d[1], t[2] - k*d[2]}
			}
			x := mul33v(pd.vi, t)
			dX[j] = x
			for a := 0; a < 3; a++ {
				pred += 0.5 * (sys.lambda*pd.d[a]*x[a]*x[a] + pd.eps[a]*x[a])
			}
		}
		preds[c] = pred
	})
	pred := 0.0
	for _, v := range preds {
		pred += v
	}
	for i, v := range dc {
		if m.held(i) {
			continue
		}
		pred += 0.5 * (sys.lambda*sys.diag[i]*v*v + sys.grad[i]*v)
	}
	return dX, pred
}

// denseStep solves the full damped normal equations without the Schur
// complement (cameras, shared parameters and points in one dense
// Cholesky). It gives the same step as the Schur path; it exists for the
// comparison in tests and benchmarks.
func (l *linearizer) denseStep(m model, X [][3]float64, lambda float64) (dc []float64, dX [][3]float64, pred, cost, gmax float64, ok bool) {
	p := l.p
	ng, nc, N := l.ng, l.nc, l.N
	nb := nc * 3
	np := p.np()
	Nt := N + 3*np
	A := make([]float64, Nt*Nt)
	b := make([]float64, Nt)
	w := &worker{grad: make([]float64, N), diag: make([]float64, N), ok: true}
	refD := m.refDir(X[p.ref])
	D := make([]float64, Nt)
	for j := 0; j < np; j++ {
		V, eps, Wg := l.pointBlocks(w, m, &X[j], j, A, Nt)
		k := p.start[j+1] - p.start[j]
		Dp := l.dampAndProject(w, &V, &eps, &Wg, k, lambda, j == p.ref, refD)
		pc := N + 3*j
		for a := 0; a < 3; a++ {
			D[pc+a] = Dp[a]
			b[pc+a] = eps[a]
			gmax = math.Max(gmax, math.Abs(eps[a]))
			for c := a; c < 3; c++ {
				A[(pc+a)*Nt+pc+c] = V[3*a+c]
			}
		}
		o0 := p.start[j]
		for t := 0; t < k; t++ {
			base := ng + int(p.cam[o0+t])*nc
			wo := w.wbuf[t*nb : (t+1)*nb]
			for a := 0; a < nc; a++ {
				for c := 0; c < 3; c++ {
					A[(base+a)*Nt+pc+c] = wo[3*a+c]
				}
			}
		}
		for a := 0; a < ng; a++ {
			for c := 0; c < 3; c++ {
				A[a*Nt+pc+c] = Wg[3*a+c]
			}
		}
	}
	for i := 0; i < N; i++ {
		D[i] = clampDiag(w.diag[i])
		b[i] = w.grad[i]
		A[i*Nt+i] += lambda * D[i]
		if !m.held(i) {
			gmax = math.Max(gmax, math.Abs(w.grad[i]))
		}
	}
	for i := 0; i < N; i++ {
		if !m.held(i) {
			continue
		}
		for j := 0; j < i; j++ {
			A[j*Nt+i] = 0
		}
		for j := i + 1; j < Nt; j++ {
			A[i*Nt+j] = 0
		}
		A[i*Nt+i] = 1
		b[i] = 0
	}
	if !w.ok {
		return nil, nil, 0, w.cost, gmax, false
	}
	var ch mat.Cholesky
	if !ch.Factorize(mat.NewSymDense(Nt, A)) {
		return nil, nil, 0, w.cost, gmax, false
	}
	x := mat.NewVecDense(Nt, nil)
	_ = ch.SolveVecTo(x, mat.NewVecDense(Nt, b))
	xs := x.RawVector().Data
	dc = append([]float64(nil), xs[:N]...)
	dX = make([][3]float64, np)
	for j := range dX {
		dX[j] = [3]float64{xs[N+3*j], xs[N+3*j+1], xs[N+3*j+2]}
	}
	for i := 0; i < Nt; i++ {
		if i < N && m.held(i) {
			continue
		}
		pred += 0.5 * (lambda*D[i]*xs[i]*xs[i] + b[i]*xs[i])
	}
	return dc, dX, pred, w.cost, gmax, true
}
