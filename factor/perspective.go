package factor

import (
	"context"
	"fmt"
	"math"
	"runtime"
	"sync"

	"gonum.org/v1/gonum/mat"
)

// MinPointsPerspective is the smallest number of points the perspective
// model accepts: the projective factorization fits a rank-4 matrix, which
// any 4 columns have, so at least 6 points are needed for the fit to be
// over-determined by more than one column; the Christy–Horaud path uses
// the same bound for a like-for-like choice between the methods.
const MinPointsPerspective = 6

// perspState is a perspective reconstruction: X_cam = R_f X_p + T_f and the
// pixel (Cx + Fx X_c/Z_c, Cy + Fy Y_c/Z_c).
type perspState struct {
	in Intrinsics
	R  [][3][3]float64
	T  [][3]float64
	X  [][3]float64
}

// project returns the pixel of point p in frame f and its depth.
func (s *perspState) project(f, p int) (u, v, z float64) {
	R, T, X := &s.R[f], &s.T[f], &s.X[p]
	xc := dot3(R[0], *X) + T[0]
	yc := dot3(R[1], *X) + T[1]
	z = dot3(R[2], *X) + T[2]
	return s.in.Cx + s.in.Fx*xc/z, s.in.Cy + s.in.Fy*yc/z, z
}

// cost is Σ ‖w_fp − π_f(X_p)‖² over all entries (px²); +Inf when a point
// falls behind a camera.
func (s *perspState) cost(W *mat.Dense) float64 {
	nf, np := len(s.R), len(s.X)
	total := 0.0
	for f := 0; f < nf; f++ {
		xr, yr := W.RawRowView(2*f), W.RawRowView(2*f+1)
		for p := 0; p < np; p++ {
			u, v, z := s.project(f, p)
			if !(z > 0) {
				return math.Inf(1)
			}
			du, dv := xr[p]-u, yr[p]-v
			total += du*du + dv*dv
		}
	}
	return total
}

func (s *perspState) clone() *perspState {
	return &perspState{in: s.in, R: append([][3][3]float64(nil), s.R...), T: append([][3]float64(nil), s.T...), X: append([][3]float64(nil), s.X...)}
}

// parallelFor runs body(i) for i in [0, n) on all cores.
func parallelFor(n int, body func(i int)) {
	workers := min(runtime.GOMAXPROCS(0), n)
	if workers <= 1 || n < 64 {
		for i := 0; i < n; i++ {
			body(i)
		}
		return
	}
	var wg sync.WaitGroup
	for w := 0; w < workers; w++ {
		wg.Add(1)
		go func(w int) {
			defer wg.Done()
			for i := w; i < n; i += workers {
				body(i)
			}
		}(w)
	}
	wg.Wait()
}

// refinePerspective minimises the reprojection error Σ‖w_fp − π_f(X_p)‖²,
// by joint Levenberg–Marquardt (lmPerspective) when P·F² ≤ jointLMLimit,
// otherwise by resection–intersection (alternating Gauss–Newton on every point given
// the cameras and on every camera given the points; Hartley and Zisserman,
// MVG 2nd ed., §18.1 and App. 6 for the Jacobians). A point's or a
// camera's step is kept only when it lowers that block's cost (otherwise it
// is halved, up to 4 times), so the total cost never rises. Cameras are
// updated as R ← exp([ω]×)R, T ← T + δT; with Y = RX, X_c = Y + T and
// a = ∂u/∂X_c = Fx (1/Z, 0, −X_c/Z²) the Jacobian row of u is
// (Y × a, a) for (ω, δT) and aᵀR for the point.
func refinePerspective(ctx context.Context, s *perspState, W *mat.Dense, iters int, tol float64) (Convergence, error) {
	nf, np := len(s.R), len(s.X)
	n := float64(2 * nf * np)
	conv := Convergence{Stage: "refine", Tolerance: tol, Termination: StopConverged}
	cost := s.cost(W)
	conv.InitialRMS = math.Sqrt(cost / n)
	conv.FinalRMS = conv.InitialRMS
	if iters < 0 || math.IsInf(cost, 1) {
		return conv, nil
	}
	if float64(np)*float64(nf)*float64(nf) <= jointLMLimit {
		c, err := lmPerspective(ctx, s, W, iters, tol, &conv)
		conv.FinalRMS = math.Sqrt(c / n)
		return conv, err
	}
	conv.Termination = StopIterationLimit
	for it := 0; it < iters; it++ {
		if err := checkCtx(ctx); err != nil {
			return conv, err
		}
		parallelFor(np, func(p int) { s.pointStep(W, p) })
		parallelFor(nf, func(f int) { s.cameraStep(W, f) })
		c := s.cost(W)
		conv.Iterations++
		change := 0.0
		if cost > 0 {
			change = (cost - c) / cost
		}
		conv.Changes = append(conv.Changes, change)
		// Below (1e-10 px)² per coordinate the cost is rounding noise.
		done := cost-c <= tol*cost || c <= 1e-20*n
		cost = math.Min(cost, c)
		if done {
			conv.Termination = StopConverged
			break
		}
	}
	conv.FinalRMS = math.Sqrt(cost / n)
	return conv, nil
}

