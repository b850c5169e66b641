package factor

import (
	"context"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// sturmTriggsStart is the projective factorization of Sturm and Triggs ("A
// factorization based algorithm for multi-image projective structure and
// motion", ECCV 1996) with iterative depth re-estimation, followed by a
// metric upgrade with the known intrinsics. W0 holds pixel-scaled
// coordinates (pixelScaled), so q_fp = (x̄/Fx, ȳ/Fx, 1) are the normalised
// homogeneous image points of a camera with K = I.
//
// The rescaled measurement matrix W_λ = [λ_fp q_fp] (3F×P) equals P X
// (P 3F×4 stacked cameras, X 4×P homogeneous points) for the true
// projective depths λ, so it has rank 4. Starting from λ = 1 (the affine
// start), each iteration
//
//  1. balances λ: alternately rescales every frame's depths so that
//     Σ_p λ_fp²|q_fp|² = P and every point's so that Σ_f λ_fp²|q_fp|² = F
//     (three sweeps; Sturm–Triggs 1996 §3.3, "balancing"). A row or column
//     scale is a projective gauge change, so this changes nothing the
//     reconstruction depends on, but it keeps the iteration away from the
//     trivial solutions of depth re-estimation (all depths of a frame or
//     point shrinking to zero, which makes W_λ trivially low-rank);
//  2. takes the rank-4 SVD W_λ ≈ P X;
//  3. re-estimates λ_fp = q_fpᵀ(P_f X_p)/|q_fp|², the depth that best
//     explains the rank-4 column (which lowers ‖W_λ − PX‖² for fixed PX).
//
// It stops when the relative change of the balanced depths is ≤ tol. The
// metric upgrade finds the absolute dual quadric Ω (4×4 symmetric, rank 3)
// with P_f Ω P_fᵀ ∝ K Kᵀ = I for every frame (Triggs, "Autocalibration
// and the absolute quadric", CVPR 1997; Hartley and Zisserman, MVG 2nd
// ed., §19.3): five linear equations per frame (ω₀₀ = ω₁₁ = ω₂₂,
// ω₀₁ = ω₀₂ = ω₁₂ = 0) in the ten entries of Ω, solved by SVD. With
// Ω = V diag(λ₁, λ₂, λ₃, 0) Vᵀ, H = [v₁√λ₁ v₂√λ₂ v₃√λ₃ v₄] maps the
// projective frame to a metric one: P_f H = μ_f [R_f | T_f], X = H⁻¹ X_p.
// Cheirality (points in front of the cameras) fixes the remaining sign.
func sturmTriggsStart(ctx context.Context, W0 *mat.Dense, fx float64, opts Options, d *Diagnostics) (*perspState, error) {
	r, np := W0.Dims()
	nf := r / 2
	iters, tol := opts.PerspectiveIterations, opts.PerspectiveTolerance
	conv := Convergence{Stage: SturmTriggs, Tolerance: tol, Termination: StopIterationLimit}
	// q (3F×P), |q|² and the depths λ (F×P).
	q := mat.NewDense(3*nf, np, nil)
	q2 := make([]float64, nf*np)
	for f := 0; f < nf; f++ {
		for p := 0; p < np; p++ {
			x, y := W0.At(2*f, p)/fx, W0.At(2*f+1, p)/fx
			q.Set(3*f, p, x)
			q.Set(3*f+1, p, y)
			q.Set(3*f+2, p, 1)
			q2[f*np+p] = x*x + y*y + 1
		}
	}
	lam := make([]float64, nf*np)
	for i := range lam {
		lam[i] = 1
	}
	balance := func(l []float64) {
		for sweep := 0; sweep < 3; sweep++ {
			for f := 0; f < nf; f++ {
				s := 0.0
				for p := 0; p < np; p++ {
					s += l[f*np+p] * l[f*np+p] * q2[f*np+p]
				}
				if s > 0 {
					k := math.Sqrt(float64(np) / s)
					for p := 0; p < np; p++ {
						l[f*np+p] *= k
					}
				}
			}
			for p := 0; p < np; p++ {
				s := 0.0
				for f := 0; f < nf; f++ {
					s += l[f*np+p] * l[f*np+p] * q2[f*np+p]
				}
				if s > 0 {
					k := math.Sqrt(float64(nf) / s)
					for f := 0; f < nf; f++ {
						l[f*np+p] *= k
					}
				}
			}
		}
	}
	balance(lam)
	Wl := mat.NewDense(3*nf, np, nil)
	build := func() {
		for f := 0; f < nf; f++ {
			for k := 0; k < 3; k++ {
				src, dst := q.RawRowView(3*f+k), Wl.RawRowView(3*f+k)
				for p := range dst {
					dst[p] = lam[f*np+p] * src[p]
				}
			}
		}
	}
	// projRMS is the image residual (pixel-scaled) of the projective
	// reconstruction P X: the pixel of P_f X_p against the data.
	projRMS := func(P, X *mat.Dense) float64 {
		ss := 0.0
		for f := 0; f < nf; f++ {
			for p := 0; p < np; p++ {
				var y [3]float64
				for k := 0; k < 3; k++ {
					for c := 0; c < 4; c++ {
						y[k] += P.At(3*f+k, c) * X.At(c, p)
					}
				}
				du := W0.At(2*f, p) - fx*y[0]/y[2]
				dv := W0.At(2*f+1, p) - fx*y[1]/y[2]
				ss += du*du + dv*dv
			}
		}
		return math.Sqrt(ss / float64(2*nf*np))
	}
	var fit rank3
	newLam := make([]float64, nf*np)
	for it := 0; ; it++ {
		if err := checkCtx(ctx); err != nil {
			return nil, err
		}
		build()
		var err error
		fit, err = factorRankK(Wl, 4, false)
		if err != nil {
			return nil, err
		}
		if it == 0 {
			conv.InitialRMS = projRMS(fit.M, fit.S)
		}
		if it >= iters {
			break
		}
		for f := 0; f < nf; f++ {
			for p := 0; p < np; p++ {
				var dotqy float64
				for k := 0; k < 3; k++ {
					y := 0.0
					for c := 0; c < 4; c++ {
						y += fit.M.At(3*f+k, c) * fit.S.At(c, p)
					}
					dotqy += q.At(3*f+k, p) * y
				}
				newLam[f*np+p] = dotqy / q2[f*np+p]
			}
		}
		balance(newLam)
		num, den := 0.0, 0.0
		for i := range lam {
			dl := newLam[i] - lam[i]
			num += dl * dl
			den += lam[i] * lam[i]
		}
		change := math.Sqrt(num / den)
		copy(lam, newLam)
		conv.Iterations++
		conv.Changes = append(conv.Changes, change)
		if change <= tol {
			conv.Termination = StopConverged
			build()
			if fit, err = factorRankK(Wl, 4, false); err != nil {
				return nil, err
			}
			break
		}
		opts.progress(SturmTriggs, it+1, iters)
	}
	conv.FinalRMS = projRMS(fit.M, fit.S)
	d.Convergence = append(d.Convergence, conv)
	for _, l := range lam {
		if !(l > 0) {
			return nil, fmt.Errorf("factor: %w: the projective depths lost their sign (a point behind a camera); the data may not fit a pinhole camera with these intrinsics — try %s", ErrMetricUpgrade, ChristyHoraud)
		}
	}
	return metricFromProjective(fit.M, fit.S, fx, d)
}

// metricFromProjective upgrades a projective reconstruction P (3F×4),
// X (4×P) of normalised image points (K = I) to a metric one through the
// absolute dual quadric (see sturmTriggsStart).
func metricFromProjective(P, X *mat.Dense, fx float64, d *Diagnostics) (*perspState, error) {
	r, _ := P.Dims()
	nf := r / 3
	_, np := X.Dims()
	idx := [4][4]int{{0, 1, 2, 3}, {1, 4, 5, 6}, {2, 5, 7, 8}, {3, 6, 8, 9}}
	quad := func(a, b []float64) [10]float64 {
		var c [10]float64
		for i := 0; i < 4; i++ {
			for j := 0; j < 4; j++ {
				c[idx[i][j]] += a[i] * b[j]
			}
		}
		return c
	}
	A := mat.NewDense(5*nf, 10, nil)
	for f := 0; f < nf; f++ {
		Pf := mat.DenseCopyOf(P.Slice(3*f, 3*f+3, 0, 4))
		Pf.Scale(1/mat.Norm(Pf, 2), Pf)
		r0, r1, r2 := Pf.RawRowView(0), Pf.RawRowView(1), Pf.RawRowView(2)
		q00, q11, q22 := quad(r0, r0), quad(r1, r1), quad(r2, r2)
		q01, q02, q12 := quad(r0, r1), quad(r0, r2), quad(r1, r2)
		var e1, e2 [10]float64
		for k := 0; k < 10; k++ {
			e1[k] = q00[k] - q11[k]
			e2[k] = q00[k] - q22[k]
		}
		A.SetRow(5*f, e1[:])
		A.SetRow(5*f+1, e2[:])
		A.SetRow(5*f+2, q01[:])
		A.SetRow(5*f+3, q02[:])
		A.SetRow(5*f+4, q12[:])
	}
	var svd mat.SVD
	if !svd.Factorize(A, mat.SVDFull) {
		return nil, fmt.Errorf("factor: %w: SVD of the absolute-quadric equations did not converge", ErrMetricUpgrade)
	}
	vals := svd.Values(nil)
	if len(vals) < 10 || !(vals[8] > 1e-12*vals[0]) {
		return nil, fmt.Errorf("factor: %w: the views do not determine the metric upgrade of the projective reconstruction; they need more rotation", ErrMetricUpgrade)
	}
	d.MetricCondition = vals[0] / vals[8]
	var V mat.Dense
	svd.VTo(&V)
	w := mat.Col(nil, 9, &V)
	O := mat.NewSymDense(4, nil)
	for i := 0; i < 4; i++ {
		for j := i; j < 4; j++ {
			O.SetSym(i, j, w[idx[i][j]])
		}
	}
	var eig mat.EigenSym
	if !eig.Factorize(O, true) {
		return nil, fmt.Errorf("factor: %w: eigen-decomposition of the absolute quadric failed", ErrMetricUpgrade)
	}
	ev := eig.Values(nil) // ascending
	var vecs mat.Dense
	eig.VectorsTo(&vecs)
	// Ω is defined up to sign: take the sign with three positive
	// eigenvalues (its rank-3 part positive semi-definite).
	sign := 1.0
	if math.Abs(ev[0]) > math.Abs(ev[3]) {
		sign = -1
	}
	type pair struct {
		v   float64
		col int
	}
	ps := []pair{}
	for k := 0; k < 4; k++ {
		ps = append(ps, pair{sign * ev[k], k})
	}
	// Sort descending by value.
	for a := 0; a < 4; a++ {
		for b := a + 1; b < 4; b++ {
			if ps[b].v > ps[a].v {
				ps[a], ps[b] = ps[b], ps[a]
			}
		}
	}
	H := mat.NewDense(4, 4, nil)
	for k := 0; k < 3; k++ {
		l := ps[k].v
		if l < 1e-6*ps[0].v {
			l = 1e-6 * ps[0].v
			d.MetricFallback = true
		}
		for i := 0; i < 4; i++ {
			H.Set(i, k, vecs.At(i, ps[k].col)*math.Sqrt(l))
		}
	}
	for i := 0; i < 4; i++ {
		H.Set(i, 3, vecs.At(i, ps[3].col))
	}
	var Hinv mat.Dense
	if err := Hinv.Inverse(H); err != nil {
		return nil, fmt.Errorf("factor: %w: the metric transform is singular", ErrMetricUpgrade)
	}
	st := &perspState{in: Intrinsics{Fx: fx, Fy: fx}, R: make([][3][3]float64, nf), T: make([][3]float64, nf), X: make([][3]float64, np)}
	var PH mat.Dense
	PH.Mul(P, H)
	for f := 0; f < nf; f++ {
		var a [3][3]float64
		for i := 0; i < 3; i++ {
			for j := 0; j < 3; j++ {
				a[i][j] = PH.At(3*f+i, j)
			}
		}
		det := dot3(a[0], cross3(a[1], a[2]))
		mu := math.Cbrt(det)
		if mu == 0 {
			return nil, fmt.Errorf("factor: %w: camera %d is singular after the upgrade", ErrMetricUpgrade, f)
		}
		for i := range a {
			for j := range a[i] {
				a[i][j] /= mu
			}
		}
		R, ok := nearestRotation(a)
		if !ok {
			return nil, fmt.Errorf("factor: %w: camera %d is singular after the upgrade", ErrMetricUpgrade, f)
		}
		st.R[f] = R
		st.T[f] = [3]float64{PH.At(3*f, 3) / mu, PH.At(3*f+1, 3) / mu, PH.At(3*f+2, 3) / mu}
	}
	var Xm mat.Dense
	Xm.Mul(&Hinv, X)
	for p := 0; p < np; p++ {
		w := Xm.At(3, p)
		if w == 0 {
			return nil, fmt.Errorf("factor: %w: point %d is at infinity after the upgrade", ErrMetricUpgrade, p)
		}
		st.X[p] = [3]float64{Xm.At(0, p) / w, Xm.At(1, p) / w, Xm.At(2, p) / w}
	}
	// Cheirality: with H·diag(1, 1, 1, −1) the depths change sign
	// (T → −T, X → −X); keep the sign that puts most points in front.
	front := 0
	for f := 0; f < nf; f++ {
		for p := 0; p < np; p++ {
			if _, _, z := st.project(f, p); z > 0 {
				front++
			}
		}
	}
	if 2*front < nf*np {
		for f := range st.T {
			st.T[f] = [3]float64{-st.T[f][0], -st.T[f][1], -st.T[f][2]}
		}
		for p := range st.X {
			st.X[p] = [3]float64{-st.X[p][0], -st.X[p][1], -st.X[p][2]}
		}
	}
	return st, nil
}
