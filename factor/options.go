package factor

import (
	"context"
	"fmt"
	"math"
)

// Options configure Factorize. The zero value gives the documented defaults.
type Options struct {
	// Model is the camera model: Orthographic, ScaledOrthographic,
	// Paraperspective, Perspective or Auto. Default ("") Orthographic.
	Model Model

	// Intrinsics are the camera's pinhole intrinsics and lens distortion,
	// nil when unknown (default). When given, the measurements are
	// undistorted first (Diagnostics.Undistorted) and the paraperspective
	// and perspective models use the focal length and principal point.
	// Without them Paraperspective uses DefaultIntrinsics (with the
	// warning WarnDefaultIntrinsics) and Perspective fails.
	Intrinsics *Intrinsics

	// ImageWidth and ImageHeight, px, locate the default principal point
	// (the image centre) and scale the default focal length when
	// Intrinsics is nil. Zero (default): the bounding box of all
	// measurements stands in for the image.
	ImageWidth, ImageHeight int

	// PerspectiveMethod chooses the perspective initialisation:
	// ChristyHoraud (default, "") or SturmTriggs.
	PerspectiveMethod string

	// PerspectiveIterations bounds the iterations of the perspective
	// method (ε corrections or depth updates). Zero means 100 for
	// ChristyHoraud and 500 for SturmTriggs.
	PerspectiveIterations int

	// PerspectiveTolerance stops the perspective method when its change per
	// iteration (see Convergence.Changes) falls below it. Zero means 1e-9.
	PerspectiveTolerance float64

	// NoiseSigma is the expected noise of one image coordinate, px. Zero
	// (default) estimates it from the residual of the rank-3 affine fit.
	NoiseSigma float64

	// Iterations bounds the refinement of the model's least-squares
	// problem after the metric upgrade (block-coordinate descent for the
	// affine models, resection–intersection for the perspective one). Zero
	// means 50; a negative value turns the refinement off.
	Iterations int

	// Tolerance stops the refinement when the cost decreases by less than
	// Tolerance × cost in one iteration. Zero means 1e-10.
	Tolerance float64

	// MinRotationDeg is the smallest spread of viewing directions (the
	// largest angle between any camera's viewing direction and camera 0's)
	// that constrains depth. Below it Factorize fails with ErrLittleRotation.
	// Zero means 1.5°.
	MinRotationDeg float64

	// PlanarRatio: the scene is reported planar (warning WarnPlanar) when
	// σ₃ is below PlanarRatio times the largest singular value that noise
	// alone would produce, σ̂(√(2F) + √P) (the edge of the Marchenko–Pastur
	// law for a 2F×P Gaussian matrix). Zero means 3.
	PlanarRatio float64

	// HighResidualFactor: warning WarnHighResidual when the model's RMS
	// residual exceeds HighResidualFactor × the expected RMS and the
	// expected RMS + 0.05 px. Zero means 2.
	HighResidualFactor float64

	// Progress, when not nil, receives (stage, done, total) from long
	// stages. It must be cheap; it is called from the caller's goroutine.
	Progress func(stage string, done, total int)
}

func (o Options) withDefaults() Options {
	if o.Model == "" {
		o.Model = Orthographic
	}
	if o.Iterations == 0 {
		o.Iterations = 50
	}
	if o.Tolerance == 0 {
		o.Tolerance = 1e-10
	}
	if o.MinRotationDeg == 0 {
		o.MinRotationDeg = 1.5
	}
	if o.PlanarRatio == 0 {
		o.PlanarRatio = 3
	}
	if o.HighResidualFactor == 0 {
		o.HighResidualFactor = 2
	}
	if o.PerspectiveMethod == "" {
		o.PerspectiveMethod = ChristyHoraud
	}
	if o.PerspectiveIterations == 0 {
		o.PerspectiveIterations = 100
		if o.PerspectiveMethod == SturmTriggs {
			o.PerspectiveIterations = 500
		}
	}
	if o.PerspectiveTolerance == 0 {
		o.PerspectiveTolerance = 1e-9
	}
	return o
}

// Validate reports the first option that breaks its rule.
func (o Options) Validate() error {
	bad := func(field string, v any, rule string) error {
		return fmt.Errorf("factor: option %s = %v: %s", field, v, rule)
	}
	switch {
	case o.NoiseSigma < 0 || math.IsNaN(o.NoiseSigma) || math.IsInf(o.NoiseSigma, 0):
		return bad("NoiseSigma", o.NoiseSigma, "must be a finite number ≥ 0 (0 estimates it)")
	case o.Tolerance < 0 || math.IsNaN(o.Tolerance):
		return bad("Tolerance", o.Tolerance, "must be ≥ 0")
	case o.MinRotationDeg < 0 || o.MinRotationDeg >= 90 || math.IsNaN(o.MinRotationDeg):
		return bad("MinRotationDeg", o.MinRotationDeg, "must be in [0, 90)")
	case o.PlanarRatio < 0 || math.IsNaN(o.PlanarRatio):
		return bad("PlanarRatio", o.PlanarRatio, "must be ≥ 0")
	case o.HighResidualFactor < 0 || math.IsNaN(o.HighResidualFactor):
		return bad("HighResidualFactor", o.HighResidualFactor, "must be ≥ 0")
	case o.ImageWidth < 0 || o.ImageHeight < 0:
		return bad("ImageWidth×ImageHeight", fmt.Sprintf("%d×%d", o.ImageWidth, o.ImageHeight), "must be ≥ 0 (0 uses the measurements' bounding box)")
	case o.PerspectiveIterations < 0:
		return bad("PerspectiveIterations", o.PerspectiveIterations, "must be ≥ 0")
	case o.PerspectiveTolerance < 0 || math.IsNaN(o.PerspectiveTolerance):
		return bad("PerspectiveTolerance", o.PerspectiveTolerance, "must be ≥ 0")
	}
	switch o.Model {
	case "", Orthographic, ScaledOrthographic, Paraperspective, Perspective, Auto:
	default:
		return bad("Model", fmt.Sprintf("%q", o.Model), fmt.Sprintf("must be one of %q, %q, %q, %q, %q", Orthographic, ScaledOrthographic, Paraperspective, Perspective, Auto))
	}
	switch o.PerspectiveMethod {
	case "", ChristyHoraud, SturmTriggs:
	default:
		return bad("PerspectiveMethod", fmt.Sprintf("%q", o.PerspectiveMethod), fmt.Sprintf("must be %q or %q", ChristyHoraud, SturmTriggs))
	}
	if o.Intrinsics != nil {
		if err := o.Intrinsics.Validate(); err != nil {
			return fmt.Errorf("factor: option Intrinsics: %w", err)
		}
	}
	return nil
}

func (o Options) progress(stage string, done, total int) {
	if o.Progress != nil {
		o.Progress(stage, done, total)
	}
}

// checkCtx returns the context's error wrapped for this package.
func checkCtx(ctx context.Context) error {
	if err := ctx.Err(); err != nil {
		return fmt.Errorf("factor: stopped: %w", err)
	}
	return nil
}
