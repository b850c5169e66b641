package synth

import (
	"fmt"
	"math"
)

// Projection names a camera model of the synthetic scene.
type Projection string

// The camera models.
const (
	Orthographic Projection = "orthographic" // parallel projection, PixelsPerMM
	Pinhole      Projection = "pinhole"      // central projection, FocalPx and DistanceMM
)

// Defaults of Options (a zero field means the default).
const (
	DefaultSeed          = 1
	DefaultWidth         = 640
	DefaultHeight        = 480
	DefaultFrames        = 36
	DefaultStepDeg       = 1.0
	DefaultElevationDeg  = 20.0
	DefaultFocalPx       = 800.0
	DefaultSupersample   = 3
	DefaultTextureCellMM = 1.6
	// DefaultFill is the fraction of the image height the part spans
	// (over a full turn) when PixelsPerMM or DistanceMM is left to the fit.
	DefaultFill = 0.65
)

// Limits checked by New.
const (
	MaxImageSide    = 16384
	MaxFrames       = 100000
	MaxSupersample  = 8
	MaxElevationDeg = 89.0
	MaxBlurSigma    = 20.0
)

// Options describe a synthetic sequence. The zero value is the default
// scene: 36 frames of 640×480, 1° apart, orthographic, 20° elevation.
type Options struct {
	// Seed selects the texture and the image noise; 0 means 1.
	Seed int64
	// Width and Height of the frames in pixels; 0 means 640×480.
	Width, Height int
	// Frames is the number of frames; 0 means 36. Ignored when AnglesDeg
	// is given.
	Frames int
	// StepDeg is the turntable step between consecutive frames in degrees
	// (negative turns the other way); 0 means 1.
	StepDeg float64
	// AnglesDeg, when not empty, gives the turntable angle of every frame
	// explicitly (uneven steps allowed); it overrides Frames, StepDeg and
	// StartDeg. The resolved Options have Frames = len(AnglesDeg).
	AnglesDeg []float64
	// StartDeg is the turntable angle of frame 0 in degrees (0 is a valid
	// value: the part's frame coincides with the lab frame).
	StartDeg float64
	// ElevationDeg is the camera's elevation above the turntable plane in
	// degrees, in [-89, 89]; 0 means 20 unless ElevationSet is true.
	ElevationDeg float64
	// ElevationSet makes ElevationDeg be used as given, 0 included (a
	// camera level with the turntable).
	ElevationSet bool
	// Projection is the camera model; "" means Orthographic.
	Projection Projection
	// PixelsPerMM is the orthographic scale; 0 means the fit (the part
	// spans DefaultFill of the image height).
	PixelsPerMM float64
	// FocalPx is the pinhole focal length in pixels (fx = fy); 0 means 800.
	FocalPx float64
	// DistanceMM is, for the pinhole camera, the distance from the camera
	// centre to Target() on the turntable axis; 0 means the fit (the part
	// spans DefaultFill of the image height). It must keep the camera
	// outside the part's bounding sphere.
	DistanceMM float64
	// NoiseSigma is the standard deviation of additive Gaussian noise in
	// grey levels (0..255 scale), per pixel and channel; 0 means none.
	NoiseSigma float64
	// Supersample is the number of samples per pixel along each axis
	// (Supersample² samples per pixel), 1..8; 0 means 3.
	Supersample int
	// Backdrop puts a static textured plane behind the part.
	Backdrop bool
	// Highlight adds a Phong specular highlight fixed to the light.
	Highlight bool
	// BlurSigma is the standard deviation in pixels of a Gaussian blur
	// applied before the noise; 0 means none.
	BlurSigma float64
	// TextureCellMM is the Voronoi cell size of the part's texture in mm;
	// 0 means 1.6 (about 7.5 px at the default view).
	TextureCellMM float64
}

// OptionError reports an option that New cannot use: the field, the value
// given and the rule it broke.
type OptionError struct {
	Field string
	Value any
	Rule  string
}

func (e *OptionError) Error() string {
	return fmt.Sprintf("synth: option %s = %v: %s", e.Field, e.Value, e.Rule)
}

func optErr(field string, value any, rule string) error {
	return &OptionError{Field: field, Value: value, Rule: rule}
}

func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

