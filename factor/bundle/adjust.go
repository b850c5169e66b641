package bundle

import (
	"context"
	"fmt"
	"math"
	"time"

	"trackfactor/factor"
	"trackfactor/factor/rotation"
)

// Result is a refined reconstruction with its summary and uncertainty.
type Result struct {
	// Reconstruction is a refined copy of the input (the input is not
	// changed): cameras, points, per-view and per-point RMS, Intrinsics
	// (with the refined focal length and k1) and Diagnostics (RMS,
	// NoiseSigma, Measurements, Parameters, a "bundle" Convergence entry
	// and, when the iterations did not converge, WarnNotConverged).
	Reconstruction *factor.Reconstruction
	Summary        Summary
	// Uncertainty is nil with Options.SkipUncertainty, or when the
	// normal matrix was singular (then Summary.Message says so).
	Uncertainty *Uncertainty
	// SingleAxis is set by AdjustSingleAxis.
	SingleAxis *SingleAxisResult

	final model // the refined parameters
}

// minCameraObs is the fewest refined points a camera with free motion
// needs (a camera has 5–6 parameters, a point gives 2 equations); cameras
// with fewer are held as they are.
const minCameraObs = 3

// Adjust refines rec against the measurements m by Levenberg–Marquardt
// bundle adjustment (see the package documentation for the model, the
// gauge and the stopping rules). The cameras of rec are paired with the
// rows of m by Camera.Frame (through m.Frames when given), its points with
// the columns by Point.Track (through m.Tracks). Cancelling ctx stops the
// iterations: the best iterate so far is returned with the context's
// error.
func Adjust(ctx context.Context, m *factor.Measurements, rec *factor.Reconstruction, opts Options) (*Result, error) {
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	given := opts
	opts = opts.WithDefaults()
	pr, err := prepareFree(m, rec, opts)
	if err != nil {
		return nil, err
	}
	return run(ctx, m, rec, pr.st, pr.mod, pr.X, pr.target, opts, given, pr.gaugeText, pr.refTrack, nil)
}

// prepared is a problem ready for run.
type prepared struct {
	st        *setup
	mod       model
	X         [][3]float64
	target    factor.Model
	gaugeText string
	refTrack  int
}

// prepareFree sets up the free-motion problem (opts with defaults).
func prepareFree(m *factor.Measurements, rec *factor.Reconstruction, opts Options) (*prepared, error) {
	target, err := targetModel(rec, opts)
	if err != nil {
		return nil, err
	}
	if err := checkCameras(rec); err != nil {
		return nil, err
	}
	st, err := newSetup(m, rec, opts.MinViews, lossFn{kind: opts.Loss, c2: opts.LossScale * opts.LossScale})
	if err != nil {
		return nil, err
	}
	gauge, heldCam, err := pickGauge(rec, st, minCameraObs)
	if err != nil {
		return nil, err
	}
	X := initialPoints(rec, st)
	var mod model
	var gaugeText string
	refTrack := rec.Points[st.pointRec[st.prob.ref]].Track
	gframe := rec.Cameras[gauge].Frame
	switch target {
	case factor.Orthographic, factor.ScaledOrthographic:
		am := &affineModel{scaled: target == factor.ScaledOrthographic, gauge: gauge, heldCam: heldCam}
		for _, c := range rec.Cameras {
			R, T, s := affineCamera(rec, c)
			am.R = append(am.R, R)
			am.T = append(am.T, T)
			am.S = append(am.S, s)
		}
		mod = am
		what := "rotation and translation"
		if am.scaled {
			what = "rotation, translation and scale"
		}
		gaugeText = fmt.Sprintf("camera of frame %d: %s held; point of track %d held along that camera's viewing direction (depth origin)", gframe, what, refTrack)
	case factor.Perspective:
		in, err := pickIntrinsics(rec, opts)
		if err != nil {
			return nil, err
		}
		l := lens{in: in, ratio: in.Fy / in.Fx, refineF: opts.RefineFocal, refK1: opts.RefineK1}
		pm := &perspModel{lens: l, gauge: gauge, heldCam: heldCam}
		for _, c := range rec.Cameras {
			R, T := perspectiveCamera(rec, c, in)
			pm.R = append(pm.R, R)
			pm.T = append(pm.T, T)
		}
		pm.refDist = rotation.Norm(rotation.Sub(X[st.prob.ref], pm.centre(gauge)))
		mod = pm
		gaugeText = fmt.Sprintf("camera of frame %d: rotation and translation held; point of track %d held at distance %.6g from that camera's centre (scale) and moved only across its line of sight", gframe, refTrack, pm.refDist)
	}
	return &prepared{st: st, mod: mod, X: X, target: target, gaugeText: gaugeText, refTrack: refTrack}, nil
}

