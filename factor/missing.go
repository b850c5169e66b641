package factor

// Affine factorization with missing data.
//
// # The model
//
// With tracks that start and end anywhere (a turntable: every point turns
// into view and out again) the rows of W cannot be centred, so the image
// translation is modelled explicitly. For every observed entry (f, p)
//
//	w_fp ≈ M_f X_p + t_f = U_f [X_p; 1],   U_f = [M_f t_f] (2×4),
//
// a rank-4 factorization W ≈ U V with the last row of V fixed to ones
// (Tomasi and Kanade, CMU-CS-92-104, 1992, model the translation and fill
// in missing entries from a complete block; cited from memory). The cost is the weighted sum of squares
// over the observed entries only,
//
//	C(U, X) = Σ_{(f,p) observed} ω_fp ‖w_fp − M_f X_p − t_f‖²,
//
// with ω = 1 for least squares and the Huber weights of the robust loss
// (below). The model is invariant to the affine gauge
// U_f → U_f G, [X; 1] → G⁻¹[X; 1] with G = [A b; 0 1], 12 degrees of freedom,
// so a fit has d = 8F + 3P − 12 free parameters (Hartley and Zisserman,
// MVG 2nd ed., §18.2) and leaves the RMS residual σ·√(1 − d/N) over the
// N observed coordinates (the ML residual result, §5.1.3).
//
// After the affine fit the metric upgrade of the complete case is applied
// to the stacked M (Tomasi–Kanade constraints, nearest positive-definite
// fallback), each camera's rows are made orthonormal (polar factor) and the
// orthographic (or scaled-orthographic) model is refined over the observed
// entries by block-coordinate descent. The world is anchored on the first
// recovered frame (its rotation is the identity, its scale 1) and the
// recovered points' centroid is the origin.
//
// See missing_varpro.go for the solver, missing_init.go for the
// initialisation and visibility.go for the pattern diagnostics.

import (
	"context"
	"errors"
	"fmt"
	"math"
	"runtime"
	"slices"
	"sort"
	"strings"
	"time"

	"gonum.org/v1/gonum/mat"
)

// Solver names the method that minimises the missing-data cost.
type Solver string

const (
	// SolverVarPro is variable projection: the points are eliminated in
	// closed form and Levenberg–Marquardt runs on the camera block only
	// (Hong, Zach and Fitzgibbon, CVPR 2017; Okatani and Deguchi, IJCV 2007).
	SolverVarPro Solver = "varpro"
	// SolverALS is alternating least squares (points given cameras, cameras
	// given points), the baseline.
	SolverALS Solver = "als"
)

// Loss names the loss applied to the residual of one observation.
type Loss string

const (
	// LossHuber is the Huber loss ρ(r) = r²/2 for r ≤ k, k·r − k²/2 beyond,
	// minimised by iteratively reweighted least squares (Holland and
	// Welsch, Commun. Statist. A6, 1977), with r the 2D residual length.
	LossHuber Loss = "huber"
	// LossSquared is plain least squares.
	LossSquared Loss = "squared"
)

// Termination tells why a run stopped.
type Termination string

const (
	// TermConverged: an iteration lowered the cost by less than
	// MissingOptions.Tolerance × cost, or the cost reached the rounding
	// floor (10⁻²⁴ per coordinate of the normalised data: an exact fit).
	TermConverged Termination = "converged"
	// TermIterationLimit: MaxIterations reached before convergence.
	TermIterationLimit Termination = "iteration-limit"
	// TermNoProgress: the Levenberg–Marquardt damping reached its ceiling
	// (1e12 × the largest curvature) without lowering the cost.
	TermNoProgress Termination = "no-progress"
)

// Warning codes of the missing-data path (see also types.go).
const (
	// WarnDisconnectedViews: the frame–track graph splits into parts that
	// share fewer than MinSharedTracks tracks; they cannot be tied into one
	// reconstruction.
	WarnDisconnectedViews = "disconnected-views"
	// WarnFramesUnrecovered: some frames could not be reconstructed (too
	// few tracks tie them to the rest); the message names them.
	WarnFramesUnrecovered = "frames-unrecovered"
	// WarnOptimumUnverified: the restarts never reached the same optimum
	// twice; the result may be a local minimum.
	WarnOptimumUnverified = "optimum-unverified"
)

// ErrDisconnected is returned when no complete block of frames and tracks
// large enough to start the reconstruction exists. Match with errors.Is.
var ErrDisconnected = errors.New("no complete block of frames and tracks to start from")