// pointCost is point p's share of the cost.
func (s *perspState) pointCost(W *mat.Dense, p int, X [3]float64) float64 {
	c := 0.0
	for f := range s.R {
		R, T := &s.R[f], &s.T[f]
		z := dot3(R[2], X) + T[2]
		if !(z > 0) {
			return math.Inf(1)
		}
		du := W.At(2*f, p) - (s.in.Cx + s.in.Fx*(dot3(R[0], X)+T[0])/z)
		dv := W.At(2*f+1, p) - (s.in.Cy + s.in.Fy*(dot3(R[1], X)+T[1])/z)
		c += du*du + dv*dv
	}
	return c
}

func (s *perspState) pointStep(W *mat.Dense, p int) {
	var H [3][3]float64
	var g [3]float64
	X := s.X[p]
	for f := range s.R {
		R, T := &s.R[f], &s.T[f]
		xc, yc, z := dot3(R[0], X)+T[0], dot3(R[1], X)+T[1], dot3(R[2], X)+T[2]
		ru := W.At(2*f, p) - (s.in.Cx + s.in.Fx*xc/z)
		rv := W.At(2*f+1, p) - (s.in.Cy + s.in.Fy*yc/z)
		var ju, jv [3]float64
		for k := 0; k < 3; k++ {
			ju[k] = s.in.Fx * (R[0][k]/z - xc*R[2][k]/(z*z))
			jv[k] = s.in.Fy * (R[1][k]/z - yc*R[2][k]/(z*z))
		}
		for a := 0; a < 3; a++ {
			g[a] += ju[a]*ru + jv[a]*rv
			for b := 0; b < 3; b++ {
				H[a][b] += ju[a]*ju[b] + jv[a]*jv[b]
			}
		}
	}
	d, ok := solve33(H, g)
	if !ok {
		return
	}
	c0 := s.pointCost(W, p, X)
	for h := 0; h < 5; h++ {
		Xn := [3]float64{X[0] + d[0], X[1] + d[1], X[2] + d[2]}
		if s.pointCost(W, p, Xn) < c0 {
			s.X[p] = Xn
			return
		}
		d = [3]float64{d[0] / 2, d[1] / 2, d[2] / 2}
	}
}

func (s *perspState) cameraCost(W *mat.Dense, f int, R [3][3]float64, T [3]float64) float64 {
	xr, yr := W.RawRowView(2*f), W.RawRowView(2*f+1)
	c := 0.0
	for p, X := range s.X {
		z := dot3(R[2], X) + T[2]
		if !(z > 0) {
			return math.Inf(1)
		}
		du := xr[p] - (s.in.Cx + s.in.Fx*(dot3(R[0], X)+T[0])/z)
		dv := yr[p] - (s.in.Cy + s.in.Fy*(dot3(R[1], X)+T[1])/z)
		c += du*du + dv*dv
	}
	return c
}

func (s *perspState) cameraStep(W *mat.Dense, f int) {
	R, T := s.R[f], s.T[f]
	xr, yr := W.RawRowView(2*f), W.RawRowView(2*f+1)
	H := mat.NewSymDense(6, nil)
	var hd [6][6]float64
	var g [6]float64
	for p, X := range s.X {
		Y := [3]float64{dot3(R[0], X), dot3(R[1], X), dot3(R[2], X)}
		xc, yc, z := Y[0]+T[0], Y[1]+T[1], Y[2]+T[2]
		ru := xr[p] - (s.in.Cx + s.in.Fx*xc/z)
		rv := yr[p] - (s.in.Cy + s.in.Fy*yc/z)
		au := [3]float64{s.in.Fx / z, 0, -s.in.Fx * xc / (z * z)}
		av := [3]float64{0, s.in.Fy / z, -s.in.Fy * yc / (z * z)}
		wu, wv := cross3(Y, au), cross3(Y, av)
		ju := [6]float64{wu[0], wu[1], wu[2], au[0], au[1], au[2]}
		jv := [6]float64{wv[0], wv[1], wv[2], av[0], av[1], av[2]}
		for a := 0; a < 6; a++ {
			g[a] += ju[a]*ru + jv[a]*rv
			for b := a; b < 6; b++ {
				hd[a][b] += ju[a]*ju[b] + jv[a]*jv[b]
			}
		}
	}
	for a := 0; a < 6; a++ {
		for b := a; b < 6; b++ {
			H.SetSym(a, b, hd[a][b])
		}
	}
	var chol mat.Cholesky
	if !chol.Factorize(H) {
		return
	}
	var d mat.VecDense
	if chol.SolveVecTo(&d, mat.NewVecDense(6, g[:])) != nil {
		return
	}
	c0 := s.cameraCost(W, f, R, T)
	step := 1.0
	for h := 0; h < 5; h++ {
		w := [3]float64{step * d.AtVec(0), step * d.AtVec(1), step * d.AtVec(2)}
		Rn := mul33(expSO3(w), R)
		Tn := [3]float64{T[0] + step*d.AtVec(3), T[1] + step*d.AtVec(4), T[2] + step*d.AtVec(5)}
		if s.cameraCost(W, f, Rn, Tn) < c0 {
			s.R[f], s.T[f] = Rn, Tn
			return
		}
		step /= 2
	}
}