// targetModel is the model the refinement uses.
func targetModel(rec *factor.Reconstruction, opts Options) (factor.Model, error) {
	model := opts.Model
	if model == "" {
		model = rec.Model
	}
	switch model {
	case factor.Paraperspective:
		model = factor.Perspective
	case factor.Orthographic, factor.ScaledOrthographic, factor.Perspective:
	default:
		return "", fmt.Errorf("bundle: reconstruction model %q cannot be refined; set Options.Model to %q, %q or %q", model, factor.Orthographic, factor.ScaledOrthographic, factor.Perspective)
	}
	return model, nil
}

func pickIntrinsics(rec *factor.Reconstruction, opts Options) (factor.Intrinsics, error) {
	switch {
	case opts.Intrinsics != nil:
		return *opts.Intrinsics, nil
	case rec.Intrinsics != nil:
		if err := rec.Intrinsics.Validate(); err != nil {
			return factor.Intrinsics{}, fmt.Errorf("bundle: the reconstruction's intrinsics: %v", err)
		}
		return *rec.Intrinsics, nil
	}
	return factor.Intrinsics{}, fmt.Errorf("bundle: the perspective model needs intrinsics; give Options.Intrinsics (fx, fy, cx, cy) or refine with an affine model")
}

// checkCameras refuses rotations that are not rotations.
func checkCameras(rec *factor.Reconstruction) error {
	for i, c := range rec.Cameras {
		R := c.R
		RtR := rotation.TMul(R, R)
		e := 0.0
		for a := 0; a < 3; a++ {
			for b := 0; b < 3; b++ {
				want := 0.0
				if a == b {
					want = 1
				}
				e = math.Max(e, math.Abs(RtR[a][b]-want))
			}
		}
		if !(e < 1e-6) || !(rotation.Det(R) > 0) {
			return fmt.Errorf("bundle: camera %d (frame %d) has a rotation that is not orthonormal with det +1 (|RᵀR − I| = %.2g); orthonormalise it first", i, c.Frame, e)
		}
		for _, v := range c.T {
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return fmt.Errorf("bundle: camera %d (frame %d) has a non-finite translation %v", i, c.Frame, c.T)
			}
		}
	}
	return nil
}

// pickGauge chooses the gauge camera (the first with at least minObs
// observations) and the cameras held for lack of observations.
func pickGauge(rec *factor.Reconstruction, st *setup, minObs int) (int, []bool, error) {
	held := make([]bool, len(rec.Cameras))
	gauge := -1
	for i := range rec.Cameras {
		if st.camObs[i] < minObs {
			held[i] = true
			continue
		}
		if gauge < 0 {
			gauge = i
		}
	}
	if gauge < 0 {
		return 0, nil, fmt.Errorf("bundle: no camera sees %d or more of the points that can be refined; check the mask and MinViews", minObs)
	}
	return gauge, held, nil
}

func initialPoints(rec *factor.Reconstruction, st *setup) [][3]float64 {
	X := make([][3]float64, len(st.pointRec))
	for j, k := range st.pointRec {
		X[j] = rec.Points[k].X
	}
	return X
}