// MissingOptions configure FactorizeIncomplete and FitAffineIncomplete. The
// zero value gives the documented defaults.
type MissingOptions struct {
	// Solver is SolverVarPro (default, "") or SolverALS.
	Solver Solver

	// MaxIterations bounds one run: accepted Levenberg–Marquardt steps for
	// VarPro, sweeps for ALS. Zero means 300.
	MaxIterations int

	// Tolerance stops a run when an iteration lowers the cost by less than
	// Tolerance × cost. Zero means 1e-9.
	Tolerance float64

	// MaxRuns bounds the runs: the first starts from the propagated
	// initialisation, the others from random cameras; they stop as soon as
	// two runs reach the same lowest cost (Hong and Fitzgibbon, ICCV 2015).
	// Zero means 8 for up to 100 recovered frames and 1 beyond (a random
	// restart of a larger problem costs minutes; set MaxRuns to verify
	// anyway); 1 means a single run whose optimum is not verified.
	MaxRuns int

	// AgreeTolerance: two runs reached the same optimum when their costs
	// differ by less than AgreeTolerance × the lower one (costs at the
	// rounding floor of an exact fit all agree). Zero means 1e-6.
	AgreeTolerance float64

	// Seed of the random starts; run r draws from the PCG stream
	// (Seed, r). Every value, 0 included, is a valid seed.
	Seed uint64

	// Loss is LossHuber (default, "") or LossSquared.
	Loss Loss

	// HuberScale k of the Huber loss, px of 2D residual length. Zero means
	// max(3σ̂, 0.5 px) with σ̂ = Options.NoiseSigma or, when that is zero,
	// the robust estimate 1.4826·MAD/√(1 − d/N) from the least-squares fit.
	HuberScale float64

	// RejectThreshold: observations whose 2D residual exceeds it after the
	// robust fit are rejected (weight 0) and listed. Zero means
	// 2 × HuberScale (6σ̂: a Gaussian 2D residual exceeds it with
	// probability e^−18); negative turns rejection off.
	RejectThreshold float64

	// RobustRounds bounds the reweighting rounds of the robust loss. Zero
	// means 10.
	RobustRounds int

	// Lift adds structure dimensions to the first stage of every random
	// VarPro start (see missing_varpro.go, "Lifted random starts"). Zero
	// means 1; negative turns the lifted stage off.
	Lift int

	// LiftIterations bounds the lifted stage. Zero means 30.
	LiftIterations int

	// MinSharedTracks: two parts of the frame–track graph sharing fewer
	// tracks are reported as disconnected (WarnDisconnectedViews). Zero
	// means 4 (an affine camera has 8 unknowns, 2 equations per track).
	MinSharedTracks int

	// Threads is the number of goroutines. Zero means runtime.GOMAXPROCS(0).
	// Results are deterministic for a fixed Threads.
	Threads int

	// IterativeAbove is the number of recovered frames above which the
	// VarPro camera step is solved by preconditioned conjugate gradients
	// on the point blocks (memory and time per iteration linear in the
	// observations; see missing_cg.go) instead of forming and factoring
	// the dense (8F)² camera system. Zero means DefaultIterativeAbove
	// (200); negative means always dense. The ALS solver ignores it.
	IterativeAbove int
}

// withDefaults fills the zero fields; it is idempotent (negative "off"
// values stay as they are).
func (o MissingOptions) withDefaults() MissingOptions {
	if o.Solver == "" {
		o.Solver = SolverVarPro
	}
	if o.MaxIterations == 0 {
		o.MaxIterations = 300
	}
	if o.Tolerance == 0 {
		o.Tolerance = 1e-9
	}
	if o.AgreeTolerance == 0 {
		o.AgreeTolerance = 1e-6
	}
	if o.Loss == "" {
		o.Loss = LossHuber
	}
	if o.RobustRounds == 0 {
		o.RobustRounds = 10
	}
	if o.MinSharedTracks == 0 {
		o.MinSharedTracks = 4
	}
	if o.Lift == 0 {
		o.Lift = 1
	}
	if o.LiftIterations == 0 {
		o.LiftIterations = 30
	}
	if o.Threads == 0 {
		o.Threads = runtime.GOMAXPROCS(0)
	}
	if o.IterativeAbove == 0 {
		o.IterativeAbove = DefaultIterativeAbove
	}
	return o
}

// iterative reports whether the camera step of prob is solved by
// conjugate gradients (options with defaults).
func (o MissingOptions) iterative(prob *incProblem) bool {
	return o.IterativeAbove > 0 && prob.nf > o.IterativeAbove
}

