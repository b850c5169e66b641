package bundle

import (
	"fmt"
	"math"
	"runtime"

	"trackfactor/factor"
)

// Loss names a robust loss ρ(s) of the squared length s = |r|² of one
// observation's 2D residual r (px²). The cost is ½·Σ ρ(s).
type Loss string

// The losses, with c the scale (Options.LossScale, px):
const (
	// Squared: ρ(s) = s, plain least squares.
	Squared Loss = "squared"
	// Huber: ρ(s) = s for s ≤ c², 2c√s − c² beyond (Huber, Ann. Math.
	// Statist. 35(1), 1964): quadratic for residuals shorter than c,
	// linear beyond, so an outlier's influence is bounded.
	Huber Loss = "huber"
	// Cauchy: ρ(s) = c²·log(1 + s/c²): redescending, for data with many
	// gross outliers; not convex, so it needs a good start.
	Cauchy Loss = "cauchy"
)

// Solver names the linear solver of the Levenberg–Marquardt step.
type Solver string

const (
	// Schur eliminates the 3×3 point blocks and solves the reduced camera
	// system by dense Cholesky (Triggs et al. 2000, §6.1). The default.
	Schur Solver = "schur"
	// Dense solves the full normal equations by dense Cholesky: slow
	// (cube of the parameter count) and memory hungry; for comparison and
	// tests on small problems only (at most DenseMaxParameters).
	Dense Solver = "dense"
)

// DenseMaxParameters bounds the parameter count the Dense solver accepts
// (a 12000² float64 matrix is 1.15 GB).
const DenseMaxParameters = 12000

// Defaults of Options (a zero field means the default).
const (
	DefaultLossScale          = 1.0
	DefaultMaxIterations      = 100
	DefaultFunctionTolerance  = 1e-6
	DefaultParameterTolerance = 1e-8
	DefaultGradientTolerance  = 1e-10
	DefaultInitialDamping     = 1e-4
	DefaultMinViews           = 2
	DefaultMirrorRatio        = 1.1
)

// Options configure Adjust, AdjustSingleAxis and ResolveMirror. The zero
// value gives the documented defaults; WithDefaults returns them filled
// in.
type Options struct {
	// Model is the camera model to refine with. Zero ("") means the
	// reconstruction's own model, except that a paraperspective
	// reconstruction is refined with the perspective model (its
	// translation is already the centroid in camera coordinates).
	// Orthographic and ScaledOrthographic need no intrinsics; Perspective
	// needs them (Intrinsics or the reconstruction's).
	Model factor.Model

	// Intrinsics of the perspective model. Nil (default) means the
	// reconstruction's. Their distortion coefficients, when not zero, are
	// applied to the projection: the measurements must then be the pixels
	// as observed (distorted), not undistorted ones.
	Intrinsics *factor.Intrinsics

	// RefineFocal adds one focal length shared by all views to the
	// perspective model's parameters (the ratio Fy/Fx is kept). Default
	// false.
	RefineFocal bool
	// RefineK1 adds the first radial distortion coefficient k1 shared by
	// all views to the perspective model's parameters. Default false.
	RefineK1 bool

	// Loss is the robust loss; "" means Huber.
	Loss Loss
	// LossScale is the loss's scale c in px of 2D residual length; 0
	// means 1 px. With corners tracked to 0.1–0.3 px a 2D Gaussian
	// residual exceeds 1 px with probability exp(−1/(2σ²)) ≤ 0.4 % (the
	// Rayleigh tail), so inliers are fitted by plain least squares (full
	// statistical efficiency) while a mismatched track, several px off,
	// has its influence bounded — a scale of a few σ is the common
	// practice (Hartley and Zisserman, MVG 2nd ed., §A6.8).
	LossScale float64

	// MaxIterations bounds the Levenberg–Marquardt iterations (accepted
	// and rejected steps alike); 0 means 100.
	MaxIterations int
	// FunctionTolerance: stop when an accepted step lowers the cost by
	// less than FunctionTolerance × cost. 0 means 1e-6 (well below the
	// statistical resolution d/n of the cost at the optimum); negative
	// turns the test off.
	FunctionTolerance float64
	// ParameterTolerance: stop when a step satisfies |δ| ≤
	// ParameterTolerance·(|x| + ParameterTolerance), with x the points,
	// translations, scales, angles and intrinsics (rotation updates count
	// in δ, not in x). 0 means 1e-8; negative turns it off.
	ParameterTolerance float64
	// GradientTolerance: stop when the largest gradient component falls
	// below GradientTolerance × its value at the start. 0 means 1e-10;
	// negative turns it off.
	GradientTolerance float64
	// InitialDamping is the Levenberg–Marquardt λ of the first step,
	// relative to the diagonal of JᵀJ; 0 means 1e-4.
	InitialDamping float64

	// MinViews is the fewest observations a point needs to be refined;
	// points seen fewer times are kept as they are and counted in
	// Summary.SkippedPoints. 0 means 2 (the least that fixes a point).
	MinViews int

	// Solver is the linear solver; "" means Schur.
	Solver Solver
	// IterativeAbove is the number of cameras above which the Schur solver
	// solves the reduced camera system by preconditioned conjugate
	// gradients without forming it (cg.go: memory and time per iteration
	// linear in the observations) instead of dense Cholesky (memory
	// (6F)², time (6F)³/3 per iteration). 0 means DefaultIterativeAbove
	// (200); negative means always dense.
	IterativeAbove int
	// UncertaintyMaxCameras bounds the cameras for which the covariance is
	// computed: it needs the dense inverse of the reduced camera system
	// ((6F)² doubles, (6F)³ flops). Above it Result.Uncertainty is nil and
	// Summary.Message says why. 0 means DefaultUncertaintyMaxCameras
	// (500: 3000 × 3000, 72 MB per copy, seconds); negative means no
	// bound.
	UncertaintyMaxCameras int
	// Threads is the number of goroutines for the point loops; 0 means
	// GOMAXPROCS.
	Threads int

	// SkipUncertainty turns off the covariance computation at the end
	// (Result.Uncertainty is then nil). Default false: it costs about one
	// iteration.
	SkipUncertainty bool

	// MirrorRatio is the ratio of the worse to the better final cost
	// above which ResolveMirror calls the depth order resolved; 0 means
	// 1.1. Between two fits of the same n residuals, statistical noise
	// alone moves the cost ratio by ≈√(2/n) (≤ 1 % from a few thousand
	// observations on), so 10 % leaves room for model error (imperfect
	// intrinsics, residual distortion) before a decision is made.
	MirrorRatio float64

	// Progress, when not nil, receives ("bundle", iteration,
	// MaxIterations) after every iteration and ("uncertainty", 0/1, 1)
	// around the covariance. It is called from the caller's goroutine.
	Progress func(stage string, done, total int)
	// OnIteration, when not nil, receives every iteration record as it is
	// made.
	OnIteration func(Iteration)
}