// affineCamera returns the affine camera (R, 2D translation, scale) of c:
// as it is for the affine models; for the central models the weak-
// perspective camera at the world origin's depth: s = Fx/T_z and t the
// pixel of the origin.
func affineCamera(rec *factor.Reconstruction, c factor.Camera) ([3][3]float64, [2]float64, float64) {
	switch rec.Model {
	case factor.Perspective, factor.Paraperspective:
		if rec.Intrinsics != nil && c.T[2] > 0 {
			in := rec.Intrinsics
			return c.R, [2]float64{in.Cx + in.Fx*c.T[0]/c.T[2], in.Cy + in.Fy*c.T[1]/c.T[2]}, in.Fx / c.T[2]
		}
	}
	return c.R, [2]float64{c.T[0], c.T[1]}, c.Scale
}

// perspectiveCamera returns the perspective camera (R, T) of c: as it is
// for the central models; for the affine ones the camera whose image of
// the world origin and scale there agree with the affine camera:
// T_z = Fx/s, (T_x, T_y) = T_z·((t₀ − cx)/fx, (t₁ − cy)/fy).
func perspectiveCamera(rec *factor.Reconstruction, c factor.Camera, in factor.Intrinsics) ([3][3]float64, [3]float64) {
	switch rec.Model {
	case factor.Perspective, factor.Paraperspective:
		return c.R, c.T
	}
	z := in.Fx / c.Scale
	return c.R, [3]float64{z * (c.T[0] - in.Cx) / in.Fx, z * (c.T[1] - in.Cy) / in.Fy, z}
}