// Validate reports the first option that breaks its rule.
func (o MissingOptions) Validate() error {
	bad := func(field string, v any, rule string) error {
		return fmt.Errorf("factor: missing-data option %s = %v: %s", field, v, rule)
	}
	finite := func(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }
	switch {
	case o.Solver != "" && o.Solver != SolverVarPro && o.Solver != SolverALS:
		return bad("Solver", o.Solver, fmt.Sprintf("must be %q or %q", SolverVarPro, SolverALS))
	case o.MaxIterations < 0:
		return bad("MaxIterations", o.MaxIterations, "must be ≥ 0 (0 means 300)")
	case o.Tolerance < 0 || !finite(o.Tolerance):
		return bad("Tolerance", o.Tolerance, "must be a finite number ≥ 0 (0 means 1e-9)")
	case o.MaxRuns < 0:
		return bad("MaxRuns", o.MaxRuns, "must be ≥ 0 (0 chooses by size, 1 is a single run)")
	case o.AgreeTolerance < 0 || !finite(o.AgreeTolerance):
		return bad("AgreeTolerance", o.AgreeTolerance, "must be a finite number ≥ 0 (0 means 1e-6)")
	case o.Loss != "" && o.Loss != LossHuber && o.Loss != LossSquared:
		return bad("Loss", o.Loss, fmt.Sprintf("must be %q or %q", LossHuber, LossSquared))
	case o.HuberScale < 0 || !finite(o.HuberScale):
		return bad("HuberScale", o.HuberScale, "must be a finite number of px ≥ 0 (0 estimates it)")
	case !finite(o.RejectThreshold):
		return bad("RejectThreshold", o.RejectThreshold, "must be finite (0 means 2 × HuberScale, negative turns rejection off)")
	case o.RobustRounds < 0:
		return bad("RobustRounds", o.RobustRounds, "must be ≥ 0 (0 means 10)")
	case o.Lift > 6:
		return bad("Lift", o.Lift, "must be ≤ 6 (0 means 1, negative turns it off)")
	case o.LiftIterations < 0:
		return bad("LiftIterations", o.LiftIterations, "must be ≥ 0 (0 means 30)")
	case o.MinSharedTracks < 0:
		return bad("MinSharedTracks", o.MinSharedTracks, "must be ≥ 0 (0 means 4)")
	case o.Threads < 0:
		return bad("Threads", o.Threads, "must be ≥ 0 (0 means GOMAXPROCS)")
	}
	return nil
}

// Observation names one entry of the measurement matrix by the caller's
// frame index and track id.
type Observation struct {
	Frame int `json:"frame"`
	Track int `json:"track"`
}

// RunReport describes one run of the solver.
type RunReport struct {
	// Start is "propagation" (the propagated complete block) or "random".
	Start string `json:"start"`
	// Iterations counts accepted steps (VarPro) or sweeps (ALS) of the
	// rank-3 stage, LiftedIterations those of the lifted first stage of a
	// random VarPro start; Evaluations counts cost evaluations of both
	// (rejected trial steps included).
	Iterations       int         `json:"iterations"`
	LiftedIterations int         `json:"lifted_iterations"`
	Evaluations      int         `json:"evaluations"`
	Termination      Termination `json:"termination"`
	// LinearSolver is the solver of the VarPro camera step:
	// LinearDenseCholesky or LinearPCG (empty for ALS runs, which solve
	// per camera). CGSolves counts the conjugate-gradient
	// solves (one per trial step) and CGIterations their iterations, both
	// stages together; zero for the dense solver.
	LinearSolver string `json:"linear_solver"`
	CGSolves     int    `json:"cg_solves"`
	CGIterations int    `json:"cg_iterations"`
	// Cost is the final Σ ω‖residual‖², px²; RMS = √(cost/N), px.
	Cost float64 `json:"cost_px2"`
	RMS  float64 `json:"rms_px"`
	// CostHistory holds the cost before the first and after every
	// iteration, px².
	CostHistory []float64 `json:"cost_history_px2"`
	Seconds     float64   `json:"seconds"`
}

// RobustReport describes the robust (Huber) stage.
type RobustReport struct {
	Loss Loss `json:"loss"`
	// NoiseSigma is the per-coordinate noise level used to set the scale,
	// px (given, or 1.4826·MAD/√(1 − d/N) of the least-squares residuals).
	NoiseSigma      float64 `json:"noise_sigma_px"`
	HuberScale      float64 `json:"huber_scale_px"`
	RejectThreshold float64 `json:"reject_threshold_px"`
	// Rounds of reweighting and the solver iterations they took.
	Rounds     int `json:"rounds"`
	Iterations int `json:"iterations"`
	// Downweighted counts observations with a Huber weight below 1 at the
	// end; Rejected lists those with weight 0 (also tracks left with fewer
	// than two trustworthy views, all of whose observations are rejected).
	Downweighted  int           `json:"downweighted"`
	RejectedCount int           `json:"rejected_count"`
	Rejected      []Observation `json:"rejected"`
}

// InitReport describes the initialisation.
type InitReport struct {
	// BlockFrames are the frames (caller's indices) of the complete block
	// factorised in closed form; BlockTracks the number of its tracks.
	BlockFrames []int `json:"block_frames"`
	BlockTracks int   `json:"block_tracks"`
	// BlockSingularValues of the centred block, px, largest first (at most
	// 10).
	BlockSingularValues []float64 `json:"block_singular_values"`
	// Rounds of propagation (new points from known cameras, new cameras
	// from known points); PropagatedFrames were reached by it (the block
	// included), FilledFrames were not and started from the camera of the
	// frame they share most tracks with.
	Rounds           int `json:"rounds"`
	PropagatedFrames int `json:"propagated_frames"`
	FilledFrames     int `json:"filled_frames"`
	// RMS of the propagated initialisation over the recovered entries, px.
	RMS float64 `json:"rms_px"`
}

