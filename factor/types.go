package factor

import "gonum.org/v1/gonum/mat"

// Model names a camera model. The strings are stable (they are written into
// reconstruction.json as "model").
type Model string

const (
	Orthographic       Model = "orthographic"
	ScaledOrthographic Model = "scaled-orthographic"
	Paraperspective    Model = "paraperspective"
	Perspective        Model = "perspective"
	// Auto fits every model the inputs allow and keeps the one with the
	// lowest geometric AIC (see the package documentation); it is an
	// Options value only: a Reconstruction always names the model it holds.
	Auto Model = "auto"
)

// Perspective methods (Options.PerspectiveMethod).
const (
	// ChristyHoraud: iterative correction of the image points from a
	// scaled-orthographic start (Christy and Horaud, PAMI 18(11), 1996).
	ChristyHoraud = "christy-horaud"
	// SturmTriggs: projective factorization with iterative projective-depth
	// update (Sturm and Triggs, ECCV 1996), then a metric upgrade with the
	// known intrinsics.
	SturmTriggs = "sturm-triggs"
)

// Measurements is the measurement matrix of tracked points: W is 2F×P with
// row 2f holding the x (column) coordinates and row 2f+1 the y (row)
// coordinates of every point in frame f, in pixels. Mask, when not nil,
// is F×P row-major and tells which entries are observed; a nil Mask means
// every entry is observed. Frames and Tracks map rows and columns back to
// the caller's frame indices and track ids (they are only carried along).
type Measurements struct {
	W      *mat.Dense
	Mask   []bool
	Frames []int // length F
	Tracks []int // length P
}

// Dims returns the number of frames F and points P.
func (m *Measurements) Dims() (f, p int) {
	r, c := m.W.Dims()
	return r / 2, c
}

// Observed reports whether point p is observed in frame f.
func (m *Measurements) Observed(f, p int) bool {
	if m.Mask == nil {
		return true
	}
	_, np := m.Dims()
	return m.Mask[f*np+p]
}

// Complete reports whether every entry is observed.
func (m *Measurements) Complete() bool {
	if m.Mask == nil {
		return true
	}
	for _, v := range m.Mask {
		if !v {
			return false
		}
	}
	return true
}

// Camera is one recovered view.
//
// R is world→camera: its rows are the image x axis, the image y axis and
// the viewing direction, in world coordinates (R[2] = R[0] × R[1]).
// For the affine models the projection of a world point X is
//
//	x = Scale · R[0]·X + T[0],  y = Scale · R[1]·X + T[1]
//
// (T[2] is 0) for the orthographic and scaled-orthographic models. For the
// paraperspective and perspective models T is the full 3D translation,
// X_cam = R·X + T, so T is the centroid of the points in camera coordinates
// (the world origin is the centroid); the perspective pixel is K·X_cam
// divided by its third coordinate, the paraperspective one its first-order
// expansion about the centroid (see the package documentation). Scale is
// the image size of one world unit at the centroid's depth, px per unit
// (fx/T[2] for those two models). Reconstruction.Project evaluates the
// projection of any model.
type Camera struct {
	Frame int
	R     [3][3]float64
	T     [3]float64
	Scale float64
	RMS   float64 // RMS reprojection residual over this view's observations, px
}

// Point is one recovered 3D point.
type Point struct {
	Track int        // track id
	X     [3]float64 // world coordinates
	Views int        // number of frames the point was observed in
	RMS   float64    // RMS reprojection residual over its observations, px
}

// Warning is a diagnostic with a stable machine-readable code and a plain
// message saying what it means and what to do.
type Warning struct {
	Code    string `json:"code"`
	Message string `json:"message"`
}

// Warning codes. They are stable: reports and users match on them.
const (
	WarnPlanar            = "planar-scene"
	WarnLittleRotation    = "little-rotation"
	WarnTooFew            = "too-few-measurements"
	WarnMetricFallback    = "metric-upgrade-fallback"
	WarnMetricFailed      = "metric-upgrade-failed"
	WarnHighResidual      = "high-residual"
	WarnMirror            = "mirror-ambiguity"
	WarnIncompleteDropped = "incomplete-tracks-dropped"
	// WarnDefaultIntrinsics: a model that needs the focal length and
	// principal point ran without Options.Intrinsics and used the
	// documented defaults.
	WarnDefaultIntrinsics = "default-intrinsics"
	// WarnNotConverged: an iterative stage (perspective correction,
	// projective depths, refinement) stopped at its iteration limit or
	// stalled before meeting its tolerance.
	WarnNotConverged = "not-converged"
	// WarnWeakPerspective: the perspective model fits no better than the
	// affine one within the noise; the camera is far from the part and
	// the perspective cues (and the mirror resolution) are weak.
	WarnWeakPerspective = "weak-perspective"
)

// Termination reasons of an iterative stage (Convergence.Termination).
const (
	StopConverged      = "converged"       // the change fell below the tolerance
	StopIterationLimit = "iteration-limit" // stopped by the iteration bound
	StopStalled        = "stalled"         // the cost stopped decreasing before the tolerance was met
	StopDiverged       = "diverged"        // the cost grew; the best iterate was kept
)

// Convergence reports one iterative stage of a factorization.
type Convergence struct {
	// Stage names it: "refine" (the model's least-squares refinement),
	// ChristyHoraud or SturmTriggs.
	Stage string
	// Iterations run, and Changes[i] the change in iteration i: the
	// relative cost decrease for "refine", the largest change of the
	// perspective correction ε = k·X/T_z for ChristyHoraud, the relative
	// change of the balanced projective depths for SturmTriggs.
	Iterations int
	Changes    []float64
	// Termination is one of StopConverged, StopIterationLimit, StopStalled,
	// StopDiverged;
	// Tolerance is the threshold the change was compared with.
	Termination string
	Tolerance   float64
	// InitialRMS and FinalRMS are the image residuals before and after the
	// stage, px.
	InitialRMS, FinalRMS float64
}

