package bundle

import (
	"fmt"
	"math"
	"strings"

	"trackfactor/factor"
	"trackfactor/factor/rotation"
)

// Scaled is a reconstruction brought to real units.
type Scaled struct {
	Reconstruction *factor.Reconstruction
	// Unit names the new length unit ("mm", …); it goes into the outputs.
	Unit string
	// Factor k: new coordinates = k × old ones.
	Factor float64
	// RelativeSigma is the relative standard deviation of Factor implied
	// by the reference points' covariances (0 when unknown).
	RelativeSigma float64
	// ScaleSpread is, for a pixel size, the relative spread (max − min)/
	// mean of the cameras' scales the mean was taken over (0 for an
	// orthographic reconstruction).
	ScaleSpread float64
}

// ScaleBy returns a copy of rec with every length multiplied by k: points
// X' = k·X; affine cameras keep their translation (the image of the
// world origin) and get Scale' = Scale/k; central cameras get T' = k·T
// (the same pixels, since X_c scales by k) and Scale' = Scale/k. Rotations
// and residuals are unchanged. k must be finite and > 0.
func ScaleBy(rec *factor.Reconstruction, k float64) *factor.Reconstruction {
	if !(k > 0) || math.IsInf(k, 0) {
		panic(fmt.Sprintf("bundle: ScaleBy: factor %v is not a finite number > 0", k))
	}
	out := *rec
	out.Cameras = append([]factor.Camera(nil), rec.Cameras...)
	out.Points = append([]factor.Point(nil), rec.Points...)
	central := rec.Model == factor.Perspective || rec.Model == factor.Paraperspective
	for i := range out.Cameras {
		c := &out.Cameras[i]
		c.Scale /= k
		if central {
			c.T = rotation.Scale(k, c.T)
		}
	}
	for i := range out.Points {
		out.Points[i].X = rotation.Scale(k, out.Points[i].X)
	}
	return &out
}

func checkUnit(unit string) error {
	if strings.TrimSpace(unit) == "" || strings.ContainsAny(unit, "\n\r") {
		return fmt.Errorf("bundle: unit %q must be a non-empty single-line name such as \"mm\"", unit)
	}
	return nil
}

// ScaleByPixelSize brings an orthographic or scaled-orthographic
// (telecentric) reconstruction to real units from the object-space size
// of one pixel (unit per px): a world unit spans s px in the image (the
// cameras' Scale, averaged over the views), so it measures s·pixelSize
// units and k = s̄·pixelSize. It fails for central models, whose image
// scale depends on depth — use ScaleByReference for those.
func ScaleByPixelSize(rec *factor.Reconstruction, pixelSize float64, unit string) (*Scaled, error) {
	if err := checkUnit(unit); err != nil {
		return nil, err
	}
	if !(pixelSize > 0) || math.IsInf(pixelSize, 0) {
		return nil, fmt.Errorf("bundle: pixel size %v must be a finite number > 0 (%s per px)", pixelSize, unit)
	}
	switch rec.Model {
	case factor.Orthographic, factor.ScaledOrthographic:
	default:
		return nil, fmt.Errorf("bundle: a pixel size fixes the scale of orthographic (telecentric) views only; the %s model's scale depends on depth: give a reference length between two tracks instead", rec.Model)
	}
	if len(rec.Cameras) == 0 {
		return nil, fmt.Errorf("bundle: the reconstruction has no cameras")
	}
	lo, hi, mean := math.Inf(1), math.Inf(-1), 0.0
	for _, c := range rec.Cameras {
		lo, hi = math.Min(lo, c.Scale), math.Max(hi, c.Scale)
		mean += c.Scale
	}
	mean /= float64(len(rec.Cameras))
	if !(mean > 0) {
		return nil, fmt.Errorf("bundle: the cameras' scales average %v px per unit; cannot apply a pixel size", mean)
	}
	k := mean * pixelSize
	return &Scaled{Reconstruction: ScaleBy(rec, k), Unit: unit, Factor: k, ScaleSpread: (hi - lo) / mean}, nil
}

// ScaleByReference brings rec to real units from a known length between
// the points of two tracks: k = length/|X_a − X_b|. With unc (the
// uncertainty of the same reconstruction, may be nil) the relative
// standard deviation of k is estimated by first-order propagation,
// σ_d = √(uᵀ(Σ_a + Σ_b)u) with u the unit direction between the points
// (the cross-covariance of the two points is neglected), σ_k/k = σ_d/d.
func ScaleByReference(rec *factor.Reconstruction, unc *Uncertainty, trackA, trackB int, length float64, unit string) (*Scaled, error) {
	if err := checkUnit(unit); err != nil {
		return nil, err
	}
	if !(length > 0) || math.IsInf(length, 0) {
		return nil, fmt.Errorf("bundle: reference length %v must be a finite number > 0 (%s)", length, unit)
	}
	if trackA == trackB {
		return nil, fmt.Errorf("bundle: the reference length needs two different tracks, got %d twice", trackA)
	}
	ia, ib := -1, -1
	for i, p := range rec.Points {
		switch p.Track {
		case trackA:
			ia = i
		case trackB:
			ib = i
		}
	}
	for _, q := range [][2]int{{ia, trackA}, {ib, trackB}} {
		if q[0] < 0 {
			return nil, fmt.Errorf("bundle: reference track %d is not among the reconstruction's %d points; pick tracks that were reconstructed (see the points file)", q[1], len(rec.Points))
		}
	}
	dv := rotation.Sub(rec.Points[ia].X, rec.Points[ib].X)
	d := rotation.Norm(dv)
	if !(d > 0) {
		return nil, fmt.Errorf("bundle: reference tracks %d and %d are reconstructed at the same place; pick two distinct points", trackA, trackB)
	}
	k := length / d
	out := &Scaled{Reconstruction: ScaleBy(rec, k), Unit: unit, Factor: k}
	if unc != nil && ia < len(unc.Points) && ib < len(unc.Points) && unc.Points[ia].Refined && unc.Points[ib].Refined {
		u := rotation.Scale(1/d, dv)
		v := 0.0
		for _, C := range [][3][3]float64{unc.Points[ia].Cov, unc.Points[ib].Cov} {
			v += rotation.Dot(u, rotation.Apply(C, u))
		}
		out.RelativeSigma = math.Sqrt(math.Max(v, 0)) / d
	}
	return out, nil
}
