package eval

import (
	"fmt"
	"math"
	"slices"

	"trackfactor/factor"
)

// Truth is a scene whose geometry is known (track/synth.Scene is one).
type Truth interface {
	// Camera returns the true world→camera rotation of frame f.
	Camera(f int) (R [3][3]float64, T [3]float64)
	// Raycast returns the surface point seen at image point (x, y) in
	// frame f, ok false on background.
	Raycast(f int, x, y float64) (X [3]float64, ok bool)
	// Diagonal is the object's bounding-box diagonal (its units).
	Diagonal() float64
}

// Seen is where a track was first observed: the ground-truth point of the
// track is the surface point under that observation.
type Seen struct {
	Frame int
	X, Y  float64
}

// Report scores a reconstruction against a Truth.
type Report struct {
	Rotation RotationErrors
	// StructureRMS is the RMS distance between reconstructed and true
	// points after the best similarity (reflection allowed for affine
	// models), in the truth's units; StructurePct is it as a percentage
	// of the object's bounding-box diagonal.
	StructureRMS, StructurePct float64
	// Points scored, and points whose first observation was not on the
	// object (background tracks that survived).
	Points, OffObject int
	// Scale is the similarity's scale: truth units per reconstruction
	// unit. When the reconstruction is in the truth's unit (a pixel size
	// or reference length was given), Scale − 1 is its scale error.
	Scale float64
	// PointError is each scored point's distance from its true position
	// after the alignment, by track id (truth units).
	PointError map[int]float64
}

// Score compares rec with the truth. first maps track ids to their first
// observation.
func Score(rec *factor.Reconstruction, first map[int]Seen, truth Truth) (Report, error) {
	var rep Report
	est := make([][3][3]float64, len(rec.Cameras))
	gt := make([][3][3]float64, len(rec.Cameras))
	for i, c := range rec.Cameras {
		est[i] = c.R
		gt[i], _ = truth.Camera(c.Frame)
	}
	affine := rec.Diagnostics.MirrorAmbiguous
	var err error
	if rep.Rotation, err = CompareRotations(est, gt, affine); err != nil {
		return rep, err
	}
	var src, dst [][3]float64
	var ids []int
	for _, p := range rec.Points {
		s, ok := first[p.Track]
		if !ok {
			return rep, fmt.Errorf("eval: point of track %d has no first observation", p.Track)
		}
		X, hit := truth.Raycast(s.Frame, s.X, s.Y)
		if !hit {
			rep.OffObject++
			continue
		}
		src = append(src, p.X)
		dst = append(dst, X)
		ids = append(ids, p.Track)
	}
	rep.Points = len(src)
	if len(src) < 3 {
		return rep, fmt.Errorf("eval: only %d reconstructed points lie on the object", len(src))
	}
	sim, rms, err := AlignSimilarity(src, dst, affine)
	if err != nil {
		return rep, err
	}
	rep.Scale = sim.Scale
	rep.PointError = make(map[int]float64, len(ids))
	for i, id := range ids {
		y := sim.Apply(src[i])
		rep.PointError[id] = math.Sqrt(sq(y[0]-dst[i][0]) + sq(y[1]-dst[i][1]) + sq(y[2]-dst[i][2]))
	}
	rep.StructureRMS = rms
	rep.StructurePct = 100 * rms / truth.Diagonal()
	return rep, nil
}

// AngleErrors compares turntable angles with the true ones.
type AngleErrors struct {
	// RMSDeg and MaxDeg are over the frames of the comparison, after
	// both sequences are taken relative to their first frame (the
	// angles' zero is arbitrary) and the estimate's sense of turning is
	// matched to the truth's (a mirrored affine result turns the other
	// way).
	RMSDeg, MaxDeg float64
	// StdDeg is the standard deviation of the errors about their mean.
	StdDeg float64
	Frames int
}

// CompareAngles scores estimated turntable angles (degrees, one per frame
// of frames) against trueDeg, the true angle of a frame.
func CompareAngles(estDeg []float64, frames []int, trueDeg func(f int) float64) (AngleErrors, error) {
	n := len(estDeg)
	if n != len(frames) || n < 2 {
		return AngleErrors{}, fmt.Errorf("eval: need one angle per frame (≥ 2), got %d angles for %d frames", n, len(frames))
	}
	score := func(sign float64) AngleErrors {
		var e AngleErrors
		var sum, ss float64
		errs := make([]float64, n)
		t0 := trueDeg(frames[0])
		for i := range estDeg {
			d := sign*(estDeg[i]-estDeg[0]) - (trueDeg(frames[i]) - t0)
			errs[i] = d
			sum += d
			ss += d * d
			e.MaxDeg = math.Max(e.MaxDeg, math.Abs(d))
		}
		e.RMSDeg = math.Sqrt(ss / float64(n))
		mean := sum / float64(n)
		for _, d := range errs {
			e.StdDeg += (d - mean) * (d - mean)
		}
		e.StdDeg = math.Sqrt(e.StdDeg / float64(n))
		e.Frames = n
		return e
	}
	a, b := score(1), score(-1)
	if b.RMSDeg < a.RMSDeg {
		return b, nil
	}
	return a, nil
}

// SigmaRatio compares the points' actual errors errs (truth units, after
// the similarity alignment, by track) with their predicted standard
// deviations sigma (each the RMS over the three axes, in reconstruction
// units, by track; scale converts them to truth units, so the expected
// squared error is 3·(scale·σ)²): it returns the median over points of
// error / (√3·scale·σ) and the ratio of the RMS error to √3·scale·RMS σ,
// over the n points that have both and σ > 0. 1 means σ accounts for the
// whole error.
func SigmaRatio(errs, sigma map[int]float64, scale float64) (med, rms float64, n int) {
	ids := make([]int, 0, len(sigma))
	for id, s := range sigma {
		if _, ok := errs[id]; ok && s > 0 {
			ids = append(ids, id)
		}
	}
	if len(ids) == 0 {
		return 0, 0, 0
	}
	slices.Sort(ids)
	var se, ss float64
	rs := make([]float64, len(ids))
	for i, id := range ids {
		e, s := errs[id], math.Sqrt(3)*sigma[id]*scale
		se += e * e
		ss += s * s
		rs[i] = e / s
	}
	slices.Sort(rs)
	return median(rs), math.Sqrt(se / ss), len(ids)
}