// MissingReport is the full account of a missing-data factorization.
type MissingReport struct {
	Solver     Solver     `json:"solver"`
	Visibility Visibility `json:"visibility"`
	Init       InitReport `json:"init"`
	// Runs in the order they were made; Best indexes the lowest cost.
	Runs []RunReport `json:"runs"`
	Best int         `json:"best_run"`
	// Verified is true when two runs reached the lowest cost (within
	// AgreeTolerance); RunsToAgree is then the number of runs it took.
	Verified    bool `json:"verified"`
	RunsToAgree int  `json:"runs_to_agree"`
	// Iterations, CostHistory and Termination of the best run.
	Iterations  int         `json:"iterations"`
	CostHistory []float64   `json:"cost_history_px2"`
	Termination Termination `json:"termination"`
	// AffineRMS is the RMS residual per coordinate of the rank-4 affine fit
	// over the inlier observations, px; AffineNoiseSigma the noise level it
	// implies, AffineRMS/√(1 − d/N), with N = Observations and
	// d = AffineParameters = 8F + 3P − 12 (recovered frames and points).
	AffineRMS        float64      `json:"affine_rms_px"`
	AffineNoiseSigma float64      `json:"affine_noise_sigma_px"`
	Observations     int          `json:"observations"`
	AffineParameters int          `json:"affine_parameters"`
	Robust           RobustReport `json:"robust"`
	// Recovered and unrecovered frames (caller's indices) and tracks
	// (caller's ids). A track needs two recovered frames, a frame four
	// recovered tracks.
	RecoveredFrames   []int     `json:"recovered_frames"`
	UnrecoveredFrames []int     `json:"unrecovered_frames"`
	UnrecoveredTracks []int     `json:"unrecovered_tracks"`
	Warnings          []Warning `json:"warnings"`
	Seconds           float64   `json:"seconds"`
}

// AffineFit is the rank-4 affine factorization W ≈ [M t][X; 1] over the
// observed entries, in pixels, for the recovered frames and tracks.
type AffineFit struct {
	// Frames and Tracks are column/row positions in the Measurements
	// (0-based, not the caller's ids) of the recovered frames and tracks.
	Frames, Tracks []int
	// M is 2F'×3, T has 2F' entries (row 2i x, 2i+1 y of Frames[i]), X is
	// 3×P' (column j for Tracks[j]); all in an arbitrary affine gauge.
	M *mat.Dense
	T []float64
	X *mat.Dense
	// Weights per observation of the final fit (1 least squares, <1 Huber
	// downweighted, 0 rejected), F×P row-major like Measurements.Mask;
	// entries not observed or not recovered are 0.
	Weights []float64
}

// FitAffineIncomplete computes the affine factorization of incomplete
// measurements: initialisation from the largest well-conditioned complete
// block and propagation, refinement with restarts, then the robust loss.
func FitAffineIncomplete(ctx context.Context, m *Measurements, opts Options, mo MissingOptions) (*AffineFit, *MissingReport, error) {
	if err := opts.Validate(); err != nil {
		return nil, nil, err
	}
	if err := mo.Validate(); err != nil {
		return nil, nil, err
	}
	opts = opts.withDefaults()
	mo = mo.withDefaults()
	checkShape(m)
	incCheckFinite(m)
	start := time.Now()
	rep := &MissingReport{Solver: mo.Solver}
	st, err := incFitAffine(ctx, m, opts, mo, rep)
	if err != nil {
		return nil, rep, err
	}
	fit := st.export(m)
	rep.Seconds = time.Since(start).Seconds()
	return fit, rep, nil
}

// FactorizeIncomplete recovers cameras and structure from measurements with
// missing entries (Measurements.Mask): the affine fit of
// FitAffineIncomplete, then the metric upgrade and the refinement of
// opts.Model (Orthographic, the default, or ScaledOrthographic).
//
// Cameras and Points hold only the recovered frames and tracks (in the
// order of the input); the report names the others. Camera.T is the image
// translation (T[2] = 0), Point.Views the number of frames the track is
// observed in, and RMS values are over the inlier observations.
func FactorizeIncomplete(ctx context.Context, m *Measurements, opts Options, mo MissingOptions) (*Reconstruction, *MissingReport, error) {
	if err := opts.Validate(); err != nil {
		return nil, nil, err
	}
	if err := mo.Validate(); err != nil {
		return nil, nil, err
	}
	opts = opts.withDefaults()
	mo = mo.withDefaults()
	checkShape(m)
	incCheckFinite(m)
	if opts.Model != Orthographic && opts.Model != ScaledOrthographic {
		return nil, nil, fmt.Errorf("factor: model %q is not available for incomplete tracks; use %q or %q", opts.Model, Orthographic, ScaledOrthographic)
	}
	start := time.Now()
	rep := &MissingReport{Solver: mo.Solver}
	st, err := incFitAffine(ctx, m, opts, mo, rep)
	if err != nil {
		return nil, rep, err
	}
	rec, err := incUpgrade(ctx, m, st, opts, mo, rep)
	rep.Seconds = time.Since(start).Seconds()
	if err != nil {
		return nil, rep, err
	}
	rec.Diagnostics.Warnings = append(rec.Diagnostics.Warnings, rep.Warnings...)
	return rec, rep, nil
}