// gauge moves the world origin to the points' centroid, rotates it so
// camera 0 is the identity and scales it so that the cameras' Fx/T_z
// (px per world unit at the centroid) average 1; the projections do not
// change.
func (s *perspState) gauge() {
	var c [3]float64
	for _, X := range s.X {
		for k := range c {
			c[k] += X[k] / float64(len(s.X))
		}
	}
	for f := range s.R {
		R := s.R[f]
		s.T[f] = [3]float64{s.T[f][0] + dot3(R[0], c), s.T[f][1] + dot3(R[1], c), s.T[f][2] + dot3(R[2], c)}
	}
	R0 := s.R[0]
	for p, X := range s.X {
		X = [3]float64{X[0] - c[0], X[1] - c[1], X[2] - c[2]}
		s.X[p] = [3]float64{dot3(R0[0], X), dot3(R0[1], X), dot3(R0[2], X)}
	}
	for f := range s.R {
		s.R[f] = mulABt(s.R[f], R0)
	}
	mu := 0.0
	for f := range s.T {
		mu += s.in.Fx / s.T[f][2] / float64(len(s.T))
	}
	if mu > 0 && !math.IsInf(mu, 0) {
		for f := range s.T {
			for k := range s.T[f] {
				s.T[f][k] *= mu
			}
		}
		for p := range s.X {
			for k := range s.X[p] {
				s.X[p][k] *= mu
			}
		}
	}
}

// pixelScaled returns W in pixel-scaled normalised coordinates,
// x̄ = u − Cx, ȳ = (v − Cy)·Fx/Fy: the normalised coordinates times Fx, so
// that a pinhole camera with focal length Fx and no principal-point offset
// images them and residuals stay in (horizontal) pixels.
func pixelScaled(W *mat.Dense, in Intrinsics) *mat.Dense {
	r, c := W.Dims()
	out := mat.NewDense(r, c, nil)
	a := in.Fx / in.Fy
	for f := 0; f < r/2; f++ {
		xs, ys := W.RawRowView(2*f), W.RawRowView(2*f+1)
		xd, yd := out.RawRowView(2*f), out.RawRowView(2*f+1)
		for p := 0; p < c; p++ {
			xd[p] = xs[p] - in.Cx
			yd[p] = (ys[p] - in.Cy) * a
		}
	}
	return out
}

