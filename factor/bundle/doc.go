// Package bundle refines a factor.Reconstruction against its measurements
// by bundle adjustment: Levenberg–Marquardt over all cameras and points,
// with the sparse Schur complement on the point blocks (Triggs,
// McLauchlan, Hartley and Fitzgibbon, "Bundle Adjustment — A Modern
// Synthesis", Vision Algorithms 1999, LNCS 1883, 2000). It also resolves
// the mirror ambiguity of affine reconstructions (ResolveMirror), refines
// with single-axis (turntable) motion (AdjustSingleAxis), brings a
// reconstruction to real units (ScaleByPixelSize, ScaleByReference) and
// returns the covariance of the result (Uncertainty). It works on numbers
// only: a Measurements matrix with its mask and a Reconstruction.
//
// # The cost
//
// For every observed entry (frame f, point p) with measured pixel w_fp
// and model pixel π_f(X_p), the residual is r = π_f(X_p) − w_fp and the
// cost is
//
//	C = ½ Σ ρ(|r|²),
//
// summed over the observed entries only (the mask: missing entries are
// simply absent). ρ is the robust loss (Loss; Huber with a 1 px scale by
// default, see Options.LossScale for why). RMS values are per image
// coordinate, √(Σ|r|²/n) with n = 2 × observations, like the factor
// package's.
//
// # Camera models
//
// Orthographic and scaled orthographic (factor's affine models):
//
//	π = s·(R₀·X, R₁·X) + (t₀, t₁),
//
// with R the world→camera rotation, s fixed (orthographic) or free per
// view (scaled orthographic). Perspective with known intrinsics:
//
//	X_c = R·X + T,  (x, y) = (X_c₀, X_c₁)/X_c₂,  π = (fx·x_d + cx, fy·y_d + cy),
//
// with (x_d, y_d) the Brown–Conrady distortion of factor.Intrinsics
// (OpenCV's convention), optionally refining one focal length shared by
// all views (Fy/Fx kept) and k1. A paraperspective input is refined with
// the perspective model (its T is already the centroid in camera
// coordinates); an affine input can be refined with the perspective model
// given intrinsics (T_z = Fx/s). Rotations are updated on the right by a
// local axis-angle vector in world axes, R ← R·exp([δ]×) (rotation.Exp),
// so the parametrisation has no singularity. Single-axis motion
// (AdjustSingleAxis) has R_f = R_c·Rz(θ_f), T_f = T_c in a world whose z
// axis is the turntable's: one angle per view plus the shared camera.
//
// # The gauge
//
// The cost does not change under a similarity of the world (a rigid
// motion for the orthographic model, whose scale is fixed), so that
// many parameters are held explicitly — the covariance is relative to this
// choice (Summary.Gauge says it in words):
//
//   - free motion: the gauge camera (the first with at least three
//     refined points) keeps its rotation, translation and, for the scaled
//     orthographic model, its scale; the reference point (the one seen
//     most often) is held along one direction: the gauge camera's viewing
//     direction for the affine models (a shift of the world in depth), its
//     line of sight from the gauge camera's centre for the perspective
//     model (a scaling of the world about that centre; the distance is
//     restored exactly after every step).
//   - single-axis motion: R_c's rotation about the axis and the gauge
//     camera's angle are held, the reference point is held along the axis
//     and, for the perspective model, T_c's third component (the scale).
//
// Cameras seen by too few refined points (three for free motion, two for
// single-axis) and points seen in fewer than Options.MinViews frames are
// kept as they are.
//
// # The iterations
//
// Levenberg–Marquardt with Marquardt's diagonal scaling: each step solves
// (JᵀWJ + λ·D) δ = −JᵀW r with D = diag(JᵀWJ) clamped to [1e-6, 1e32] and
// W the robust weights ρ'(|r|²) (iteratively reweighted least squares).
// The points are eliminated (the Schur complement, see linear.go), the
// reduced camera system is solved by dense Cholesky — or, above
// Options.IterativeAbove cameras (default 200), by conjugate gradients
// with a block-Jacobi preconditioner and products from the point blocks,
// never forming it (Agarwal et al., "Bundle Adjustment in the Large",
// ECCV 2010; see cg.go), so memory and time per iteration stay linear in
// the observations — and the points are back-substituted in parallel. A step is accepted when the cost falls by
// at least 1e-3 of the decrease the quadratic model predicts; λ follows
// Nielsen's rule (Madsen, Nielsen and Tingleff, "Methods for Non-Linear
// Least Squares Problems", 2004, §3.2). The iterations stop on the first
// of (Termination):
//
//	function tolerance:  an accepted step lowered the cost by ≤ FunctionTolerance·C;
//	parameter tolerance: |δ| ≤ ParameterTolerance·(|x| + ParameterTolerance);
//	gradient tolerance:  |JᵀW r|∞ ≤ GradientTolerance·|JᵀW r|∞ at the start;
//	iteration limit:     MaxIterations iterations, accepted or rejected;
//	no progress:         λ exceeded 1e32 without an acceptable step.
//
// Summary records every iteration (cost, change, gradient, step, λ, the
// ratio of actual to predicted decrease), the time by phase and the
// termination; Brief is one line, Report the full table.
//
// # Uncertainty
//
// At the optimum, Σ = σ̂²·(JᵀWJ)⁻¹ in the gauge, σ̂² = Σρ/(n − d), computed
// through the Schur complement: the camera block is the inverse of the
// reduced system and every point's 3×3 block needs only the camera blocks
// of its own views (see Uncertainty). Per point the scalar summary is
// σ = √(trace Σ_p/3); per camera the rotation covariance in world axes and,
// for single-axis motion, the standard deviation of its angle.
//
// # Concurrency and errors
//
// The point loops (normal equations, back-substitution, cost, covariance)
// run on Options.Threads goroutines; results do not depend on it beyond
// rounding. Long work takes a context (checked every iteration) and
// reports through Options.Progress and Options.OnIteration; nothing is
// printed. A wrong shape (W and the mask disagree) panics with a "bundle:"
// prefix; bad input (no intrinsics for a perspective refinement, points
// behind a camera at the start, a rotation that is not one) is a returned
// error saying what to do.
package bundle