// run is the Levenberg–Marquardt loop shared by every model.
func run(ctx context.Context, m *factor.Measurements, rec *factor.Reconstruction, st *setup, mod model, X [][3]float64,
	outModel factor.Model, opts, given Options, gaugeText string, refTrack int, worldMap func([3]float64) [3]float64) (*Result, error) {
	t0 := time.Now()
	p := st.prob
	p.makeChunks(opts.Threads)
	lin := newLinearizer(p, mod)
	sum := Summary{Model: outModel, Motion: mod.motion(), Loss: opts.Loss, LossScale: opts.LossScale, Solver: opts.Solver,
		ThreadsGiven: given.Threads, ThreadsUsed: len(p.chunks) - 1, Cameras: p.nf, Points: p.np(),
		SkippedPoints: st.skipped, Observations: p.nobs(), Residuals: 2 * p.nobs(), Gauge: gaugeText, GaugeTrack: refTrack}
	free := 0
	for i := 0; i < lin.N; i++ {
		if !mod.held(i) {
			free++
		}
	}
	sum.Parameters = free + 3*p.np() - 1
	if sum.Parameters >= sum.Residuals {
		return nil, fmt.Errorf("bundle: %d parameters for %d residuals: the problem is underdetermined; track more points or frames", sum.Parameters, sum.Residuals)
	}
	if opts.Solver == Dense && lin.N+3*p.np() > DenseMaxParameters {
		return nil, fmt.Errorf("bundle: the dense solver takes at most %d parameters, this problem has %d; use the Schur solver", DenseMaxParameters, lin.N+3*p.np())
	}
	if lf, ok := mod.(interface{ focal() (float64, float64) }); ok {
		sum.InitialFocal, sum.InitialK1 = lf.focal()
	}
	iterative := opts.Solver == Schur && opts.IterativeAbove > 0 && p.nf > opts.IterativeAbove
	var cgs cgSystem
	switch {
	case opts.Solver == Dense:
		sum.LinearSolver = LinearFullCholesky
	case iterative:
		sum.LinearSolver = LinearPCG
	default:
		sum.LinearSolver = LinearDenseCholesky
	}

	te := time.Now()
	ev := p.evaluate(mod, X)
	sum.Timing.Evaluate += time.Since(te)
	if !ev.ok {
		return nil, fmt.Errorf("bundle: at the start some points lie at or behind a camera that observes them; the start is not a valid %s reconstruction (check the depth order and the intrinsics)", outModel)
	}
	n := float64(sum.Residuals)
	sum.InitialCost, sum.InitialRMS = ev.cost, math.Sqrt(ev.ss/n)
	cost, ss := ev.cost, ev.ss
	lambda, nu := opts.InitialDamping, 2.0
	g0 := -1.0
	var sys system
	var ctxErr error
	sum.Termination = IterationLimit
	sum.Message = fmt.Sprintf("%d iterations ran without meeting a tolerance", opts.MaxIterations)
	for it := 1; it <= opts.MaxIterations; it++ {
		if err := ctx.Err(); err != nil {
			ctxErr = err
			sum.Termination = Cancelled
			sum.Message = "stopped: " + err.Error()
			break
		}
		ti := time.Now()
		var dc []float64
		var dX [][3]float64
		var pred, gmax float64
		ok := false
		cgIters := 0
		tl := time.Now()
		if opts.Solver == Dense {
			dc, dX, pred, _, gmax, ok = lin.denseStep(mod, X, lambda)
			sum.Timing.Factorize += time.Since(tl)
		} else if iterative {
			lin.linearizeCG(mod, X, lambda, &sys, &cgs)
			sum.Timing.Linearize += time.Since(tl)
			gmax = sys.gmax
			if sys.ok {
				tf := time.Now()
				dc, ok = lin.solveCamerasCG(&sys, &cgs)
				cgIters = cgs.iters
				sum.CGIterations += cgIters
				sum.Timing.Factorize += time.Since(tf)
				if ok {
					tb := time.Now()
					dX, pred = lin.backSubstitute(mod, X, &sys, dc)
					sum.Timing.BackSubstitute += time.Since(tb)
				}
			}
		} else {
			lin.linearize(mod, X, lambda, &sys)
			sum.Timing.Linearize += time.Since(tl)
			gmax = sys.gmax
			if sys.ok {
				tf := time.Now()
				dc, ok = solveCameras(&sys)
				sum.Timing.Factorize += time.Since(tf)
				if ok {
					tb := time.Now()
					dX, pred = lin.backSubstitute(mod, X, &sys, dc)
					sum.Timing.BackSubstitute += time.Since(tb)
				}
			}
		}
		if g0 < 0 {
			g0 = gmax
		}
		rec := Iteration{Iteration: it, Cost: cost, GradientMax: gmax, Damping: lambda, CGIterations: cgIters}
		if opts.GradientTolerance > 0 && gmax <= opts.GradientTolerance*g0 && (it > 1 || g0 == 0) {
			sum.Iterations = it - 1
			sum.Termination = GradientToleranceReached
			sum.Message = fmt.Sprintf("largest gradient component %.3g ≤ %.3g × its initial value %.3g", gmax, opts.GradientTolerance, g0)
			break
		}
		sum.Iterations = it
		if !ok || !(pred > 0) {
			lambda *= nu
			nu *= 2
			rec.Accepted = false
			rec.Duration, rec.Elapsed = time.Since(ti), time.Since(t0)
			sum.Records = append(sum.Records, rec)
			sum.RejectedSteps++
			notify(opts, rec)
			if lambda > maxDiag {
				sum.Termination = NoProgress
				sum.Message = "the damping reached 1e32 without a step that lowers the cost"
				break
			}
			continue
		}
		stepSq, xSq := 0.0, mod.xNormSq()
		for i, v := range dc {
			if !mod.held(i) {
				stepSq += v * v
			}
		}
		for j := range dX {
			stepSq += rotation.Dot(dX[j], dX[j])
			xSq += rotation.Dot(X[j], X[j])
		}
		rec.StepNorm = math.Sqrt(stepSq)
		if opts.ParameterTolerance > 0 && rec.StepNorm <= opts.ParameterTolerance*(math.Sqrt(xSq)+opts.ParameterTolerance) {
			rec.Duration, rec.Elapsed = time.Since(ti), time.Since(t0)
			sum.Records = append(sum.Records, rec)
			notify(opts, rec)
			sum.Termination = ParameterToleranceReached
			sum.Message = fmt.Sprintf("step %.3g ≤ %.3g × (|x| + %.3g) with |x| = %.6g", rec.StepNorm, opts.ParameterTolerance, opts.ParameterTolerance, math.Sqrt(xSq))
			break
		}
		newMod := mod.update(dc)
		newX := make([][3]float64, len(X))
		for j := range X {
			newX[j] = rotation.Add(X[j], dX[j])
		}
		newMod.renormalize(newX, p.ref)
		te := time.Now()
		ev := p.evaluate(newMod, newX)
		sum.Timing.Evaluate += time.Since(te)
		change := cost - ev.cost
		rho := change / pred
		rec.CostChange, rec.Ratio = change, rho
		// Accept when the decrease is at least 1e-3 of the predicted one
		// (the Ceres solver's min_relative_decrease); update λ by
		// Nielsen's rule (Madsen, Nielsen and Tingleff 2004, eq. 3.14).
		if ev.ok && rho > 1e-3 {
			old := cost
			mod, X, cost, ss = newMod, newX, ev.cost, ev.ss
			lambda *= math.Max(1.0/3, 1-math.Pow(2*rho-1, 3))
			nu = 2
			rec.Accepted, rec.Cost = true, cost
			sum.SuccessfulSteps++
			rec.Duration, rec.Elapsed = time.Since(ti), time.Since(t0)
			sum.Records = append(sum.Records, rec)
			notify(opts, rec)
			if opts.FunctionTolerance > 0 && change <= opts.FunctionTolerance*old {
				sum.Termination = FunctionToleranceReached
				sum.Message = fmt.Sprintf("cost decrease %.3g ≤ %.3g × cost %.6g", change, opts.FunctionTolerance, old)
				break
			}
			continue
		}
		lambda *= nu
		nu *= 2
		sum.RejectedSteps++
		rec.Duration, rec.Elapsed = time.Since(ti), time.Since(t0)
		sum.Records = append(sum.Records, rec)
		notify(opts, rec)
		if lambda > maxDiag {
			sum.Termination = NoProgress
			sum.Message = "the damping reached 1e32 without a step that lowers the cost"
			break
		}
	}
	if opts.MaxIterations == 0 {
		sum.Termination = IterationLimit
		sum.Message = "MaxIterations is 0: nothing was refined"
	}
	sum.FinalCost, sum.FinalRMS = cost, math.Sqrt(ss/n)
	sum.NoiseSigma = sum.FinalRMS / math.Sqrt(1-float64(sum.Parameters)/n)
	if lf, ok := mod.(interface{ focal() (float64, float64) }); ok {
		sum.FinalFocal, sum.FinalK1 = lf.focal()
	}

	res := &Result{final: mod}
	res.Reconstruction = exportRec(m, rec, st, mod, X, outModel, worldMap, &sum)
	if !opts.SkipUncertainty && ctxErr == nil && opts.UncertaintyMaxCameras > 0 && p.nf > opts.UncertaintyMaxCameras {
		sum.Message += fmt.Sprintf("; uncertainty not computed: %d cameras is more than UncertaintyMaxCameras = %d (the covariance needs the dense inverse of the %d × %d reduced camera system)",
			p.nf, opts.UncertaintyMaxCameras, lin.N, lin.N)
	} else if !opts.SkipUncertainty && ctxErr == nil {
		tu := time.Now()
		if opts.Progress != nil {
			opts.Progress("uncertainty", 0, 1)
		}
		u, err := uncertainty(lin, mod, X, st, rec, &sum)
		if err != nil {
			sum.Message += "; uncertainty not computed: " + err.Error()
		} else {
			res.Uncertainty = u
		}
		if opts.Progress != nil {
			opts.Progress("uncertainty", 1, 1)
		}
		sum.Timing.Uncertainty = time.Since(tu)
	}
	sum.Timing.Total = time.Since(t0)
	res.Summary = sum
	d := &res.Reconstruction.Diagnostics
	d.Convergence = append(d.Convergence, factor.Convergence{
		Stage: "bundle", Iterations: sum.Iterations, Changes: relChanges(sum.Records), Termination: stopName(sum.Termination),
		Tolerance: opts.FunctionTolerance, InitialRMS: sum.InitialRMS, FinalRMS: sum.FinalRMS})
	if !sum.Termination.Converged() {
		d.Warn(factor.WarnNotConverged, fmt.Sprintf("bundle adjustment stopped by %s after %d iterations (%s); the result may not be the optimum", sum.Termination, sum.Iterations, sum.Message))
	}
	if ctxErr != nil {
		return res, fmt.Errorf("bundle: stopped after %d iterations: %w", sum.Iterations, ctxErr)
	}
	return res, nil
}