// Candidate is one model fitted by Options.Model = Auto.
type Candidate struct {
	Model Model
	// Err is the reason the model could not be fitted ("" when it was).
	Err string
	// RMS is its residual, px; Parameters the d of its score.
	RMS        float64
	Parameters int
	// Score is the geometric AIC J + 2·d·σ̂² (px²), lower is better;
	// +Inf when the model failed.
	Score float64
}

// Diagnostics describe how far to trust a Reconstruction.
type Diagnostics struct {
	// SingularValues of the centred measurement matrix, largest first
	// (at most the first 10 are kept).
	SingularValues []float64
	// RankGap is σ3/σ4: large (≫1) when the data are close to rank 3.
	RankGap float64
	// RMS is the root-mean-square residual per image coordinate over all
	// observed entries, px.
	RMS float64
	// NoiseSigma is the per-coordinate noise level the residual implies,
	// σ̂ = RMS/√(1 − d/n) (Hartley & Zisserman, MVG 2nd ed., the ML
	// residual result).
	NoiseSigma float64
	// ExpectedRMS is the residual an exact model would leave given the
	// assumed noise level (Options.NoiseSigma) or, when that is zero, the
	// noise level estimated from the trailing singular values.
	ExpectedRMS float64
	// Measurements n and parameters d used in the ML residual formula.
	Measurements, Parameters int
	// MirrorAmbiguous is true for every affine model: the structure and its
	// mirror image fit the data equally well.
	MirrorAmbiguous bool
	// MetricFallback is true when L = QQᵀ was not positive definite and
	// the nearest positive-definite matrix was used.
	MetricFallback bool
	// MetricCondition is the condition number of the linear system of
	// metric constraints (large: the upgrade is poorly determined).
	MetricCondition float64
	// AffineRMS is the RMS residual of the rank-3 affine fit (the SVD
	// truncation), px; the model's RMS is never below it for complete data.
	AffineRMS float64
	// InitialRMS is the model's RMS right after the metric upgrade, before
	// refinement; Iterations counts the refinement iterations.
	InitialRMS float64
	Iterations int
	// RotationSpreadDeg is the largest angle between camera 0's viewing
	// direction and any other camera's, degrees.
	RotationSpreadDeg float64
	// Convergence lists the iterative stages in the order they ran.
	Convergence []Convergence
	// Candidates lists every model tried by Options.Model = Auto with its
	// residual and score, in the order tried (nil for a single model).
	Candidates []Candidate
	// Undistorted is true when the measurements were undistorted with
	// Options.Intrinsics before factorization (residuals are then in
	// undistorted pixels).
	Undistorted bool
	Warnings    []Warning
}

// Reconstruction is the result of a factorization: cameras, points and the
// diagnostics that say how far to trust them.
type Reconstruction struct {
	Model   Model
	Cameras []Camera
	Points  []Point
	// Intrinsics are the pinhole intrinsics the model assumed (given or
	// the documented defaults) for the paraperspective and perspective
	// models; nil for the orthographic and scaled-orthographic ones.
	// Their distortion coefficients are not used by Project: projections
	// and residuals are in undistorted pixels.
	Intrinsics  *Intrinsics
	Diagnostics Diagnostics
}

// Warn appends a warning.
func (d *Diagnostics) Warn(code, msg string) {
	d.Warnings = append(d.Warnings, Warning{Code: code, Message: msg})
}

// Project returns the pixel (undistorted) where camera i of the
// reconstruction images the world point X, by the reconstruction's model:
//
//	orthographic, scaled orthographic:  u = Scale·R[0]·X + T[0], v likewise;
//	paraperspective:  with x_f = T[0]/T[2], y_f = T[1]/T[2] (the centroid's
//	  normalised image), u = Cx + Fx·(x_f + (R[0] − x_f R[2])·X / T[2]),
//	  v = Cy + Fy·(y_f + (R[1] − y_f R[2])·X / T[2]);
//	perspective:  X_c = R X + T,  u = Cx + Fx·X_c[0]/X_c[2], v likewise.
func (r *Reconstruction) Project(i int, X [3]float64) (u, v float64) {
	return r.project(&r.Cameras[i], X)
}

func (r *Reconstruction) project(c *Camera, X [3]float64) (u, v float64) {
	switch r.Model {
	case Paraperspective, Perspective:
		in := r.Intrinsics
		if in == nil {
			panic("factor: a " + string(r.Model) + " reconstruction without intrinsics")
		}
		if r.Model == Perspective {
			z := dot3(c.R[2], X) + c.T[2]
			return in.Cx + in.Fx*(dot3(c.R[0], X)+c.T[0])/z, in.Cy + in.Fy*(dot3(c.R[1], X)+c.T[1])/z
		}
		xf, yf := c.T[0]/c.T[2], c.T[1]/c.T[2]
		kx := dot3(c.R[2], X)
		return in.Cx + in.Fx*(xf+(dot3(c.R[0], X)-xf*kx)/c.T[2]), in.Cy + in.Fy*(yf+(dot3(c.R[1], X)-yf*kx)/c.T[2])
	default:
		return c.Scale*dot3(c.R[0], X) + c.T[0], c.Scale*dot3(c.R[1], X) + c.T[1]
	}
}
