package bundle

import (
	"context"
	"fmt"
	"math"

	"trackfactor/factor"
	"trackfactor/factor/rotation"
)

// Axis is a rotation axis in a reconstruction's world: its direction and
// a point on it (world units).
type Axis struct {
	Direction [3]float64
	Point     [3]float64
}

// SingleAxisResult describes the single-axis (turntable) parameters of
// AdjustSingleAxis. The result's world is the turntable's: its z axis is
// the rotation axis and its origin lies on the axis at the height of the
// points' centroid; a point of the input world maps to it by
// X' = Rotation·(X − Origin).
type SingleAxisResult struct {
	Rotation [3][3]float64
	Origin   [3]float64
	// CameraRotation R_c and CameraTranslation T_c: every camera is
	// R_f = R_c·Rz(θ_f), T_f = T_c (T_c[2] = 0 for the affine models).
	CameraRotation    [3][3]float64
	CameraTranslation [3]float64
	// AnglesRad are θ_f per camera (θ of GaugeFrame is 0), unwrapped so
	// consecutive cameras differ by less than π; AngleSigmaRad their
	// standard deviations (NaN without uncertainty).
	AnglesRad, AngleSigmaRad []float64
	GaugeFrame               int
	// Scale is the affine models' px per world unit, shared by all views
	// and held (0 for perspective).
	Scale float64
}

// minAxisObs is the fewest refined points a camera needs for its angle.
const minAxisObs = 2

// AdjustSingleAxis refines rec with single-axis motion: one rotation
// angle θ_f per camera about a shared axis, R_f = R_c·Rz(θ_f) and T_f =
// T_c in the turntable world (see SingleAxisResult), with R_c, T_c, the
// angles and the points free (and the focal length and k1 when asked).
// axis is the start, in rec's world (the turntable package's Fit gives
// it). The gauge: R_c's rotation about the axis is held (with it an
// offset of all angles would change nothing) and θ of the first camera
// with observations is 0 (a rotation of the world about the axis), the
// reference point is held along the axis (a shift along it is free) and,
// for the perspective model, T_c's third component (the world's scale). Affine models keep one
// scale for all views, held at the mean of rec's (the camera does not
// move). Options as for Adjust.
func AdjustSingleAxis(ctx context.Context, m *factor.Measurements, rec *factor.Reconstruction, axis Axis, opts Options) (*Result, error) {
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	given := opts
	opts = opts.WithDefaults()
	pr, G, c, err := prepareAxis(m, rec, axis, opts)
	if err != nil {
		return nil, err
	}
	res, err := run(ctx, m, rec, pr.st, pr.mod, pr.X, pr.target, opts, given, pr.gaugeText, pr.refTrack, func(X [3]float64) [3]float64 {
		return rotation.Apply(G, rotation.Sub(X, c))
	})
	if res == nil {
		return nil, err
	}
	persp := pr.target == factor.Perspective
	nf := len(rec.Cameras)
	gframe := rec.Cameras[pr.mod.(*axisModel).gauge].Frame
	fin, _ := res.final.(*axisModel)
	sa := &SingleAxisResult{Rotation: G, Origin: c, GaugeFrame: gframe}
	if fin != nil {
		sa.CameraRotation, sa.CameraTranslation = fin.Rc, fin.Tc
		sa.AnglesRad = append([]float64(nil), fin.theta...)
		if !persp {
			sa.Scale = fin.s
		}
	}
	sa.AngleSigmaRad = make([]float64, nf)
	for f := range sa.AngleSigmaRad {
		sa.AngleSigmaRad[f] = math.NaN()
		if res.Uncertainty != nil {
			sa.AngleSigmaRad[f] = res.Uncertainty.Cameras[f].AngleSigmaDeg * math.Pi / 180
		}
	}
	res.SingleAxis = sa
	return res, err
}