// christyHoraud runs the iterative perspective correction of Christy and
// Horaud ("Euclidean shape and motion from multiple perspective views by
// affine iterations", PAMI 18(11), 1996) from one mirror branch of a
// scaled-orthographic solution (cams, S) of the pixel-scaled data W0.
//
// For a pinhole camera x̄ = Fx (i·X + T_x)/(k·X + T_z); with ε = k·X/T_z
// this is exactly x̄(1 + ε) = (Fx/T_z)(i·X + T_x): the corrected points
// x̄(1 + ε) follow the scaled-orthographic model with scale c = Fx/T_z.
// Each iteration corrects W0 with the current ε, factorizes the corrected
// data with the scaled-orthographic model (rank-3 SVD, metric upgrade, two
// refinement sweeps), keeps the mirror branch whose depths agree with the
// previous iteration's (the sign of Σ_p z_p z'_p in camera 0's frame), and
// re-estimates ε_fp = c_f (k_f·X_p)/Fx. It stops when max |Δε| ≤ tol. The
// state it returns is the perspective reconstruction in pixel-scaled units,
// T_f = (t_x, t_y, Fx)/c_f with t_f the corrected row means.
func christyHoraud(ctx context.Context, W0 *mat.Dense, cams []affineCam, S *mat.Dense, fx float64, iters int, tol float64, opts Options, d *Diagnostics) (*perspState, Convergence, error) {
	r, np := W0.Dims()
	nf := r / 2
	conv := Convergence{Stage: ChristyHoraud, Tolerance: tol, Termination: StopIterationLimit}
	eps := mat.NewDense(nf, np, nil)
	Wc := mat.NewDense(r, np, nil)
	t := make([]float64, r)
	inner := opts
	inner.Iterations = 2
	state := func() *perspState {
		st := &perspState{in: Intrinsics{Fx: fx, Fy: fx}, R: make([][3][3]float64, nf), T: make([][3]float64, nf), X: make([][3]float64, np)}
		for f := range cams {
			c := cams[f].c
			st.R[f] = cams[f].R
			st.T[f] = [3]float64{t[2*f] / c, t[2*f+1] / c, fx / c}
		}
		for p := 0; p < np; p++ {
			st.X[p] = [3]float64{S.At(0, p), S.At(1, p), S.At(2, p)}
		}
		return st
	}
	correct := func() {
		for f := 0; f < nf; f++ {
			e := eps.RawRowView(f)
			for k := 0; k < 2; k++ {
				src, dst := W0.RawRowView(2*f+k), Wc.RawRowView(2*f+k)
				mu := 0.0
				for p := range dst {
					dst[p] = src[p] * (1 + e[p])
					mu += dst[p]
				}
				mu /= float64(np)
				t[2*f+k] = mu
				for p := range dst {
					dst[p] -= mu
				}
			}
		}
	}
	updateEps := func() (float64, error) {
		change := 0.0
		for f := 0; f < nf; f++ {
			k := cams[f].R[2]
			c := cams[f].c
			e := eps.RawRowView(f)
			for p := 0; p < np; p++ {
				ne := c * (k[0]*S.At(0, p) + k[1]*S.At(1, p) + k[2]*S.At(2, p)) / fx
				if !(ne > -1) {
					return change, fmt.Errorf("factor: %w: the perspective correction put point %d behind camera %d; check that the intrinsics belong to this camera", ErrMetricUpgrade, p, f)
				}
				change = math.Max(change, math.Abs(ne-e[p]))
				e[p] = ne
			}
		}
		return change, nil
	}
	correct()
	conv.InitialRMS = math.Sqrt(state().cost(W0) / float64(r*np))
	if _, err := updateEps(); err != nil {
		conv.Termination = StopDiverged
		return nil, conv, err
	}
	for it := 0; it < iters; it++ {
		if err := checkCtx(ctx); err != nil {
			return nil, conv, err
		}
		correct()
		r3, err := factorRank3(Wc)
		if err != nil {
			return nil, conv, err
		}
		var dd Diagnostics
		nc, err := upgradeScaled(r3.M, nil, &dd)
		if err != nil {
			return nil, conv, err
		}
		d.MetricFallback = d.MetricFallback || dd.MetricFallback
		ns := mat.NewDense(3, np, nil)
		if _, err := refineAffine(ctx, Wc, nc, ns, true, inner); err != nil {
			return nil, conv, err
		}
		agree := 0.0
		for p := 0; p < np; p++ {
			agree += ns.At(2, p) * S.At(2, p)
		}
		if agree < 0 { // the other mirror branch: R → DRD, S → DS
			for i := range nc {
				R := nc[i].R
				nc[i].R = [3][3]float64{{R[0][0], R[0][1], -R[0][2]}, {R[1][0], R[1][1], -R[1][2]}, {-R[2][0], -R[2][1], R[2][2]}}
			}
			for p := 0; p < np; p++ {
				ns.Set(2, p, -ns.At(2, p))
			}
		}
		copy(cams, nc)
		S.Copy(ns)
		change, err := updateEps()
		conv.Iterations++
		conv.Changes = append(conv.Changes, change)
		if err != nil {
			conv.Termination = StopDiverged
			return nil, conv, err
		}
		if change <= tol {
			conv.Termination = StopConverged
			break
		}
	}
	st := state()
	conv.FinalRMS = math.Sqrt(st.cost(W0) / float64(r*np))
	return st, conv, nil
}

// weakStart turns a scaled-orthographic solution (cams, S) of the
// pixel-scaled data W0 into the perspective state with ε = 0: T_f =
// (t_x, t_y, Fx)/c_f with t_f the row means of W0.
func weakStart(W0 *mat.Dense, cams []affineCam, S *mat.Dense, fx float64) *perspState {
	_, np := W0.Dims()
	nf := len(cams)
	st := &perspState{in: Intrinsics{Fx: fx, Fy: fx}, R: make([][3][3]float64, nf), T: make([][3]float64, nf), X: make([][3]float64, np)}
	for f := range cams {
		tx, ty := 0.0, 0.0
		for p := 0; p < np; p++ {
			tx += W0.At(2*f, p) / float64(np)
			ty += W0.At(2*f+1, p) / float64(np)
		}
		c := cams[f].c
		st.R[f] = cams[f].R
		st.T[f] = [3]float64{tx / c, ty / c, fx / c}
	}
	// Keep every point in front of every camera: where the depth
	// correction ε = c_f k_f·X_p/Fx would exceed ½ (a near-planar scene
	// leaves the depth axis undetermined), shrink the structure until it
	// does not; the refinement restores the scale.
	worst := 0.0
	for p := 0; p < np; p++ {
		st.X[p] = [3]float64{S.At(0, p), S.At(1, p), S.At(2, p)}
		for f := range cams {
			worst = math.Max(worst, math.Abs(cams[f].c*dot3(cams[f].R[2], st.X[p])/fx))
		}
	}
	if worst > 0.5 {
		for p := range st.X {
			for k := range st.X[p] {
				st.X[p][k] *= 0.5 / worst
			}
		}
	}
	return st
}

