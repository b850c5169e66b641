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
// and cameras by orthogonal Procrustes given the structure (A_f = polar
// factor of W̃_f Sᵀ); every step lowers the cost.
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
// in depth, with the cameras reflected likewise, fits exactly as well.
// Diagnostics.MirrorAmbiguous is therefore true for these models; a
// perspective model or refinement can resolve it.
//
// # Errors and warnings
//
// A wrong shape of the input (W and Mask disagree) is a programmer error and
// panics with a "factor:" prefix. Data that cannot be reconstructed (too few
// frames or points, no rotation) is a returned error. Data that can be
// reconstructed but should not be trusted blindly (a near-planar scene, a
// metric-upgrade fallback, a residual far above the noise) gives a
// Reconstruction with Warnings, each with a stable code.
package factor