// prepareAxis sets up the single-axis problem (opts with defaults); it
// also returns the turntable world's rotation G and origin c.
func prepareAxis(m *factor.Measurements, rec *factor.Reconstruction, axis Axis, opts Options) (*prepared, [3][3]float64, [3]float64, error) {
	var G [3][3]float64
	var c [3]float64
	fail := func(err error) (*prepared, [3][3]float64, [3]float64, error) { return nil, G, c, err }
	target, err := targetModel(rec, opts)
	if err != nil {
		return fail(err)
	}
	if err := checkCameras(rec); err != nil {
		return fail(err)
	}
	a := rotation.Normalize(axis.Direction)
	if !(rotation.Norm(axis.Direction) > 0) || math.IsNaN(a[0]+a[1]+a[2]) {
		return fail(fmt.Errorf("bundle: single-axis start: axis direction %v is not a non-zero vector", axis.Direction))
	}
	for _, v := range axis.Point {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return fail(fmt.Errorf("bundle: single-axis start: axis point %v is not finite", axis.Point))
		}
	}
	st, err := newSetup(m, rec, opts.MinViews, lossFn{kind: opts.Loss, c2: opts.LossScale * opts.LossScale})
	if err != nil {
		return fail(err)
	}
	gauge, heldCam, err := pickGauge(rec, st, minAxisObs)
	if err != nil {
		return fail(err)
	}
	persp := target == factor.Perspective
	var in factor.Intrinsics
	if persp {
		if in, err = pickIntrinsics(rec, opts); err != nil {
			return fail(err)
		}
	}

	// The turntable world: z along the axis, origin on it at the height
	// of the centroid.
	e1, e2 := rotation.Basis(a)
	G = [3][3]float64{e1, e2, a}
	var cen [3]float64
	for _, pt := range rec.Points {
		cen = rotation.Add(cen, pt.X)
	}
	cen = rotation.Scale(1/float64(len(rec.Points)), cen)
	c = rotation.Add(axis.Point, rotation.Scale(rotation.Dot(a, rotation.Sub(cen, axis.Point)), a))
	toAxis := func(X [3]float64) [3]float64 { return rotation.Apply(G, rotation.Sub(X, c)) }

	// Cameras in the new world: R' = R·Gᵀ and T' = T + s·R·c (affine,
	// first two rows) or T + R·c (perspective), so that the same pixels
	// result.
	nf := len(rec.Cameras)
	Rn := make([][3][3]float64, nf)
	Tn := make([][3]float64, nf)
	meanS := 0.0
	nS := 0
	for f, cam := range rec.Cameras {
		var R [3][3]float64
		var T [3]float64
		if persp {
			R, T = perspectiveCamera(rec, cam, in)
			T = rotation.Add(T, rotation.Apply(R, c))
		} else {
			var t2 [2]float64
			var s float64
			R, t2, s = affineCamera(rec, cam)
			Rc := rotation.Apply(R, c)
			T = [3]float64{t2[0] + s*Rc[0], t2[1] + s*Rc[1], 0}
			if !heldCam[f] {
				meanS += s
				nS++
			}
		}
		Rn[f] = rotation.MulT(R, G)
		Tn[f] = T
	}
	if nS > 0 {
		meanS /= float64(nS)
	}
	// Angles and R_c: θ_f from R_gᵀR_f ≈ Rz(θ_f − θ_g), then R_c as the
	// rotation nearest Σ R_f·Rz(θ_f)ᵀ (orthogonal Procrustes), then θ_f
	// again as the z-angle of R_cᵀR_f; finally θ_g = 0.
	zAngle := func(M [3][3]float64) float64 { return math.Atan2(M[1][0]-M[0][1], M[0][0]+M[1][1]) }
	theta := make([]float64, nf)
	for f := range theta {
		theta[f] = zAngle(rotation.TMul(Rn[gauge], Rn[f]))
	}
	var sumM [3][3]float64
	var Tc [3]float64
	nT := 0
	for f := range theta {
		if heldCam[f] {
			continue
		}
		P := rotation.MulT(Rn[f], rotation.RotZ(theta[f]))
		for i := 0; i < 3; i++ {
			for j := 0; j < 3; j++ {
				sumM[i][j] += P[i][j]
			}
		}
		Tc = rotation.Add(Tc, Tn[f])
		nT++
	}
	Tc = rotation.Scale(1/float64(nT), Tc)
	Rc, ok := rotation.Nearest(sumM)
	if !ok {
		return fail(fmt.Errorf("bundle: single-axis start: the camera rotations do not agree on a camera orientation; check the axis"))
	}
	for f := range theta {
		theta[f] = zAngle(rotation.TMul(Rc, Rn[f]))
	}
	g0 := theta[gauge]
	Rc = rotation.Mul(Rc, rotation.RotZ(g0))
	for f := range theta {
		theta[f] -= g0
	}
	unwrap(theta)
	var l lens
	if persp {
		l = lens{in: in, ratio: in.Fy / in.Fx, refineF: opts.RefineFocal, refK1: opts.RefineK1}
	}
	mod := newAxisModel(persp, l, meanS, Rc, Tc, theta, gauge, heldCam)
	X := initialPoints(rec, st)
	for j := range X {
		X[j] = toAxis(X[j])
	}
	refTrack := rec.Points[st.pointRec[st.prob.ref]].Track
	gframe := rec.Cameras[gauge].Frame
	gaugeText := fmt.Sprintf("turntable axis = world z; the camera's azimuth about it and the angle of frame %d (0) held; point of track %d held along the axis", gframe, refTrack)
	if persp {
		gaugeText += fmt.Sprintf("; depth of the world origin in the camera T_c[2] = %.6g held (scale)", Tc[2])
	} else {
		gaugeText += fmt.Sprintf("; the shared scale %.6g px per unit held", meanS)
	}
	return &prepared{st: st, mod: mod, X: X, target: target, gaugeText: gaugeText, refTrack: refTrack}, G, c, nil
}

// unwrap makes consecutive angles differ by less than π.
func unwrap(theta []float64) {
	for f := 1; f < len(theta); f++ {
		d := theta[f] - theta[f-1]
		d -= 2 * math.Pi * math.Round(d/(2*math.Pi))
		theta[f] = theta[f-1] + d
	}
}
