package main

import (
	"math"
	"strconv"
	"strings"

	"github.com/urfave/cli/v2"

	"trackfactor/factor/bundle"
	"trackfactor/pipeline"
)

// refineFlags configure bundle adjustment, the turntable and the scale.
type refineFlags struct {
	refine      bool
	turntable   bool
	stepDeg     float64
	pixelSize   float64
	reference   string
	unit        string
	loss        string
	lossScale   float64
	refineFocal bool
	refineK1    bool
	maxIter     int
}

func (f *refineFlags) flags() []cli.Flag {
	d := bundle.Options{}.WithDefaults()
	const cat = "refinement and scale"
	return []cli.Flag{
		&cli.BoolFlag{Name: "refine", Category: cat, Usage: "bundle adjustment after the factorization (--refine=false skips it)", Value: true, Destination: &f.refine},
		&cli.BoolFlag{Name: "turntable", Category: cat, Usage: "constrain the refinement to turntable motion: one rotation angle per frame about a common axis", Destination: &f.turntable},
		&cli.Float64Flag{Name: "step-deg", Category: cat, Usage: "nominal turntable step per frame, degrees, to compare the measured steps with (0 = none)", Destination: &f.stepDeg},
		&cli.Float64Flag{Name: "pixel-size", Category: cat, Usage: "object-space size of one pixel, in --unit (orthographic or telecentric set-ups); gives the result real units", Destination: &f.pixelSize},
		&cli.StringFlag{Name: "reference", Category: cat, Usage: "known distance between two points of the part, in --unit: TRACK_A,TRACK_B,LENGTH (track ids as in tracks.csv), or FRAME:XA,YA:XB,YB:LENGTH (two image points in pixels in the frame FRAME, named by file name or index; each stands for the reconstructed track nearest to it, within 4 px)", Destination: &f.reference},
		&cli.StringFlag{Name: "unit", Category: cat, Usage: "length unit of --pixel-size and --reference", Value: "mm", Destination: &f.unit},
		&cli.StringFlag{Name: "loss", Category: cat, Usage: "robust loss of the refinement: huber, cauchy or squared", Value: string(d.Loss), Destination: &f.loss},
		&cli.Float64Flag{Name: "loss-scale", Category: cat, Usage: "scale of the robust loss, px (residuals beyond it count less)", Value: d.LossScale, Destination: &f.lossScale},
		&cli.BoolFlag{Name: "refine-focal", Category: cat, Usage: "also refine the focal length (perspective model with --intrinsics)", Destination: &f.refineFocal},
		&cli.BoolFlag{Name: "refine-k1", Category: cat, Usage: "also refine the first radial distortion coefficient (perspective model with --intrinsics)", Destination: &f.refineK1},
		&cli.IntFlag{Name: "refine-iterations", Category: cat, Usage: "most Levenberg–Marquardt iterations", Value: d.MaxIterations, Destination: &f.maxIter},
	}
}

func (f *refineFlags) config() (pipeline.RefineConfig, error) {
	rc := pipeline.RefineConfig{
		Off: !f.refine, Turntable: f.turntable, NominalStepDeg: f.stepDeg,
		PixelSize: f.pixelSize, Unit: f.unit,
		Bundle: bundle.Options{Loss: bundle.Loss(f.loss), LossScale: f.lossScale,
			RefineFocal: f.refineFocal, RefineK1: f.refineK1, MaxIterations: f.maxIter},
	}
	if f.pixelSize < 0 || math.IsNaN(f.pixelSize) || math.IsInf(f.pixelSize, 0) {
		return rc, usagef("--pixel-size %v: want a size > 0 in %s, e.g. --pixel-size 0.02", f.pixelSize, f.unit)
	}
	if f.unit == "" || strings.ContainsAny(f.unit, " \t\n") {
		return rc, usagef("--unit %q: want a unit name such as mm, um or in", f.unit)
	}
	if strings.Contains(f.reference, ":") {
		ref, err := parseImageReference(f.reference)
		if err != nil {
			return rc, err
		}
		rc.Reference = ref
	} else if f.reference != "" {
		parts := strings.Split(f.reference, ",")
		var a, b int
		var l float64
		var err1, err2, err3 error
		if len(parts) == 3 {
			a, err1 = strconv.Atoi(strings.TrimSpace(parts[0]))
			b, err2 = strconv.Atoi(strings.TrimSpace(parts[1]))
			l, err3 = strconv.ParseFloat(strings.TrimSpace(parts[2]), 64)
		}
		if len(parts) != 3 || err1 != nil || err2 != nil || err3 != nil || !(l > 0) || math.IsInf(l, 0) || a == b {
			return rc, usagef("--reference %q: want TRACK_A,TRACK_B,LENGTH with two different track ids and a length > 0, e.g. --reference 17,242,25.4", f.reference)
		}
		rc.Reference = &pipeline.Reference{TrackA: a, TrackB: b, Length: l}
	}
	if f.pixelSize > 0 && rc.Reference != nil {
		return rc, usagef("give --pixel-size or --reference, not both")
	}
	if err := rc.Bundle.Validate(); err != nil {
		return rc, &usageError{err.Error()}
	}
	return rc, nil
}

// parseImageReference reads the image-point form of --reference,
// FRAME:XA,YA:XB,YB:LENGTH. The frame name is everything before the last
// three colons, so a file name may hold colons itself.
func parseImageReference(s string) (*pipeline.Reference, error) {
	bad := usagef("--reference %q: want FRAME:XA,YA:XB,YB:LENGTH — a frame (file name or index), two image points in pixels and a length > 0, e.g. --reference img_0012.png:412.5,230:598,236.4:25.4", s)
	parts := strings.Split(s, ":")
	if len(parts) < 4 {
		return nil, bad
	}
	n := len(parts)
	frame := strings.TrimSpace(strings.Join(parts[:n-3], ":"))
	point := func(p string) ([2]float64, bool) {
		xy := strings.Split(p, ",")
		if len(xy) != 2 {
			return [2]float64{}, false
		}
		x, e1 := strconv.ParseFloat(strings.TrimSpace(xy[0]), 64)
		y, e2 := strconv.ParseFloat(strings.TrimSpace(xy[1]), 64)
		ok := e1 == nil && e2 == nil && !math.IsNaN(x) && !math.IsNaN(y) && !math.IsInf(x, 0) && !math.IsInf(y, 0)
		return [2]float64{x, y}, ok
	}
	a, okA := point(parts[n-3])
	b, okB := point(parts[n-2])
	l, err := strconv.ParseFloat(strings.TrimSpace(parts[n-1]), 64)
	if frame == "" || !okA || !okB || err != nil || !(l > 0) || math.IsInf(l, 0) {
		return nil, bad
	}
	if a == b {
		return nil, usagef("--reference %q: the two image points are the same; give the two ends of the known length", s)
	}
	return &pipeline.Reference{Frame: frame, A: a, B: b, Length: l}, nil
}