func notify(opts Options, r Iteration) {
	if opts.OnIteration != nil {
		opts.OnIteration(r)
	}
	if opts.Progress != nil {
		opts.Progress("bundle", r.Iteration, opts.MaxIterations)
	}
}

func relChanges(rs []Iteration) []float64 {
	out := make([]float64, 0, len(rs))
	for _, r := range rs {
		if r.Accepted && r.Cost+r.CostChange > 0 {
			out = append(out, r.CostChange/(r.Cost+r.CostChange))
		} else {
			out = append(out, 0)
		}
	}
	return out
}

func stopName(t Termination) string {
	switch {
	case t.Converged():
		return factor.StopConverged
	case t == NoProgress:
		return factor.StopStalled
	}
	return factor.StopIterationLimit
}

// exportRec writes the refined state into a copy of rec.
func exportRec(m *factor.Measurements, rec *factor.Reconstruction, st *setup, mod model, X [][3]float64, outModel factor.Model,
	worldMap func([3]float64) [3]float64, sum *Summary) *factor.Reconstruction {
	out := *rec
	out.Model = outModel
	out.Cameras = append([]factor.Camera(nil), rec.Cameras...)
	out.Points = append([]factor.Point(nil), rec.Points...)
	d := rec.Diagnostics
	d.Convergence = append([]factor.Convergence(nil), rec.Diagnostics.Convergence...)
	d.Warnings = append([]factor.Warning(nil), rec.Diagnostics.Warnings...)
	d.SingularValues = append([]float64(nil), rec.Diagnostics.SingularValues...)
	d.Candidates = append([]factor.Candidate(nil), rec.Diagnostics.Candidates...)
	out.Diagnostics = d
	if rec.Intrinsics != nil {
		in := *rec.Intrinsics
		out.Intrinsics = &in
	}
	mod.write(out.Cameras, &out.Intrinsics)
	if outModel == factor.Orthographic || outModel == factor.ScaledOrthographic {
		out.Diagnostics.MirrorAmbiguous = true
	} else {
		out.Diagnostics.MirrorAmbiguous = false
	}
	for k := range out.Points {
		if worldMap != nil {
			out.Points[k].X = worldMap(out.Points[k].X)
		}
	}
	for j, k := range st.pointRec {
		out.Points[k].X = X[j]
	}
	// Residuals per camera and per point, over every observation of a
	// point with a column (refined or not), unweighted.
	camSS := make([]float64, len(out.Cameras))
	camN := make([]int, len(out.Cameras))
	for k := range out.Points {
		col := st.colOf[k]
		if col < 0 {
			continue
		}
		ss, n := 0.0, 0
		for i := range out.Cameras {
			r := st.camRow[i]
			if r < 0 || !m.Observed(r, col) {
				continue
			}
			X := out.Points[k].X
			u, v, ok := mod.project(i, &X, nil)
			if !ok {
				continue
			}
			e := sq(u-m.W.At(2*r, col)) + sq(v-m.W.At(2*r+1, col))
			ss += e
			n++
			camSS[i] += e
			camN[i]++
		}
		out.Points[k].Views = n
		if n > 0 {
			out.Points[k].RMS = math.Sqrt(ss / float64(2*n))
		}
	}
	for i := range out.Cameras {
		if camN[i] > 0 {
			out.Cameras[i].RMS = math.Sqrt(camSS[i] / float64(2*camN[i]))
		}
	}
	out.Diagnostics.RMS = sum.FinalRMS
	out.Diagnostics.NoiseSigma = sum.NoiseSigma
	out.Diagnostics.Measurements = sum.Residuals
	out.Diagnostics.Parameters = sum.Parameters
	return &out
}

func sq(x float64) float64 { return x * x }

func (m *perspModel) focal() (float64, float64) { return m.in.Fx, m.in.K1 }
func (m *axisModel) focal() (float64, float64) {
	if !m.persp {
		return 0, 0
	}
	return m.in.Fx, m.in.K1
}
