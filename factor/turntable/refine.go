package turntable

import (
	"context"
	"fmt"
	"math"

	"trackfactor/factor"
	"trackfactor/factor/bundle"
	"trackfactor/factor/rotation"
)

// Refine fits the turntable geometry to rec's rotations (FitReconstruction
// with fitOpts), then refines the reconstruction with single-axis motion
// from it (bundle.AdjustSingleAxis with bundleOpts: one angle per frame,
// a shared axis and camera) and returns the geometry of the constrained
// result (FromSingleAxis) with the bundle result. The refined
// reconstruction is expressed in the turntable world: z up the axis, the
// origin on it.
func Refine(ctx context.Context, m *factor.Measurements, rec *factor.Reconstruction, fitOpts Options, bundleOpts bundle.Options) (*Fit, *bundle.Result, error) {
	start, err := FitReconstruction(rec, fitOpts)
	if err != nil {
		return nil, nil, err
	}
	res, err := bundle.AdjustSingleAxis(ctx, m, rec, start.Axis(), bundleOpts)
	if res == nil {
		return nil, nil, err
	}
	fit, ferr := FromSingleAxis(res, fitOpts.NominalStepDeg)
	if ferr != nil {
		return nil, res, ferr
	}
	return fit, res, err
}

// FromSingleAxis returns the turntable geometry of a single-axis bundle
// adjustment: the axis is the result's world z, the angles are the
// refined θ_f relative to the first camera (with their standard
// deviations when the uncertainty was computed), the camera axis is R_c's
// third column R_c·e_z. nominalStepDeg as in Options.
func FromSingleAxis(res *bundle.Result, nominalStepDeg float64) (*Fit, error) {
	sa := res.SingleAxis
	if sa == nil || len(sa.AnglesRad) == 0 {
		return nil, fmt.Errorf("turntable: the bundle result has no single-axis parameters; refine with bundle.AdjustSingleAxis")
	}
	if err := (Options{NominalStepDeg: nominalStepDeg}).Validate(); err != nil {
		return nil, err
	}
	cams := res.Reconstruction.Cameras
	nf := len(cams)
	if nf < 2 {
		return nil, fmt.Errorf("turntable: %d cameras; need at least 2", nf)
	}
	fit := &Fit{Constrained: true, AxisWorld: [3]float64{0, 0, 1}}
	fit.AxisCamera = rotation.Apply(sa.CameraRotation, [3]float64{0, 0, 1})
	fit.ElevationDeg = elevation(fit.AxisCamera)
	frames := make([]int, nf)
	angles := make([]float64, nf)
	var sig []float64
	if res.Uncertainty != nil {
		sig = make([]float64, nf)
	}
	for f := range cams {
		frames[f] = cams[f].Frame
		angles[f] = (sa.AnglesRad[f] - sa.AnglesRad[0]) * 180 / math.Pi
		if sig != nil {
			sig[f] = sa.AngleSigmaRad[f] * 180 / math.Pi
		}
	}
	fit.fill(frames, angles, sig, nominalStepDeg)
	return fit, nil
}
