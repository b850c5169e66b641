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
// (T[2] is 0). For the perspective model X_cam = R·X + T and the pixel is
// K·X_cam divided by its third coordinate.
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
)

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
	Warnings          []Warning
}

// Reconstruction is the result of a factorization: cameras, points and the
// diagnostics that say how far to trust them.
type Reconstruction struct {
	Model       Model
	Cameras     []Camera
	Points      []Point
	Diagnostics Diagnostics
}

// Warn appends a warning.
func (d *Diagnostics) Warn(code, msg string) {
	d.Warnings = append(d.Warnings, Warning{Code: code, Message: msg})
}