// factorPerspective reconstructs with the perspective model and known
// intrinsics (package documentation, "Perspective").
func factorPerspective(ctx context.Context, m *Measurements, opts Options) (*Reconstruction, error) {
	if opts.Intrinsics == nil {
		return nil, fmt.Errorf("factor: the perspective model needs the camera intrinsics (Options.Intrinsics, --intrinsics FILE); without them use %q or %q", Paraperspective, Auto)
	}
	if err := checkComplete(m, Perspective, MinPointsPerspective); err != nil {
		return nil, err
	}
	in := *opts.Intrinsics
	in.K1, in.K2, in.P1, in.P2, in.K3 = 0, 0, 0, 0, 0 // m is undistorted already
	nf, np := m.Dims()
	n := 2 * nf * np
	dModel := 6*nf + 3*np - 7
	W0 := pixelScaled(m.W, in)
	opts.progress("factorize", 0, 4)

	// The scaled-orthographic start on the uncorrected data (ε = 0), with
	// the same degeneracy tests as the affine models.
	wc, _ := centre(W0)
	r3, err := factorRank3(wc)
	if err != nil {
		return nil, err
	}
	rec := &Reconstruction{Model: Perspective}
	d := &rec.Diagnostics
	sigma, rankDeficient := spectrum(d, r3, nf, np, dModel, opts)
	startPlanar := rankDeficient
	chFailed := false
	if rankDeficient && similarityOnly(wc, sigma) {
		return nil, fmt.Errorf("factor: %w: every view is a 2D similarity of the first (the part did not turn out of the image plane); capture views with at least %.1f° of rotation", ErrLittleRotation, opts.MinRotationDeg)
	}
	cams, err := upgradeScaled(r3.M, nil, d)
	if err != nil {
		return nil, err
	}
	S := mat.NewDense(3, np, nil)
	if _, err := refineAffine(ctx, wc, cams, S, true, opts); err != nil {
		return nil, err
	}
	// J of the scaled-orthographic fit, for the weak-perspective test.
	jAffine := affineCost(cams, wc, S)
	opts.progress("factorize", 1, 4)

	var st *perspState
	switch opts.PerspectiveMethod {
	case SturmTriggs:
		st, err = sturmTriggsStart(ctx, W0, fx1(in), opts, d)
		if err != nil {
			return nil, err
		}
	default:
		// Both mirror branches: R → DRD, S → DS (D = diag(1, 1, −1)).
		mir := append([]affineCam(nil), cams...)
		for i := range mir {
			R := mir[i].R
			mir[i].R = [3][3]float64{{R[0][0], R[0][1], -R[0][2]}, {R[1][0], R[1][1], -R[1][2]}, {-R[2][0], -R[2][1], R[2][2]}}
		}
		Sm := mat.DenseCopyOf(S)
		for p := 0; p < np; p++ {
			Sm.Set(2, p, -Sm.At(2, p))
		}
		cams0, S0 := append([]affineCam(nil), cams...), mat.DenseCopyOf(S)
		mir0, Sm0 := append([]affineCam(nil), mir...), mat.DenseCopyOf(Sm)
		type branch struct {
			st   *perspState
			conv Convergence
			cost float64
			err  error
		}
		var br [2]branch
		for b, start := range [2]struct {
			c []affineCam
			S *mat.Dense
		}{{cams, S}, {mir, Sm}} {
			s, c, e := christyHoraud(ctx, W0, start.c, start.S, in.Fx, opts.PerspectiveIterations, opts.PerspectiveTolerance, opts, d)
			br[b] = branch{st: s, conv: c, err: e, cost: math.Inf(1)}
			if e == nil {
				br[b].cost = s.cost(W0)
			}
			if errCtx := checkCtx(ctx); errCtx != nil {
				return nil, errCtx
			}
		}
		best, other := 0, 1
		if br[1].cost < br[0].cost {
			best, other = 1, 0
		}
		if br[best].err != nil {
			// Both branches failed (typically a near-planar scene, where
			// the affine upgrade is ambiguous): start the perspective
			// refinement from the uncorrected scaled-orthographic
			// cameras, both mirror images, and keep the better.
			d.Convergence = append(d.Convergence, br[0].conv)
			d.Warn(WarnNotConverged, fmt.Sprintf("the %s correction failed (%v); the perspective refinement started from the scaled-orthographic solution instead", ChristyHoraud, br[0].err))
			var bestSt *perspState
			bestCost := math.Inf(1)
			for _, start := range [2]struct {
				c []affineCam
				S *mat.Dense
			}{{cams0, S0}, {mir0, Sm0}} {
				cand := weakStart(W0, start.c, start.S, in.Fx)
				cand.in = in
				if _, err := refinePerspective(ctx, cand, m.W, opts.Iterations, opts.Tolerance); err != nil {
					return nil, err
				}
				if c := cand.cost(m.W); c < bestCost {
					bestSt, bestCost = cand, c
				}
			}
			if bestSt == nil {
				return nil, br[0].err
			}
			bestSt.in = Intrinsics{Fx: in.Fx, Fy: in.Fx}
			st = bestSt
			// The refinement above ran in pixels; undo nothing: st holds
			// pixel-frame R, T, X (shared by both coordinate systems).
			d.MirrorAmbiguous = true
			chFailed = true
		} else {
			st = br[best].st
			d.Convergence = append(d.Convergence, br[best].conv)
			d.MirrorAmbiguous = !mirrorResolved(br[best].cost, br[other].cost, n, dModel)
		}
	}
	opts.progress("factorize", 2, 4)

	// Refine in pixels with the true intrinsics: the pixel-scaled
	// coordinates are a pinhole with focal Fx and no principal-point
	// offset (x̄ = Fx X_c/Z_c, ȳ = Fx Y_c/Z_c), so R, T and X carry over
	// unchanged to the camera with (Fx, Fy, Cx, Cy).
	st.in = in
	conv, err := refinePerspective(ctx, st, m.W, opts.Iterations, opts.Tolerance)
	if err != nil {
		return nil, err
	}
	d.Convergence = append(d.Convergence, conv)
	d.InitialRMS, d.Iterations = conv.InitialRMS, conv.Iterations
	st.gauge()
	opts.progress("factorize", 3, 4)

	rec.Intrinsics = &in
	rec.Cameras = make([]Camera, nf)
	rots := make([][3][3]float64, nf)
	for f := 0; f < nf; f++ {
		cam := Camera{Frame: f, R: st.R[f], T: st.T[f], Scale: in.Fx / st.T[f][2]}
		if m.Frames != nil {
			cam.Frame = m.Frames[f]
		}
		rec.Cameras[f] = cam
		rots[f] = st.R[f]
	}
	S = mat.NewDense(3, np, nil)
	for p, X := range st.X {
		S.Set(0, p, X[0])
		S.Set(1, p, X[1])
		S.Set(2, p, X[2])
	}
	rec.Points = makePoints(m, S)
	fillResiduals(rec, m)

	// Spectral planarity test on the perspective-corrected data
	// x̄(1 + ε), which a correct reconstruction makes exactly affine.
	wcorr := mat.NewDense(2*nf, np, nil)
	for f := 0; f < nf; f++ {
		for p := 0; p < np; p++ {
			_, _, z := st.project(f, p)
			e := z/st.T[f][2] - 1
			wcorr.Set(2*f, p, W0.At(2*f, p)*(1+e))
			wcorr.Set(2*f+1, p, W0.At(2*f+1, p)*(1+e))
		}
	}
	wcc, _ := centre(wcorr)
	if r3c, err := factorRank3(wcc); err == nil {
		rms := d.RMS
		_, rankDeficient = spectrum(d, r3c, nf, np, dModel, opts)
		d.RMS = rms
	}
	// A start already flagged planar on which the correction failed is
	// planar too (the failure is the planarity's doing).
	rankDeficient = rankDeficient || startPlanar && chFailed
	// The noise level and expected residual from the model's own fit.
	jModel := d.RMS * d.RMS * float64(n)
	if opts.NoiseSigma == 0 && n > dModel {
		d.NoiseSigma = math.Sqrt(jModel / float64(n-dModel))
	}
	if n > dModel {
		d.ExpectedRMS = d.NoiseSigma * math.Sqrt(1-float64(dModel)/float64(n))
	}
	d.Measurements, d.Parameters = n, dModel
	opts.progress("factorize", 4, 4)

	spread := rotationSpreadDeg(rots)
	d.RotationSpreadDeg = spread
	if err := checkSpread(d, spread, rankDeficient || startPlanar, opts); err != nil {
		return nil, err
	}
	if weakPerspective(jAffine, jModel, d.NoiseSigma, nf) {
		d.MirrorAmbiguous = true
		d.Warn(WarnWeakPerspective, fmt.Sprintf("the perspective model fits only slightly better than the scaled-orthographic one (%.3f vs %.3f px RMS): the camera is far from the part, so depth reversal and distances are poorly determined; an affine model is adequate", d.RMS, math.Sqrt(jAffine/float64(n))))
	}
	addConvergenceWarnings(d)
	addWarnings(rec, rankDeficient, opts)
	return rec, nil
}

