package eval

import (
	"fmt"

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
	}
	rep.Points = len(src)
	if len(src) < 3 {
		return rep, fmt.Errorf("eval: only %d reconstructed points lie on the object", len(src))
	}
	_, rms, err := AlignSimilarity(src, dst, affine)
	if err != nil {
		return rep, err
	}
	rep.StructureRMS = rms
	rep.StructurePct = 100 * rms / truth.Diagonal()
	return rep, nil
}
