// Package factor recovers cameras and 3D points from a measurement matrix of
// tracked image points by factorization. It never sees an image: its input
// is a Measurements value (numbers and a visibility mask), its output a
// Reconstruction that carries its own Diagnostics.
//
// # The measurement matrix
//
// For F frames and P points, W is 2F×P: row 2f holds the x coordinates and
// row 2f+1 the y coordinates of every point in frame f, in pixels
// (origin at the top-left pixel centre, x right, y down).
//
// # Orthographic factorization (Tomasi and Kanade, IJCV 9(2), 1992)
//
// Under orthographic projection the image of world point X_p in frame f is
//
//	w_fp = A_f X_p + t_f,   A_f = [i_fᵀ; j_fᵀ] (2×3, orthonormal rows)
//
// Subtracting the row means t_f (the image of the points' centroid) gives the
// centred matrix W̃ = M S with M (2F×3) the stacked A_f and S (3×P) the
// centred structure, so rank W̃ ≤ 3. With the thin SVD W̃ = U Σ Vᵀ the best
// rank-3 approximation (Eckart–Young) is
//
//	M̂ = U₃ Σ₃^½,   Ŝ = Σ₃^½ V₃ᵀ,
//
// correct up to an invertible 3×3 Q: M = M̂Q, S = Q⁻¹Ŝ. The metric upgrade
// finds the symmetric L = QQᵀ from the orthonormality of every camera's
// axes, linear in the six entries of L (Tomasi–Kanade 1992, eq. 16):
//
//	î_fᵀ L î_f = 1,   ĵ_fᵀ L ĵ_f = 1,   î_fᵀ L ĵ_f = 0,
//
// solved in the least-squares sense over all frames. Q is taken from the
// eigen-decomposition L = V D Vᵀ as Q = V D^½. When L is not positive
// definite (noise, too little rotation, wrong model) its negative eigenvalues
// are raised to a small positive floor — the nearest positive-definite
// matrix in the Frobenius norm, up to that floor (Higham, Linear Algebra
// Appl. 103, 1988) — and the diagnostics say so.
//
// Each camera's rows are then made exactly orthonormal (the polar factor of
// the 2×3 block), the third row is k_f = i_f × j_f, and the world frame is
// rotated so camera 0 is the identity. Finally the orthographic least-squares
// problem min Σ‖w̃_fp − A_f X_p‖² is refined by block-coordinate descent:
// structure in closed form given the cameras, X = (Σ A_fᵀA_f)⁻¹ Σ A_fᵀ w̃_f,
// and cameras by Gauss–Newton steps on each rotation given the structure
// (the polar factor of W̃_f Sᵀ would be optimal only when SSᵀ ∝ I; see
// rotationGNStep and rotationStepB); every step lowers the cost.
//
// # Large matrices
//
// When min(2F, P) > 300 the rank-3 part of W̃ comes from a truncated
// randomized SVD (Halko, Martinsson and Tropp, SIAM Review 53(2), 2011,
// Alg. 4.4 with re-orthonormalisation and Alg. 5.1), seeded and
// deterministic, iterated until Wedin's bound on the subspace angle is
// below 1e-11. It needs O((2F + P)·13) extra memory (no 2F×2F or P×P
// matrix); its products run on all cores. Diagnostics.SingularValues then
// holds the leading Ritz values; the residual Σ_{k>3} σ_k² is computed
// directly from W̃.
//
// # Scaled orthographic (weak perspective)
//
// w_fp = s_f A_f X_p + t_f with a per-frame scale s_f. The metric
// constraints on the rows of M̂ are homogeneous, |m_f|² = |n_f|² and
// m_f·n_f = 0 (Poelman and Kanade, PAMI 19(3), 1997, §3 with x_f = y_f = 0),
// plus one scale fix; refinement alternates structure and per-frame
// (rotation, scale). Gauge: camera 0 = identity, centroid at the origin,
// and the scales averaged to 1, so one world unit is one pixel at the
// mean depth; Camera.Scale is s_f.
//
// # Paraperspective (Poelman and Kanade 1997)
//
// The first-order expansion of the pinhole about the centroid: in
// normalised coordinates m_f = (i_f − x_f k_f)/z_f, n_f = (j_f − y_f k_f)/z_f,
// where (x_f, y_f) — the position term — is the normalised image of the
// centroid (the row means of W). The constraints
// |m|²/(1+x²) = |n|²/(1+y²), m·n = (xy/2)(|m|²/(1+x²) + |n|²/(1+y²)) give
// L; each camera follows by orthogonal Procrustes (see upgradeScaled).
// It needs the principal point and focal length: Options.Intrinsics, or
// the defaults (image centre from Options.ImageWidth/ImageHeight or the
// measurements' bounding box, f = DefaultFocalFactor × the larger side)
// with the warning WarnDefaultIntrinsics. Camera.T = (x_f z_f, y_f z_f, z_f)
// and Camera.Scale = Fx/z_f, with the same scale gauge as above.
//
// # Perspective with known intrinsics
//
// X_cam = R X + T, pixel = (Cx + Fx X_c/Z_c, Cy + Fy Y_c/Z_c); Camera.T is
// the full translation and the world origin the points' centroid. Points
// are in scene units up to one global scale, fixed so that the cameras'
// Fx/T_z average 1 (one unit ≈ one pixel at the mean distance); a
// reference length gives metric units downstream. Two initialisations
// (Options.PerspectiveMethod):
//
//   - ChristyHoraud (default; PAMI 18(11), 1996): with ε_fp = k_f·X_p/T_z,f
//     the corrected points x̄(1 + ε) are exactly scaled-orthographic; the
//     scaled-orthographic factorization and ε are re-estimated in turn until
//     max|Δε| ≤ PerspectiveTolerance, on both mirror branches; the better
//     branch is kept and the mirror is resolved when it is better by more
//     than 25σ̂² (a heuristic).
//   - SturmTriggs (ECCV 1996): W_λ = [λ_fp q_fp] of normalised points has
//     rank 4; depths start at 1, are balanced (every frame's and every
//     point's depths rescaled to fixed norms, which blocks the trivial
//     solutions), re-estimated from the rank-4 fit and iterated until the
//     relative depth change ≤ PerspectiveTolerance; the metric upgrade
//     solves the absolute dual quadric P_f Ω P_fᵀ ∝ I (Triggs, CVPR 1997;
//     Hartley and Zisserman, MVG §19.3) and cheirality fixes the sign.
//
// Both end with the maximum-likelihood refinement of the reprojection
// error: joint Levenberg–Marquardt with the points eliminated by the Schur
// complement (Triggs et al., "Bundle adjustment — a modern synthesis",
// 2000) when P·F² ≤ 5·10⁷, resection–intersection otherwise. Every
// iterative stage is reported in Diagnostics.Convergence (iterations,
// change per iteration, termination, RMS before and after). When the
// perspective fit beats the scaled-orthographic one by less than 25σ̂² per
// frame, WarnWeakPerspective says the cues are weak and the mirror stays
// ambiguous.
//
// # Intrinsics and distortion
//
// Intrinsics holds fx, fy, cx, cy (px) and OpenCV's k1, k2, p1, p2, k3.
// ParseIntrinsics reads the package's own JSON/YAML
// {"fx": …, "fy": …, "cx": …, "cy": …, "distortion": [k1, k2, p1, p2, k3]}
// or the calibration YAML written by the OpenCV library's FileStorage
// (camera_matrix, distortion_coefficients). With Options.Intrinsics the
// observations are undistorted (Intrinsics.Undistort, Newton-refined
// inversion) before factorization and every residual is in undistorted
// pixels.
//
// # Choosing a model (Options.Model = Auto)
//
// Every model the inputs allow is fitted (perspective only with
// intrinsics) and the one with the lowest geometric AIC of Kanatani
// (IJCV 26(3), 1998) is kept:
//
//	G-AIC = J + 2 d σ̂²,
//
// J the residual sum of squares (px²), d the model's parameter count
// (orthographic 5F + 3P − 6, the scaled, paraperspective and perspective
// models 6F + 3P − 7) and σ̂² Options.NoiseSigma² or the smallest
// J_c/(n − d_c) among the candidates. Diagnostics.Candidates lists each
// candidate's RMS, parameters and score.
//
// # Residuals and the noise level
//
// RMS residuals are per image coordinate over all observed entries. For a
// maximum-likelihood fit with d free parameters to n measurements carrying
// i.i.d. Gaussian noise σ, the expected RMS residual is σ·√(1 − d/n)
// (Hartley and Zisserman, Multiple View Geometry, 2nd ed., the ML residual
// result, §5.1.3). For the rank-3 affine fit d = 8F + 3P − 12; for the
// orthographic model d = 5F + 3P − 6 (3 rotation and 2 translation
// parameters per frame, 3 per point, less the 3 + 3 of the world's rotation
// and origin). The noise level σ̂ is estimated from the residual of the
// affine fit as √(Σ_{k>3} σ_k² / (n − d_affine)) unless Options.NoiseSigma
// gives it.
//
// # Ambiguities
//
// Every affine model leaves the mirror ambiguity: the structure reflected
// in depth, with the cameras reflected likewise, fits exactly as well (for
// paraperspective the reflection is across each camera's line of sight to
// the centroid). Diagnostics.MirrorAmbiguous is therefore true for these
// models; the perspective model resolves it unless the perspective is weak.
//
// # Errors and warnings
//
// A wrong shape of the input (W and Mask disagree) is a programmer error and
// panics with a "factor:" prefix. Data that cannot be reconstructed is a
// returned error: too few frames or points for the model (ErrTooFew: 3
// frames; 4 points, 6 for perspective), views that are 2D similarities of
// each other or span less than MinRotationDeg (ErrLittleRotation), a metric
// upgrade with no usable solution (ErrMetricUpgrade). Data that can be
// reconstructed but should not be trusted blindly gives a Reconstruction
// with Warnings, each with a stable code: WarnPlanar (σ₃ within PlanarRatio
// of the noise edge σ̂(√2F + √P); for perspective, of the corrected matrix
// x̄(1+ε); the rotation-spread error is then waived, as the upgrade itself is
// unreliable), WarnMetricFallback, WarnHighResidual, WarnMirror,
// WarnWeakPerspective, WarnDefaultIntrinsics and WarnNotConverged.
package factor