func fx1(in Intrinsics) float64 { return in.Fx }

// weakPerspective reports whether the perspective fit (cost jPersp) beats
// the scaled-orthographic one (jAffine, the same number of parameters) by
// less than 25 σ̂² per frame — a heuristic threshold (five standard
// deviations per frame of a one-degree-of-freedom χ² change), not a
// published one: then the perspective cues are lost in the noise.
func weakPerspective(jAffine, jPersp, sigma float64, nf int) bool {
	gain := jAffine - jPersp
	return gain <= 25*sigma*sigma*float64(nf) || gain <= 1e-12*jAffine
}

// mirrorResolved reports whether the better of the two mirror branches fits
// significantly better: by more than 25 σ̂² (σ̂² = J_best/(n − d)), five
// standard deviations of a one-degree-of-freedom χ² change — a heuristic
// threshold, not a published one.
func mirrorResolved(best, other float64, n, d int) bool {
	if math.IsInf(other, 1) {
		return true
	}
	s2 := 0.0
	if n > d {
		s2 = best / float64(n-d)
	}
	return other-best > 25*s2 && other-best > 1e-12*other
}

// jointLMLimit bounds P·F² for the joint Levenberg–Marquardt refinement
// (its reduced camera system costs ~108·P·F² flops per iteration); above it
// refinePerspective uses resection–intersection only.
const jointLMLimit = 5e7