func incCheckFinite(m *Measurements) {
	nf, np := m.Dims()
	for f := 0; f < nf; f++ {
		xr, yr := m.W.RawRowView(2*f), m.W.RawRowView(2*f+1)
		for p := 0; p < np; p++ {
			if !m.Observed(f, p) {
				continue
			}
			if math.IsNaN(xr[p]) || math.IsInf(xr[p], 0) || math.IsNaN(yr[p]) || math.IsInf(yr[p], 0) {
				panic(fmt.Sprintf("factor: observed entry (frame %d, track %d) is NaN or Inf", f, p))
			}
		}
	}
}

// incState is the fitted affine problem, kept for the metric upgrade.
type incState struct {
	prob   *incProblem
	u      []float64 // 8F' camera block, normalised coordinates
	X      []float64 // 3P'
	frames []int     // positions in m of the problem's frames
	points []int     // positions in m of the problem's points
	block  []float64 // singular values of the initial block, px
	blockN [2]int    // frames, tracks of the block
}

func incFrameID(m *Measurements, f int) int {
	if m.Frames != nil {
		return m.Frames[f]
	}
	return f
}

func incTrackID(m *Measurements, p int) int {
	if m.Tracks != nil {
		return m.Tracks[p]
	}
	return p
}

func incFitAffine(ctx context.Context, m *Measurements, opts Options, mo MissingOptions, rep *MissingReport) (*incState, error) {
	nf, np := m.Dims()
	if nf < MinFrames || np < MinPoints {
		return nil, fmt.Errorf("factor: %w: %d frames × %d tracks; incomplete tracks need at least %d frames and %d tracks", ErrTooFew, nf, np, MinFrames, MinPoints)
	}
	rep.Visibility = VisibilityPattern(m, mo.MinSharedTracks)
	if w, ok := incDisconnectedWarning(m, &rep.Visibility, mo.MinSharedTracks); ok {
		rep.Warnings = append(rep.Warnings, w)
	}
	if err := checkCtx(ctx); err != nil {
		return nil, err
	}
	frames, points := incCore(m, &rep.Visibility)
	inF := make([]bool, nf)
	for _, f := range frames {
		inF[f] = true
		rep.RecoveredFrames = append(rep.RecoveredFrames, incFrameID(m, f))
	}
	for f := 0; f < nf; f++ {
		if !inF[f] {
			rep.UnrecoveredFrames = append(rep.UnrecoveredFrames, incFrameID(m, f))
		}
	}
	inP := make([]bool, np)
	for _, p := range points {
		inP[p] = true
	}
	for p := 0; p < np; p++ {
		if !inP[p] {
			rep.UnrecoveredTracks = append(rep.UnrecoveredTracks, incTrackID(m, p))
		}
	}
	if len(frames) < MinFrames || len(points) < MinPoints {
		return nil, fmt.Errorf("factor: %w: only %d frames and %d tracks hang together (each track needs 2 frames, each frame %d tracks); track longer or link the tracks", ErrTooFew, len(frames), len(points), MinPoints)
	}
	if len(rep.UnrecoveredFrames) > 0 {
		rep.Warnings = append(rep.Warnings, Warning{Code: WarnFramesUnrecovered, Message: fmt.Sprintf(
			"frames %s cannot be reconstructed: they share too few tracks with the rest (a frame needs %d tracks seen in other reconstructed frames); track longer, link tracks across the gap (loop closure) or reconstruct those frames separately",
			incRanges(rep.UnrecoveredFrames), MinPoints)})
	}
	opts.progress("incomplete: initialise", 0, 1)
	prob := newIncProblem(m, frames, points, nil)
	ini, err := incPropagate(prob)
	if err != nil {
		return nil, err
	}
	opts.progress("incomplete: initialise", 1, 1)
	u0 := ini.u
	st := &incState{prob: prob, frames: frames, points: points, blockN: [2]int{len(ini.blockFrames), len(ini.blockPoints)}}
	for _, v := range ini.blockValues {
		st.block = append(st.block, v*prob.norm.scale)
	}
	rep.Init = InitReport{BlockTracks: len(ini.blockPoints), Rounds: ini.rounds, PropagatedFrames: ini.propagated, FilledFrames: ini.filled}
	for _, f := range ini.blockFrames {
		rep.Init.BlockFrames = append(rep.Init.BlockFrames, incFrameID(m, frames[f]))
	}
	rep.Init.BlockSingularValues = append([]float64(nil), st.block[:min(10, len(st.block))]...)
	n := prob.inlierCount()
	d := 8*prob.nf + 3*prob.np - 12
	if 2*n <= d {
		return nil, fmt.Errorf("factor: %w: %d observed coordinates for %d unknowns of the affine model; more or longer tracks are needed", ErrTooFew, 2*n, d)
	}
	{
		X := make([]float64, 3*prob.np)
		c := prob.cost3(u0, X, mo.Threads)
		rep.Init.RMS = prob.norm.scale * math.Sqrt(c/float64(2*n))
	}

	// Global search: runs until the same optimum is reached twice.
	best, err := incRestarts(ctx, prob, u0, opts, mo, rep)
	if err != nil {
		return nil, err
	}
	st.u, st.X = best.u, best.X

	if mo.Loss == LossHuber {
		if err := incRobust(ctx, st, m, opts, mo, rep); err != nil {
			return nil, err
		}
	}
	// Final affine statistics over the inliers.
	n = prob.inlierCount()
	d = 8*prob.nf + 3*prob.np - 12
	ss := prob.inlierSS(st.u, st.X)
	rep.Observations, rep.AffineParameters = 2*n, d
	if n > 0 {
		rep.AffineRMS = prob.norm.scale * math.Sqrt(ss/float64(2*n))
	}
	if 2*n > d {
		rep.AffineNoiseSigma = rep.AffineRMS / math.Sqrt(1-float64(d)/float64(2*n))
	}
	return st, nil
}