// resolve validates o and fills in the defaults that do not depend on the
// geometry (the fitted scale and distance are filled in by New).
func (o Options) resolve() (Options, error) {
	r := o
	r.AnglesDeg = append([]float64(nil), o.AnglesDeg...)
	if r.Seed == 0 {
		r.Seed = DefaultSeed
	}
	if r.Width < 0 || r.Width > MaxImageSide {
		return r, optErr("Width", o.Width, fmt.Sprintf("must be in [1, %d]; 0 means %d", MaxImageSide, DefaultWidth))
	}
	if r.Height < 0 || r.Height > MaxImageSide {
		return r, optErr("Height", o.Height, fmt.Sprintf("must be in [1, %d]; 0 means %d", MaxImageSide, DefaultHeight))
	}
	if r.Width == 0 {
		r.Width = DefaultWidth
	}
	if r.Height == 0 {
		r.Height = DefaultHeight
	}
	for i, a := range r.AnglesDeg {
		if !finite(a) {
			return r, optErr(fmt.Sprintf("AnglesDeg[%d]", i), a, "must be a finite angle in degrees")
		}
	}
	if len(r.AnglesDeg) > MaxFrames {
		return r, optErr("AnglesDeg", fmt.Sprintf("%d angles", len(r.AnglesDeg)), fmt.Sprintf("at most %d frames", MaxFrames))
	}
	if len(r.AnglesDeg) > 0 {
		r.Frames = len(r.AnglesDeg)
	} else {
		if r.Frames < 0 || r.Frames > MaxFrames {
			return r, optErr("Frames", o.Frames, fmt.Sprintf("must be in [1, %d]; 0 means %d", MaxFrames, DefaultFrames))
		}
		if r.Frames == 0 {
			r.Frames = DefaultFrames
		}
		if !finite(r.StepDeg) {
			return r, optErr("StepDeg", o.StepDeg, "must be a finite angle in degrees; 0 means 1")
		}
		if r.StepDeg == 0 {
			r.StepDeg = DefaultStepDeg
		}
		if !finite(r.StartDeg) {
			return r, optErr("StartDeg", o.StartDeg, "must be a finite angle in degrees")
		}
	}
	if !finite(r.ElevationDeg) || math.Abs(r.ElevationDeg) > MaxElevationDeg {
		return r, optErr("ElevationDeg", o.ElevationDeg, fmt.Sprintf("must be in [-%g, %g] degrees", MaxElevationDeg, MaxElevationDeg))
	}
	if r.ElevationDeg == 0 && !r.ElevationSet {
		r.ElevationDeg = DefaultElevationDeg
	}
	r.ElevationSet = true
	switch r.Projection {
	case "":
		r.Projection = Orthographic
	case Orthographic, Pinhole:
	default:
		return r, optErr("Projection", fmt.Sprintf("%q", string(o.Projection)), fmt.Sprintf("must be %q or %q", Orthographic, Pinhole))
	}
	if !finite(r.PixelsPerMM) || r.PixelsPerMM < 0 {
		return r, optErr("PixelsPerMM", o.PixelsPerMM, "must be positive; 0 means fit the part to the image")
	}
	if !finite(r.FocalPx) || r.FocalPx < 0 {
		return r, optErr("FocalPx", o.FocalPx, fmt.Sprintf("must be positive; 0 means %g", DefaultFocalPx))
	}
	if r.FocalPx == 0 {
		r.FocalPx = DefaultFocalPx
	}
	if !finite(r.DistanceMM) || r.DistanceMM < 0 {
		return r, optErr("DistanceMM", o.DistanceMM, "must be positive; 0 means fit the part to the image")
	}
	if !finite(r.NoiseSigma) || r.NoiseSigma < 0 || r.NoiseSigma > 255 {
		return r, optErr("NoiseSigma", o.NoiseSigma, "must be in [0, 255] grey levels")
	}
	if r.Supersample < 0 || r.Supersample > MaxSupersample {
		return r, optErr("Supersample", o.Supersample, fmt.Sprintf("must be in [1, %d]; 0 means %d", MaxSupersample, DefaultSupersample))
	}
	if r.Supersample == 0 {
		r.Supersample = DefaultSupersample
	}
	if !finite(r.BlurSigma) || r.BlurSigma < 0 || r.BlurSigma > MaxBlurSigma {
		return r, optErr("BlurSigma", o.BlurSigma, fmt.Sprintf("must be in [0, %g] pixels", MaxBlurSigma))
	}
	if !finite(r.TextureCellMM) || r.TextureCellMM < 0 || (r.TextureCellMM > 0 && r.TextureCellMM < 0.05) || r.TextureCellMM > 1000 {
		return r, optErr("TextureCellMM", o.TextureCellMM, fmt.Sprintf("must be in [0.05, 1000] mm; 0 means %g", DefaultTextureCellMM))
	}
	if r.TextureCellMM == 0 {
		r.TextureCellMM = DefaultTextureCellMM
	}
	return r, nil
}