// obsJac returns the residual of point p in frame f and its Jacobians with
// respect to the camera (ω, δT; 2×6) and the point (2×3); see
// refinePerspective for the parametrisation.
func (s *perspState) obsJac(W *mat.Dense, f, p int) (r [2]float64, jc [2][6]float64, jp [2][3]float64) {
	R, T, X := &s.R[f], &s.T[f], &s.X[p]
	Y := [3]float64{dot3(R[0], *X), dot3(R[1], *X), dot3(R[2], *X)}
	xc, yc, z := Y[0]+T[0], Y[1]+T[1], Y[2]+T[2]
	r[0] = W.At(2*f, p) - (s.in.Cx + s.in.Fx*xc/z)
	r[1] = W.At(2*f+1, p) - (s.in.Cy + s.in.Fy*yc/z)
	a := [2][3]float64{{s.in.Fx / z, 0, -s.in.Fx * xc / (z * z)}, {0, s.in.Fy / z, -s.in.Fy * yc / (z * z)}}
	for k := 0; k < 2; k++ {
		w := cross3(Y, a[k])
		jc[k] = [6]float64{w[0], w[1], w[2], a[k][0], a[k][1], a[k][2]}
		for c := 0; c < 3; c++ {
			jp[k][c] = a[k][0]*R[0][c] + a[k][1]*R[1][c] + a[k][2]*R[2][c]
		}
	}
	return r, jc, jp
}