// WithDefaults returns the options with every zero field replaced by its
// default (Model and Intrinsics stay as given: they depend on the
// reconstruction).
func (o Options) WithDefaults() Options {
	if o.Loss == "" {
		o.Loss = Huber
	}
	if o.LossScale == 0 {
		o.LossScale = DefaultLossScale
	}
	if o.MaxIterations == 0 {
		o.MaxIterations = DefaultMaxIterations
	}
	if o.FunctionTolerance == 0 {
		o.FunctionTolerance = DefaultFunctionTolerance
	}
	if o.ParameterTolerance == 0 {
		o.ParameterTolerance = DefaultParameterTolerance
	}
	if o.GradientTolerance == 0 {
		o.GradientTolerance = DefaultGradientTolerance
	}
	if o.InitialDamping == 0 {
		o.InitialDamping = DefaultInitialDamping
	}
	if o.MinViews == 0 {
		o.MinViews = DefaultMinViews
	}
	if o.Solver == "" {
		o.Solver = Schur
	}
	if o.Threads == 0 {
		o.Threads = runtime.GOMAXPROCS(0)
	}
	if o.IterativeAbove == 0 {
		o.IterativeAbove = DefaultIterativeAbove
	}
	if o.UncertaintyMaxCameras == 0 {
		o.UncertaintyMaxCameras = DefaultUncertaintyMaxCameras
	}
	if o.MirrorRatio == 0 {
		o.MirrorRatio = DefaultMirrorRatio
	}
	return o
}

// Validate reports the first option that breaks its rule.
func (o Options) Validate() error {
	bad := func(field string, v any, rule string) error {
		return fmt.Errorf("bundle: option %s = %v: %s", field, v, rule)
	}
	fin := func(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }
	switch o.Model {
	case "", factor.Orthographic, factor.ScaledOrthographic, factor.Paraperspective, factor.Perspective:
	default:
		return bad("Model", fmt.Sprintf("%q", o.Model), fmt.Sprintf("must be %q, %q, %q or %q (or empty for the reconstruction's)", factor.Orthographic, factor.ScaledOrthographic, factor.Perspective, factor.Paraperspective))
	}
	switch o.Loss {
	case "", Squared, Huber, Cauchy:
	default:
		return bad("Loss", fmt.Sprintf("%q", o.Loss), fmt.Sprintf("must be %q, %q or %q", Squared, Huber, Cauchy))
	}
	switch o.Solver {
	case "", Schur, Dense:
	default:
		return bad("Solver", fmt.Sprintf("%q", o.Solver), fmt.Sprintf("must be %q or %q", Schur, Dense))
	}
	switch {
	case !fin(o.LossScale) || o.LossScale < 0:
		return bad("LossScale", o.LossScale, "must be a finite number of px > 0 (0 means 1)")
	case o.MaxIterations < 0:
		return bad("MaxIterations", o.MaxIterations, "must be ≥ 0 (0 means 100)")
	case math.IsNaN(o.FunctionTolerance) || math.IsInf(o.FunctionTolerance, 0):
		return bad("FunctionTolerance", o.FunctionTolerance, "must be finite (0 means 1e-6, negative turns it off)")
	case math.IsNaN(o.ParameterTolerance) || math.IsInf(o.ParameterTolerance, 0):
		return bad("ParameterTolerance", o.ParameterTolerance, "must be finite (0 means 1e-8, negative turns it off)")
	case math.IsNaN(o.GradientTolerance) || math.IsInf(o.GradientTolerance, 0):
		return bad("GradientTolerance", o.GradientTolerance, "must be finite (0 means 1e-10, negative turns it off)")
	case !fin(o.InitialDamping) || o.InitialDamping < 0:
		return bad("InitialDamping", o.InitialDamping, "must be a finite number ≥ 0 (0 means 1e-4)")
	case o.MinViews < 0 || o.MinViews == 1:
		return bad("MinViews", o.MinViews, "must be ≥ 2 (0 means 2): one view cannot fix a point")
	case o.Threads < 0:
		return bad("Threads", o.Threads, "must be ≥ 0 (0 means GOMAXPROCS)")
	case !fin(o.MirrorRatio) || (o.MirrorRatio != 0 && o.MirrorRatio < 1):
		return bad("MirrorRatio", o.MirrorRatio, "must be ≥ 1 (0 means 1.1)")
	}
	if o.Intrinsics != nil {
		if err := o.Intrinsics.Validate(); err != nil {
			return fmt.Errorf("bundle: option Intrinsics: %v", err)
		}
	}
	return nil
}