// incRun is a finished run in normalised coordinates.
type incRun struct {
	report RunReport
	u, X   []float64
	cost   float64 // normalised units
}

// incRestarts runs the solver from the propagated start and from
// random starts until two runs agree on the lowest cost (Hong and
// Fitzgibbon, ICCV 2015: the best of many random starts, accepted once it
// has been reached twice). Runs go in batches of Threads concurrent
// runs; the decision is taken in run order, so the result does not depend
// on the batch size.
func incRestarts(ctx context.Context, prob *incProblem, u0 []float64, opts Options, mo MissingOptions, rep *MissingReport) (*incRun, error) {
	if mo.MaxRuns == 0 {
		mo.MaxRuns = 8
		if prob.nf > 100 {
			mo.MaxRuns = 1
		}
	}
	var done []*incRun
	// Each run of a batch also splits its own work over Threads
	// goroutines, so a run left alone when the others of its batch have
	// finished still uses every core.
	batch := max(1, min(mo.Threads, mo.MaxRuns))
	inner := mo.Threads
	verified := func() (int, bool) {
		bestC := math.Inf(1)
		for _, r := range done {
			bestC = math.Min(bestC, r.cost)
		}
		hits := 0
		for _, r := range done {
			if r.cost <= bestC*(1+mo.AgreeTolerance)+prob.costFloor() {
				hits++
			}
		}
		return hits, hits >= 2
	}
	for len(done) < mo.MaxRuns {
		nb := min(batch, mo.MaxRuns-len(done))
		out := make([]*incRun, nb)
		errs := make([]error, nb)
		first := len(done)
		runOne := func(i int) {
			r := first + i
			sp := incSolveSpec{solver: mo.Solver, maxIter: mo.MaxIterations, tol: mo.Tolerance, threads: inner, iterative: mo.iterative(prob)}
			start, start0 := "random", u0
			if r == 0 {
				start = "propagation"
			} else {
				if mo.Solver == SolverVarPro && mo.Lift > 0 {
					sp.lift, sp.liftIter = mo.Lift, mo.LiftIterations
				}
				start0 = incRandomStart(prob, incDim(3+sp.lift), mo.Seed, uint64(r))
			}
			out[i], errs[i] = prob.solve(ctx, start0, sp)
			if out[i] != nil {
				out[i].report.Start = start
			}
		}
		if nb == 1 {
			runOne(0)
		} else {
			ch := make(chan struct{}, nb)
			for i := 0; i < nb; i++ {
				go func(i int) { runOne(i); ch <- struct{}{} }(i)
			}
			for i := 0; i < nb; i++ {
				<-ch
			}
		}
		for i := 0; i < nb; i++ {
			if errs[i] != nil {
				return nil, errs[i]
			}
		}
		stop := false
		for i := 0; i < nb && !stop; i++ {
			done = append(done, out[i])
			opts.progress("incomplete: runs", len(done), mo.MaxRuns)
			if _, ok := verified(); ok {
				stop = true
			}
		}
		if stop {
			break
		}
	}
	bi := 0
	for i, r := range done {
		if r.cost < done[bi].cost {
			bi = i
		}
		rep.Runs = append(rep.Runs, r.report)
	}
	_, ok := verified()
	rep.Best, rep.Verified = bi, ok
	if ok {
		rep.RunsToAgree = len(done)
	} else if mo.MaxRuns > 1 {
		rep.Warnings = append(rep.Warnings, Warning{Code: WarnOptimumUnverified, Message: fmt.Sprintf(
			"%d runs never reached the same lowest cost twice: the result may be a local minimum; raise MaxRuns or check the tracks for outliers", len(done))})
	}
	b := done[bi]
	rep.Iterations, rep.CostHistory, rep.Termination = b.report.Iterations, b.report.CostHistory, b.report.Termination
	return b, nil
}