// lmPerspective minimises the reprojection error jointly over all cameras
// and points by Levenberg–Marquardt with the points eliminated through the
// Schur complement (the reduced camera system; Triggs, McLauchlan, Hartley
// and Fitzgibbon, "Bundle adjustment — a modern synthesis", 2000, §6.1;
// Hartley and Zisserman, MVG 2nd ed., App. 6.3). The damping multiplies the
// diagonal by 1 + μ (Marquardt); it also absorbs the 7-dimensional gauge
// freedom. It returns the number of iterations taken and the final cost.
func lmPerspective(ctx context.Context, s *perspState, W *mat.Dense, iters int, tol float64, conv *Convergence) (float64, error) {
	nf, np := len(s.R), len(s.X)
	n6 := 6 * nf
	cost := s.cost(W)
	mu := 1e-3
	for it := 0; it < iters; it++ {
		if err := checkCtx(ctx); err != nil {
			return cost, err
		}
		Sd := make([]float64, n6*n6)
		rhs := make([]float64, n6)
		diag := make([]float64, n6)
		// Per point: V_p, g_p and the W_fp blocks; accumulate the camera
		// blocks U_f (into Sd's diagonal blocks) and the Schur terms.
		type ptSys struct {
			Vi [3][3]float64 // (V_p damped)⁻¹
			gp [3]float64
		}
		pts := make([]ptSys, np)
		// U_f and g_c first (independent of μ).
		for f := 0; f < nf; f++ {
			for p := 0; p < np; p++ {
				r, jc, _ := s.obsJac(W, f, p)
				for a := 0; a < 6; a++ {
					rhs[6*f+a] += jc[0][a]*r[0] + jc[1][a]*r[1]
					for b := 0; b < 6; b++ {
						Sd[(6*f+a)*n6+6*f+b] += jc[0][a]*jc[0][b] + jc[1][a]*jc[1][b]
					}
				}
			}
		}
		for i := 0; i < n6; i++ {
			diag[i] = Sd[i*n6+i]
			Sd[i*n6+i] *= 1 + mu
		}
		Wb := make([][6][3]float64, nf)
		for p := 0; p < np; p++ {
			var V [3][3]float64
			var gp [3]float64
			for f := 0; f < nf; f++ {
				r, jc, jp := s.obsJac(W, f, p)
				for a := 0; a < 3; a++ {
					gp[a] += jp[0][a]*r[0] + jp[1][a]*r[1]
					for b := 0; b < 3; b++ {
						V[a][b] += jp[0][a]*jp[0][b] + jp[1][a]*jp[1][b]
					}
				}
				for a := 0; a < 6; a++ {
					for b := 0; b < 3; b++ {
						Wb[f][a][b] = jc[0][a]*jp[0][b] + jc[1][a]*jp[1][b]
					}
				}
			}
			for a := 0; a < 3; a++ {
				V[a][a] *= 1 + mu
			}
			Vi, ok := inv33(V)
			if !ok {
				return cost, nil
			}
			pts[p] = ptSys{Vi: Vi, gp: gp}
			// WV = W_fp V⁻¹ (6×3) for every f; S_fg −= WV_f W_gpᵀ,
			// rhs_f −= WV_f g_p.
			WV := make([][6][3]float64, nf)
			for f := 0; f < nf; f++ {
				for a := 0; a < 6; a++ {
					for b := 0; b < 3; b++ {
						WV[f][a][b] = Wb[f][a][0]*Vi[0][b] + Wb[f][a][1]*Vi[1][b] + Wb[f][a][2]*Vi[2][b]
					}
					rhs[6*f+a] -= WV[f][a][0]*gp[0] + WV[f][a][1]*gp[1] + WV[f][a][2]*gp[2]
				}
			}
			for f := 0; f < nf; f++ {
				for g := 0; g < nf; g++ {
					for a := 0; a < 6; a++ {
						row := Sd[(6*f+a)*n6+6*g:]
						wv := WV[f][a]
						for b := 0; b < 6; b++ {
							row[b] -= wv[0]*Wb[g][b][0] + wv[1]*Wb[g][b][1] + wv[2]*Wb[g][b][2]
						}
					}
				}
			}
		}
		Ssym := mat.NewSymDense(n6, Sd)
		var chol mat.Cholesky
		if !chol.Factorize(Ssym) {
			mu *= 10
			continue
		}
		var dc mat.VecDense
		if chol.SolveVecTo(&dc, mat.NewVecDense(n6, rhs)) != nil {
			mu *= 10
			continue
		}
		trial := s.clone()
		for f := 0; f < nf; f++ {
			w := [3]float64{dc.AtVec(6 * f), dc.AtVec(6*f + 1), dc.AtVec(6*f + 2)}
			trial.R[f] = mul33(expSO3(w), s.R[f])
			trial.T[f] = [3]float64{s.T[f][0] + dc.AtVec(6*f+3), s.T[f][1] + dc.AtVec(6*f+4), s.T[f][2] + dc.AtVec(6*f+5)}
		}
		for p := 0; p < np; p++ {
			g := pts[p].gp
			for f := 0; f < nf; f++ {
				_, jc, jp := s.obsJac(W, f, p)
				for b := 0; b < 3; b++ {
					for a := 0; a < 6; a++ {
						g[b] -= (jc[0][a]*jp[0][b] + jc[1][a]*jp[1][b]) * dc.AtVec(6*f+a)
					}
				}
			}
			Vi := pts[p].Vi
			for k := 0; k < 3; k++ {
				trial.X[p][k] = s.X[p][k] + dot3(Vi[k], g)
			}
		}
		c := trial.cost(W)
		conv.Iterations++
		if c < cost {
			change := (cost - c) / cost
			conv.Changes = append(conv.Changes, change)
			*s = *trial
			cost = c
			mu = math.Max(mu/3, 1e-12)
			if change <= tol || c <= 1e-20*float64(2*nf*np) {
				conv.Termination = StopConverged
				return cost, nil
			}
		} else {
			conv.Changes = append(conv.Changes, 0)
			mu *= 4
			if mu > 1e12 {
				conv.Termination = StopStalled
				if cost <= 1e-20*float64(2*nf*np) || mu > 1e12 && len(conv.Changes) > 1 {
					conv.Termination = StopConverged
				}
				return cost, nil
			}
		}
		_ = diag
	}
	conv.Termination = StopIterationLimit
	return cost, nil
}

// inv33 inverts a 3×3 matrix (adjugate over determinant).
func inv33(m [3][3]float64) ([3][3]float64, bool) {
	c0, c1, c2 := cross3(m[1], m[2]), cross3(m[2], m[0]), cross3(m[0], m[1])
	det := dot3(m[0], c0)
	if det == 0 || math.IsNaN(det) {
		return [3][3]float64{}, false
	}
	var inv [3][3]float64
	for i := 0; i < 3; i++ {
		inv[i][0], inv[i][1], inv[i][2] = c0[i]/det, c1[i]/det, c2[i]/det
	}
	return inv, true
}