// incRobust minimises the Huber loss by iteratively reweighted least
// squares from the least-squares optimum: weights ω = min(1, k/‖e‖) (the
// IRLS weight ψ(r)/r of the Huber loss; Huber, Robust Statistics, 1981;
// Holland and Welsch, 1977), re-fitted until no weight moves by more than 1e-3, then
// observations beyond the rejection threshold get weight 0 and the
// reweighting resumes, within RobustRounds rounds. Unless given, the noise
// level σ̂ — and with it k = max(3σ̂, 0.5 px) and the threshold 2k — is
// re-estimated before every round from the current fit (1.4826·MAD of the
// residual coordinates of the observations not rejected, divided by
// √(1 − d/N) for the parameters the fit absorbs), so the scale follows the
// fit as it frees itself from the outliers (a simple form of Huber's
// simultaneous estimation of location and scale, 1981; cited from
// memory).
func incRobust(ctx context.Context, st *incState, m *Measurements, opts Options, mo MissingOptions, rep *MissingReport) error {
	prob := st.prob
	rr := &rep.Robust
	rr.Loss = LossHuber
	s := prob.norm.scale
	var sigma, k, rej float64
	scale := func() {
		n := prob.inlierCount()
		d := 8*prob.nf + 3*prob.np - 12
		sigma = opts.NoiseSigma
		if sigma == 0 {
			sigma = s * incMADSigma(prob, st.u, st.X) / math.Sqrt(math.Max(1e-3, 1-float64(d)/float64(2*n)))
		}
		k = mo.HuberScale
		if k == 0 {
			k = math.Max(3*sigma, 0.5)
		}
		rej = mo.RejectThreshold
		if rej == 0 {
			rej = 2 * k
		}
	}
	rejected := make([]bool, len(prob.wt))
	var res []float64
	for round := 0; round < mo.RobustRounds; round++ {
		if err := checkCtx(ctx); err != nil {
			return err
		}
		opts.progress("incomplete: robust", round, mo.RobustRounds)
		scale()
		kn, rejn := k/s, rej/s // normalised units
		res = prob.residualNorms(st.u, st.X, res)
		change := 0.0
		for i, r := range res {
			w := 1.0
			if rejected[i] {
				w = 0
			} else if r > kn {
				w = kn / r
			}
			change = math.Max(change, math.Abs(w-prob.wt[i]))
			prob.wt[i] = w
		}
		newRej := 0
		if change < 1e-3 && rej > 0 {
			// Weights settled: reject the observations beyond the threshold.
			newRej = prob.reject(res, rejn, rejected)
		}
		if change < 1e-3 && newRej == 0 && round > 0 {
			break
		}
		rr.Rounds++
		out, err := prob.solve(ctx, st.u, incSolveSpec{solver: mo.Solver, maxIter: mo.MaxIterations, tol: mo.Tolerance, threads: mo.Threads, iterative: mo.iterative(prob)})
		if err != nil {
			return err
		}
		rr.Iterations += out.report.Iterations
		st.u, st.X = out.u, out.X
	}
	opts.progress("incomplete: robust", mo.RobustRounds, mo.RobustRounds)
	rr.NoiseSigma, rr.HuberScale, rr.RejectThreshold = sigma, k, rej
	for i, w := range prob.wt {
		if w == 0 {
			f, p := prob.frames[prob.frame[i]], prob.points[prob.obsPt[i]]
			rr.Rejected = append(rr.Rejected, Observation{Frame: incFrameID(m, f), Track: incTrackID(m, p)})
		} else if w < 1 {
			rr.Downweighted++
		}
	}
	rr.RejectedCount = len(rr.Rejected)
	return nil
}

// incMADSigma is 1.4826 × the median absolute residual coordinate over the
// inlier observations, in normalised units (the MAD estimate of a Gaussian
// σ, common practice; 1.4826 = 1/Φ⁻¹(3/4)).
func incMADSigma(prob *incProblem, u, X []float64) float64 {
	var dev []float64
	for p := 0; p < prob.np; p++ {
		x := X[3*p : 3*p+3]
		for k := prob.pStart[p]; k < prob.pStart[p+1]; k++ {
			if prob.wt[k] == 0 {
				continue
			}
			U := u[8*prob.frame[k] : 8*prob.frame[k]+8]
			ex := prob.obsX[k] - (U[0]*x[0] + U[1]*x[1] + U[2]*x[2] + U[3])
			ey := prob.obsY[k] - (U[4]*x[0] + U[5]*x[1] + U[6]*x[2] + U[7])
			dev = append(dev, math.Abs(ex), math.Abs(ey))
		}
	}
	if len(dev) == 0 {
		return 0
	}
	return 1.4826 * nthSmallest(dev, len(dev)/2)
}

// nthSmallest returns the element that would be at index k of v sorted
// ascending, reordering v: Hoare's selection (FIND, CACM 4(7), 1961) with
// a median-of-three pivot, O(len(v)) expected instead of a sort's
// O(n log n). Deterministic: no random pivots.
func nthSmallest(v []float64, k int) float64 {
	lo, hi := 0, len(v)-1
	for hi > lo {
		mid := lo + (hi-lo)/2
		// Median of three into v[mid].
		if v[mid] < v[lo] {
			v[mid], v[lo] = v[lo], v[mid]
		}
		if v[hi] < v[lo] {
			v[hi], v[lo] = v[lo], v[hi]
		}
		if v[hi] < v[mid] {
			v[hi], v[mid] = v[mid], v[hi]
		}
		pivot := v[mid]
		i, j := lo, hi
		for i <= j {
			for v[i] < pivot {
				i++
			}
			for v[j] > pivot {
				j--
			}
			if i <= j {
				v[i], v[j] = v[j], v[i]
				i++
				j--
			}
		}
		switch {
		case k <= j:
			hi = j
		case k >= i:
			lo = i
		default:
			return v[k]
		}
	}
	return v[k]
}

// reject sets weight 0 for observations whose residual exceeds thr and
// returns how many were newly rejected. A frame keeps at least MinPoints
// inliers; a track left with fewer than two inlier views loses all of them.
func (pr *incProblem) reject(res []float64, thr float64, rejected []bool) int {
	inF := make([]int, pr.nf)
	for k, w := range pr.wt {
		if w > 0 {
			inF[pr.frame[k]]++
		}
	}
	// Worst first, so the frame guard keeps the best observations.
	var cand []int
	for k, r := range res {
		if !rejected[k] && r > thr {
			cand = append(cand, k)
		}
	}
	slices.SortFunc(cand, func(a, b int) int { return -incCmp(res[a], res[b]) })
	count := 0
	for _, k := range cand {
		if inF[pr.frame[k]] <= MinPoints {
			continue
		}
		rejected[k] = true
		pr.wt[k] = 0
		inF[pr.frame[k]]--
		count++
	}
	for p := 0; p < pr.np; p++ {
		in := 0
		for k := pr.pStart[p]; k < pr.pStart[p+1]; k++ {
			if pr.wt[k] > 0 {
				in++
			}
		}
		if in >= 2 || in == 0 {
			continue
		}
		for k := pr.pStart[p]; k < pr.pStart[p+1]; k++ {
			if pr.wt[k] > 0 && inF[pr.frame[k]] > MinPoints {
				rejected[k] = true
				pr.wt[k] = 0
				inF[pr.frame[k]]--
				count++
			}
		}
	}
	return count
}

func incCmp(a, b float64) int {
	switch {
	case a < b:
		return -1
	case a > b:
		return 1
	}
	return 0
}

// export converts the state to pixels.
func (st *incState) export(m *Measurements) *AffineFit {
	pr := st.prob
	nfAll, npAll := m.Dims()
	fit := &AffineFit{Frames: st.frames, Tracks: st.points,
		M: mat.NewDense(2*pr.nf, 3, nil), T: make([]float64, 2*pr.nf),
		X: mat.NewDense(3, pr.np, nil), Weights: make([]float64, nfAll*npAll)}
	s, c := pr.norm.scale, [2]float64{pr.norm.cx, pr.norm.cy}
	for f := 0; f < pr.nf; f++ {
		for a := 0; a < 2; a++ {
			U := st.u[8*f+4*a : 8*f+4*a+4]
			fit.M.Set(2*f+a, 0, s*U[0])
			fit.M.Set(2*f+a, 1, s*U[1])
			fit.M.Set(2*f+a, 2, s*U[2])
			fit.T[2*f+a] = s*U[3] + c[a]
		}
	}
	for p := 0; p < pr.np; p++ {
		for a := 0; a < 3; a++ {
			fit.X.Set(a, p, st.X[3*p+a])
		}
		for k := pr.pStart[p]; k < pr.pStart[p+1]; k++ {
			fit.Weights[st.frames[pr.frame[k]]*npAll+st.points[p]] = pr.wt[k]
		}
	}
	return fit
}

// incRanges writes sorted integers as "0–17, 20, 22–30".
func incRanges(ids []int) string {
	v := append([]int(nil), ids...)
	sort.Ints(v)
	var b strings.Builder
	for i := 0; i < len(v); {
		j := i
		for j+1 < len(v) && v[j+1] == v[j]+1 {
			j++
		}
		if b.Len() > 0 {
			b.WriteString(", ")
		}
		if j > i {
			fmt.Fprintf(&b, "%d–%d", v[i], v[j])
		} else {
			fmt.Fprintf(&b, "%d", v[i])
		}
		i = j + 1
	}
	return b.String()
}
