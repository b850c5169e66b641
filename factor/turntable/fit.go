package turntable

import (
	"fmt"
	"math"
	"strings"

	"gonum.org/v1/gonum/mat"

	"trackfactor/factor"
	"trackfactor/factor/bundle"
	"trackfactor/factor/rotation"
)

// Options configure Fit. The zero value gives the documented defaults.
type Options struct {
	// NominalStepDeg is the turntable step the rig was set to, degrees
	// (signed like the angles, or unsigned: its sign is taken from the
	// measured mean step); 0 means none. When given, the steps are
	// compared with it (Fit.StepErrorDeg, Fit.StepRMSErrorDeg) and it is
	// the expected step of the closure check.
	NominalStepDeg float64
	// Iterations bounds the Gauss–Newton refinement of the axis and the
	// angles on the rotations; 0 means 50.
	Iterations int
	// Uncertainty, when given (bundle.Result.Uncertainty of the same
	// reconstruction), yields a standard deviation for every free-motion
	// frame angle: √(aᵀ Σ_δ a) of the camera's rotation error about the
	// axis.
	Uncertainty *bundle.Uncertainty
}

// DefaultIterations is the default of Options.Iterations.
const DefaultIterations = 50

// Validate reports the first option that breaks its rule.
func (o Options) Validate() error {
	switch {
	case math.IsNaN(o.NominalStepDeg) || math.IsInf(o.NominalStepDeg, 0) || math.Abs(o.NominalStepDeg) >= 180:
		return fmt.Errorf("turntable: option NominalStepDeg = %v: must be a finite angle in (−180°, 180°) (0 means none)", o.NominalStepDeg)
	case o.Iterations < 0:
		return fmt.Errorf("turntable: option Iterations = %d: must be ≥ 0 (0 means %d)", o.Iterations, DefaultIterations)
	}
	return nil
}

// Closure kinds (Closure.Kind). The strings are stable.
const (
	// ClosureNone: the frames span less than a turn minus 1.5 steps.
	ClosureNone = "none"
	// ClosureGap: one more step would complete the turn; the error is the
	// missing gap 360° − span minus the expected step.
	ClosureGap = "gap"
	// ClosureRevisit: the last frame is at or beyond a full turn from
	// frame 0 — it sees the first pose again; the error is span − 360°
	// (within half a step of the full turn).
	ClosureRevisit = "revisit"
)

// Closure is the check of a sequence that completes a turn.
type Closure struct {
	Kind string `json:"kind"`
	// ErrorDeg: see the kinds. For ClosureGap it measures how far the
	// first frame is from where the next regular step would land.
	ErrorDeg float64 `json:"error_deg"`
	// ExpectedStepDeg is the step the gap was compared with (the nominal
	// one when given, else the mean step).
	ExpectedStepDeg float64 `json:"expected_step_deg"`
	Message         string  `json:"message"`
}

// Fit is the turntable geometry of a set of cameras.
type Fit struct {
	// Frames are the cameras' frame numbers, in the order of the angles.
	Frames []int `json:"frames"`
	// AxisWorld is the unit rotation axis in world coordinates, pointing
	// up in the image (its camera-frame y component is negative; image y
	// runs down), or, for a camera looking along the axis, so that the
	// mean step is positive. The angles turn right-handed about it.
	AxisWorld [3]float64 `json:"axis_world"`
	// AxisCamera is the axis in camera coordinates (x right, y down,
	// z forward), the same for every frame of a static camera.
	AxisCamera [3]float64 `json:"axis_camera"`
	// AxisPoint is a point on the axis in world coordinates (the one at
	// the height of the points' centroid) and AxisTranslationRMS the RMS
	// misfit of the translations to a fixed camera, px (affine) or world
	// units (perspective); both from the cameras' translations.
	AxisPoint          [3]float64 `json:"axis_point"`
	AxisTranslationRMS float64    `json:"axis_translation_rms"`
	// ElevationDeg is the camera's elevation above the turntable plane
	// (positive: looking down on the table), asin(−R_f[2]·a).
	ElevationDeg float64 `json:"elevation_deg"`
	// AnglesDeg are the frames' angles about the axis relative to the
	// first frame, unwrapped (consecutive ones differ by less than 180°);
	// AngleSigmaDeg their standard deviations (nil when unknown).
	AnglesDeg     []float64 `json:"angles_deg"`
	AngleSigmaDeg []float64 `json:"angle_sigma_deg,omitempty"`
	// StepsDeg[i] = AnglesDeg[i+1] − AnglesDeg[i], with their mean,
	// sample standard deviation (the spread), extremes and the total span.
	StepsDeg    []float64 `json:"steps_deg"`
	MeanStepDeg float64   `json:"mean_step_deg"`
	StepStdDeg  float64   `json:"step_std_deg"`
	MinStepDeg  float64   `json:"min_step_deg"`
	MaxStepDeg  float64   `json:"max_step_deg"`
	SpanDeg     float64   `json:"span_deg"`
	// OffAxisRMSDeg is the RMS angle of what the single-axis model leaves
	// of each rotation, |log(Rot(a, θ_f)ᵀ·R_cᵀ·R_f)|: near 0 for a
	// turntable, large when the motion is not about one axis.
	OffAxisRMSDeg float64 `json:"off_axis_rms_deg"`
	// NominalStepDeg (0: none given), the mean step minus it and the RMS
	// of the steps minus it.
	NominalStepDeg  float64 `json:"nominal_step_deg,omitempty"`
	StepErrorDeg    float64 `json:"step_error_deg,omitempty"`
	StepRMSErrorDeg float64 `json:"step_rms_error_deg,omitempty"`
	Closure         Closure `json:"closure"`
	// Iterations of the Gauss–Newton refinement on the rotations.
	Iterations int `json:"iterations"`
	// Constrained is true when the angles come from the single-axis
	// bundle adjustment (Refine) rather than from free rotations.
	Constrained bool `json:"constrained"`
	// Warnings, with stable codes (see the Warn… constants).
	Warnings []factor.Warning `json:"warnings,omitempty"`
}

// Warning codes.
const (
	// WarnNotSingleAxis: the rotations stray from a single axis by more
	// than 1° RMS; the motion may not be a turntable's.
	WarnNotSingleAxis = "not-single-axis"
	// WarnStepSpread: a step differs from the expected one by more than
	// a quarter of it (a missed or doubled frame, a slipping table).
	WarnStepSpread = "uneven-steps"
	// WarnMovingCamera: the translations do not fit a static camera
	// (misfit above 1 % of the mean translation or 2 px).
	WarnMovingCamera = "camera-moved"
)

// Axis returns the axis for bundle.AdjustSingleAxis.
func (f *Fit) Axis() bundle.Axis {
	return bundle.Axis{Direction: f.AxisWorld, Point: f.AxisPoint}
}

// minFrames is the fewest cameras a fit needs: two rotations give one
// relative rotation, whose axis is the turntable's; a third checks it.
const minFrames = 3

// FitReconstruction fits the turntable geometry to rec's cameras (at
// least three, turning by 0.5° or more).
//
// The model: R_f = R_c·Rot(a, θ_f) (world→camera rotations of a static
// camera viewing a part that turns by θ_f about the world axis a), so
// every relative rotation Q_f = R_0ᵀR_f = Rot(a, θ_f − θ_0) shares the
// axis a. The start takes a as the principal eigenvector of
// Σ_f ω_f ω_fᵀ/|ω_f| (ω_f = log Q_f: the outer products of the rotation
// axes weighted by their angles, insensitive to the sign of each axis)
// and θ_f as the angle about a that best fits Q_f,
//
//	θ = atan2(a·v, tr Q − aᵀQa),  v = (Q₃₂ − Q₂₃, Q₁₃ − Q₃₁, Q₂₁ − Q₁₂),
//
// the maximiser of tr(Rot(a, θ)ᵀ Q) (from Rodrigues' formula). Then
// Gauss–Newton refines R_c (3), a (2) and θ_f (θ_0 = 0; a rotation about
// a is taken up by R_c) on the residuals log(Rot(a, θ_f)ᵀ R_cᵀ R_f) — the
// geodesic (angle) misfit of every rotation (Hartley, Trumpf, Dai and Li,
// "Rotation averaging", IJCV 103, 2013, §5, for the geodesic L2 cost).
func FitReconstruction(rec *factor.Reconstruction, opts Options) (*Fit, error) {
	return fitCameras(rec, opts)
}

// fitCameras implements FitReconstruction.
func fitCameras(rec *factor.Reconstruction, opts Options) (*Fit, error) {
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	if opts.Iterations == 0 {
		opts.Iterations = DefaultIterations
	}
	cams := rec.Cameras
	nf := len(cams)
	if nf < minFrames {
		return nil, fmt.Errorf("turntable: %d cameras; a turntable fit needs at least %d", nf, minFrames)
	}
	R := make([][3][3]float64, nf)
	for f, c := range cams {
		R[f] = c.R
		if e := math.Abs(rotation.Det(c.R) - 1); !(e < 1e-6) {
			return nil, fmt.Errorf("turntable: camera of frame %d has det R = %.6g, not a rotation", c.Frame, rotation.Det(c.R))
		}
	}
	// Axis start.
	var M [3][3]float64
	spread := 0.0
	for f := 1; f < nf; f++ {
		w := rotation.Log(rotation.TMul(R[0], R[f]))
		t := rotation.Norm(w)
		spread = math.Max(spread, t)
		if t == 0 {
			continue
		}
		for i := 0; i < 3; i++ {
			for j := 0; j < 3; j++ {
				M[i][j] += w[i] * w[j] / t
			}
		}
	}
	if spread < 0.5*math.Pi/180 {
		return nil, fmt.Errorf("turntable: the cameras turn by at most %.3g°; at least 0.5° is needed to find the axis", spread*180/math.Pi)
	}
	a := principal(M)
	// Angles start and R_c = R_0.
	Rc := R[0]
	theta := make([]float64, nf)
	for f := range theta {
		theta[f] = angleAbout(a, rotation.TMul(Rc, R[f]))
	}
	unwrap(theta)
	iters := refineAxis(R, &Rc, &a, theta, opts.Iterations)
	// Sign: the axis points up in the image, (R_c a)_y < 0.
	ac := rotation.Apply(Rc, a)
	flip := ac[1] > 0
	if math.Abs(ac[1]) < 0.1 {
		flip = theta[nf-1]-theta[0] < 0
	}
	if flip {
		a = rotation.Scale(-1, a)
		for f := range theta {
			theta[f] = -theta[f]
		}
	}
	fit := &Fit{Iterations: iters}
	fit.AxisWorld = a
	// Off-axis residual and camera axis.
	var acSum [3]float64
	ss := 0.0
	for f := range R {
		r := rotation.Log(rotation.TMul(rotation.FromAxisAngle(a, theta[f]), rotation.TMul(Rc, R[f])))
		ss += rotation.Dot(r, r)
		acSum = rotation.Add(acSum, rotation.Apply(R[f], a))
	}
	fit.OffAxisRMSDeg = math.Sqrt(ss/float64(nf)) * 180 / math.Pi
	fit.AxisCamera = rotation.Normalize(acSum)
	// Axis point from the translations.
	fit.AxisPoint, fit.AxisTranslationRMS = axisPoint(rec, a)
	anglesDeg := make([]float64, nf)
	for f := range theta {
		anglesDeg[f] = (theta[f] - theta[0]) * 180 / math.Pi
	}
	frames := make([]int, nf)
	for f, c := range cams {
		frames[f] = c.Frame
	}
	var sig []float64
	if u := opts.Uncertainty; u != nil && len(u.Cameras) == nf {
		sig = make([]float64, nf)
		for f := range sig {
			sig[f] = u.AngleSigmaAboutDeg(f, a)
		}
	}
	fit.fill(frames, anglesDeg, sig, opts.NominalStepDeg)
	fit.ElevationDeg = elevation(fit.AxisCamera)
	if fit.OffAxisRMSDeg > 1 {
		fit.warn(WarnNotSingleAxis, fmt.Sprintf("the rotations stray %.2f° RMS from a single axis; the motion may not be a turntable's (or the reconstruction is poor)", fit.OffAxisRMSDeg))
	}
	scaleT := 0.0
	for _, c := range cams {
		scaleT += rotation.Norm(c.T)
	}
	scaleT /= float64(nf)
	if fit.AxisTranslationRMS > math.Max(0.01*scaleT, 2) && rec.Model != factor.Perspective && rec.Model != factor.Paraperspective ||
		(rec.Model == factor.Perspective || rec.Model == factor.Paraperspective) && fit.AxisTranslationRMS > 0.01*scaleT {
		fit.warn(WarnMovingCamera, fmt.Sprintf("the translations fit a static camera only to %.3g (RMS); the camera or the table's centre may have moved", fit.AxisTranslationRMS))
	}
	return fit, nil
}

func (f *Fit) warn(code, msg string) {
	f.Warnings = append(f.Warnings, factor.Warning{Code: code, Message: msg})
}

// elevation is asin(−(R a)_z): the angle of the viewing direction below
// the turntable plane.
func elevation(axisCam [3]float64) float64 {
	return math.Asin(math.Max(-1, math.Min(1, -axisCam[2]))) * 180 / math.Pi
}

// fill computes the steps, their statistics, the nominal comparison and
// the closure from the angles (degrees, relative to the first frame).
func (f *Fit) fill(frames []int, anglesDeg, sigmaDeg []float64, nominal float64) {
	nf := len(anglesDeg)
	f.Frames = frames
	f.AnglesDeg = anglesDeg
	f.AngleSigmaDeg = sigmaDeg
	f.StepsDeg = make([]float64, nf-1)
	f.MinStepDeg, f.MaxStepDeg = math.Inf(1), math.Inf(-1)
	sum := 0.0
	for i := range f.StepsDeg {
		s := anglesDeg[i+1] - anglesDeg[i]
		f.StepsDeg[i] = s
		sum += s
		f.MinStepDeg, f.MaxStepDeg = math.Min(f.MinStepDeg, s), math.Max(f.MaxStepDeg, s)
	}
	f.MeanStepDeg = sum / float64(nf-1)
	if nf > 2 {
		ss := 0.0
		for _, s := range f.StepsDeg {
			ss += (s - f.MeanStepDeg) * (s - f.MeanStepDeg)
		}
		f.StepStdDeg = math.Sqrt(ss / float64(nf-2))
	}
	f.SpanDeg = anglesDeg[nf-1] - anglesDeg[0]
	expected := f.MeanStepDeg
	if nominal != 0 {
		nominal = math.Copysign(math.Abs(nominal), f.MeanStepDeg)
		f.NominalStepDeg = nominal
		f.StepErrorDeg = f.MeanStepDeg - nominal
		ss := 0.0
		for _, s := range f.StepsDeg {
			ss += (s - nominal) * (s - nominal)
		}
		f.StepRMSErrorDeg = math.Sqrt(ss / float64(nf-1))
		expected = nominal
	}
	for i, s := range f.StepsDeg {
		if math.Abs(s-expected) > 0.25*math.Abs(expected) {
			f.warn(WarnStepSpread, fmt.Sprintf("step %d (frames %d→%d) is %.3f°, the expected step %.3f°: a missed or repeated frame, or a slipping table", i, frames[i], frames[i+1], s, expected))
			break
		}
	}
	f.Closure = closure(f.AnglesDeg, frames, expected)
}

// closure classifies the span of the angles (relative to the first frame,
// unwrapped) against a full turn (see the kinds). A sequence of more than
// a turn is judged at the frame nearest one full turn after the first.
func closure(anglesDeg []float64, frames []int, stepDeg float64) Closure {
	step := math.Abs(stepDeg)
	span := 0.0
	if n := len(anglesDeg); n > 0 {
		span = math.Abs(anglesDeg[n-1] - anglesDeg[0])
	}
	c := Closure{Kind: ClosureNone, ExpectedStepDeg: step}
	switch {
	case step == 0:
	case span >= 360-step/2:
		c.Kind = ClosureRevisit
		best := -1
		for i, a := range anglesDeg {
			if best < 0 || math.Abs(math.Abs(a-anglesDeg[0])-360) < math.Abs(math.Abs(anglesDeg[best]-anglesDeg[0])-360) {
				best = i
			}
		}
		c.ErrorDeg = math.Abs(anglesDeg[best]-anglesDeg[0]) - 360
		if best == len(anglesDeg)-1 {
			c.Message = fmt.Sprintf("the last frame is %.4f° from a full turn after the first (it sees the first pose again)", c.ErrorDeg)
		} else {
			c.Message = fmt.Sprintf("frame %d, the one nearest a full turn after the first, is %.4f° from it (it sees the first pose again); the frames go on for %.1f° in all", frames[best], c.ErrorDeg, span)
		}
	case span+step >= 360-step/2:
		c.Kind = ClosureGap
		gap := 360 - span
		c.ErrorDeg = gap - step
		c.Message = fmt.Sprintf("one more step closes the turn: the gap back to the first frame is %.4f°, %.4f° off the expected step %.4f°", gap, c.ErrorDeg, step)
	default:
		c.Message = fmt.Sprintf("the frames span %.2f°, less than a turn", span)
	}
	return c
}

// principal returns the unit eigenvector of the largest eigenvalue of a
// symmetric 3×3 matrix.
func principal(M [3][3]float64) [3]float64 {
	s := mat.NewSymDense(3, []float64{M[0][0], M[0][1], M[0][2], M[1][0], M[1][1], M[1][2], M[2][0], M[2][1], M[2][2]})
	var e mat.EigenSym
	if !e.Factorize(s, true) {
		return [3]float64{0, 0, 1}
	}
	var v mat.Dense
	e.VectorsTo(&v)
	// Eigenvalues ascending: the last column.
	return rotation.Normalize([3]float64{v.At(0, 2), v.At(1, 2), v.At(2, 2)})
}

// angleAbout returns the angle about the unit axis a of the rotation
// about a nearest Q (maximising tr(Rot(a, θ)ᵀ·Q)).
func angleAbout(a [3]float64, Q [3][3]float64) float64 {
	v := [3]float64{Q[2][1] - Q[1][2], Q[0][2] - Q[2][0], Q[1][0] - Q[0][1]}
	return math.Atan2(rotation.Dot(a, v), Q[0][0]+Q[1][1]+Q[2][2]-rotation.Dot(a, rotation.Apply(Q, a)))
}

func unwrap(theta []float64) {
	for f := 1; f < len(theta); f++ {
		d := theta[f] - theta[f-1]
		d -= 2 * math.Pi * math.Round(d/(2*math.Pi))
		theta[f] = theta[f-1] + d
	}
}

// refineAxis runs Gauss–Newton with Levenberg damping on the geodesic
// residuals r_f = log(Rot(a, θ_f)ᵀ R_cᵀ R_f) over δR_c (3, R_c ←
// R_c·exp([δ]×)), δa (2, a ← normalise(a + δ₁e₁ + δ₂e₂), e₁, e₂ ⊥ a) and
// θ_f for f ≥ 1 (θ_0 held). The 3×6 Jacobian of each residual is taken
// by central differences (h = 1e-7 rad: the residuals are smooth and of
// order 1e-3, so truncation ≈ 1e-14 and rounding ≈ 1e-9 relative).
func refineAxis(R [][3][3]float64, Rc *[3][3]float64, a *[3]float64, theta []float64, maxIter int) int {
	nf := len(R)
	np := 5 + nf - 1
	resid := func(Rc [3][3]float64, a [3]float64, th float64, f int) [3]float64 {
		return rotation.Log(rotation.TMul(rotation.FromAxisAngle(a, th), rotation.TMul(Rc, R[f])))
	}
	cost := func(Rc [3][3]float64, a [3]float64, theta []float64) float64 {
		s := 0.0
		for f := range R {
			r := resid(Rc, a, theta[f], f)
			s += rotation.Dot(r, r)
		}
		return s
	}
	apply := func(d []float64, Rc [3][3]float64, a [3]float64, theta []float64) ([3][3]float64, [3]float64, []float64) {
		e1, e2 := rotation.Basis(a)
		nRc := rotation.Mul(Rc, rotation.Exp([3]float64{d[0], d[1], d[2]}))
		na := rotation.Normalize(rotation.Add(a, rotation.Add(rotation.Scale(d[3], e1), rotation.Scale(d[4], e2))))
		nt := append([]float64(nil), theta...)
		for f := 1; f < nf; f++ {
			nt[f] += d[4+f]
		}
		return nRc, na, nt
	}
	const h = 1e-7
	lambda := 1e-6
	c0 := cost(*Rc, *a, theta)
	it := 0
	for it = 0; it < maxIter; it++ {
		H := mat.NewSymDense(np, nil)
		g := make([]float64, np)
		for f := range R {
			r := resid(*Rc, *a, theta[f], f)
			// Columns: 0..4 shared, 5+f−1 for θ_f (f ≥ 1).
			idx := []int{0, 1, 2, 3, 4}
			if f > 0 {
				idx = append(idx, 4+f)
			}
			J := make([][3]float64, len(idx))
			for k, i := range idx {
				d := make([]float64, np)
				d[i] = h
				pRc, pa, pt := apply(d, *Rc, *a, theta)
				rp := resid(pRc, pa, pt[f], f)
				d[i] = -h
				mRc, ma, mt := apply(d, *Rc, *a, theta)
				rm := resid(mRc, ma, mt[f], f)
				for c := 0; c < 3; c++ {
					J[k][c] = (rp[c] - rm[c]) / (2 * h)
				}
			}
			for k, i := range idx {
				g[i] += rotation.Dot(J[k], r)
				for l := k; l < len(idx); l++ {
					j := idx[l]
					v := rotation.Dot(J[k], J[l])
					if i <= j {
						H.SetSym(i, j, H.At(i, j)+v)
					} else {
						H.SetSym(j, i, H.At(j, i)+v)
					}
				}
			}
		}
		improved := false
		for try := 0; try < 10; try++ {
			A := mat.NewSymDense(np, nil)
			A.CopySym(H)
			for i := 0; i < np; i++ {
				A.SetSym(i, i, A.At(i, i)*(1+lambda)+1e-12)
			}
			var ch mat.Cholesky
			if !ch.Factorize(A) {
				lambda *= 10
				continue
			}
			d := mat.NewVecDense(np, nil)
			gv := mat.NewVecDense(np, g)
			gv.ScaleVec(-1, gv)
			if err := ch.SolveVecTo(d, gv); err != nil {
				lambda *= 10
				continue
			}
			nRc, na, nt := apply(d.RawVector().Data, *Rc, *a, theta)
			c1 := cost(nRc, na, nt)
			if c1 < c0 {
				done := c0-c1 <= 1e-12*c0 || c1 < 1e-30
				*Rc, *a = nRc, na
				copy(theta, nt)
				c0 = c1
				lambda = math.Max(lambda/10, 1e-12)
				improved = true
				if done {
					return it + 1
				}
				break
			}
			lambda *= 10
		}
		if !improved {
			break
		}
	}
	return it
}

// axisPoint finds a world point c on the axis from the translations: the
// world point c on the axis maps to the same camera point in every frame
// (the camera is static and c does not move), so
//
//	perspective:  T_f + R_f·c = T_c,    affine:  t_f + s_f·(R_f c)_{x,y} = t_c,
//
// linear least squares in (c, T_c), with a·c = a·X̄ added to pick the
// point at the height of the centroid X̄ (a shift along the axis is free).
// It returns c and the RMS misfit.
func axisPoint(rec *factor.Reconstruction, a [3]float64) ([3]float64, float64) {
	central := rec.Model == factor.Perspective || rec.Model == factor.Paraperspective
	nT := 2
	if central {
		nT = 3
	}
	nf := len(rec.Cameras)
	rows := nT*nf + 1
	A := mat.NewDense(rows, 3+nT, nil)
	b := mat.NewVecDense(rows, nil)
	for f, c := range rec.Cameras {
		s := c.Scale
		if central {
			s = 1
		}
		for k := 0; k < nT; k++ {
			r := nT*f + k
			for j := 0; j < 3; j++ {
				A.Set(r, j, s*c.R[k][j])
			}
			A.Set(r, 3+k, -1)
			b.SetVec(r, -c.T[k])
		}
	}
	var cen [3]float64
	for _, p := range rec.Points {
		cen = rotation.Add(cen, p.X)
	}
	if len(rec.Points) > 0 {
		cen = rotation.Scale(1/float64(len(rec.Points)), cen)
	}
	// The height constraint, weighted like one camera row.
	wgt := 1.0
	if !central && nf > 0 {
		wgt = math.Abs(rec.Cameras[0].Scale)
	}
	for j := 0; j < 3; j++ {
		A.Set(rows-1, j, wgt*a[j])
	}
	b.SetVec(rows-1, wgt*rotation.Dot(a, cen))
	var x mat.VecDense
	if err := x.SolveVec(A, b); err != nil {
		return cen, math.NaN()
	}
	c := [3]float64{x.AtVec(0), x.AtVec(1), x.AtVec(2)}
	var r mat.VecDense
	r.MulVec(A, &x)
	r.SubVec(&r, b)
	ss := 0.0
	for i := 0; i < rows-1; i++ {
		ss += r.AtVec(i) * r.AtVec(i)
	}
	return c, math.Sqrt(ss / float64(rows-1))
}

// Brief returns a one-line summary.
func (f *Fit) Brief() string {
	kind := "free rotations"
	if f.Constrained {
		kind = "single-axis bundle adjustment"
	}
	return fmt.Sprintf("turntable (%s): elevation %.3f°, %d frames, mean step %.4f° ± %.4f°, span %.3f°, off-axis %.4f° RMS, closure %s %.4f°",
		kind, f.ElevationDeg, len(f.AnglesDeg), f.MeanStepDeg, f.StepStdDeg, f.SpanDeg, f.OffAxisRMSDeg, f.Closure.Kind, f.Closure.ErrorDeg)
}

// Report returns a multi-line report with every frame's angle and step.
func (f *Fit) Report() string {
	var b strings.Builder
	w := func(format string, a ...any) { fmt.Fprintf(&b, format, a...) }
	w("Turntable geometry\n")
	if f.Constrained {
		w("  source: single-axis bundle adjustment (one angle per frame)\n")
	} else {
		w("  source: the cameras' free rotations (%d Gauss–Newton iterations)\n", f.Iterations)
	}
	w("  axis in world coordinates  (%.6f, %.6f, %.6f)\n", f.AxisWorld[0], f.AxisWorld[1], f.AxisWorld[2])
	w("  axis in camera coordinates (%.6f, %.6f, %.6f)  (x right, y down, z forward)\n", f.AxisCamera[0], f.AxisCamera[1], f.AxisCamera[2])
	w("  point on the axis (%.6g, %.6g, %.6g); static-camera misfit of the translations %.3g\n", f.AxisPoint[0], f.AxisPoint[1], f.AxisPoint[2], f.AxisTranslationRMS)
	w("  camera elevation above the turntable plane %.4f°\n", f.ElevationDeg)
	w("  rotations off the single axis: %.4f° RMS\n", f.OffAxisRMSDeg)
	w("  steps: mean %.5f°, spread (std) %.5f°, min %.5f°, max %.5f°, span %.4f°\n", f.MeanStepDeg, f.StepStdDeg, f.MinStepDeg, f.MaxStepDeg, f.SpanDeg)
	if f.NominalStepDeg != 0 {
		w("  nominal step %.5f°: mean error %+.5f°, RMS step error %.5f°\n", f.NominalStepDeg, f.StepErrorDeg, f.StepRMSErrorDeg)
	}
	w("  closure: %s — %s\n", f.Closure.Kind, f.Closure.Message)
	w("\n  %6s %12s %10s %12s\n", "frame", "angle (°)", "σ (°)", "step (°)")
	for i, a := range f.AnglesDeg {
		sig := "—"
		if f.AngleSigmaDeg != nil {
			sig = fmt.Sprintf("%.5f", f.AngleSigmaDeg[i])
		}
		step := ""
		if i > 0 {
			step = fmt.Sprintf("%.5f", f.StepsDeg[i-1])
		}
		w("  %6d %12.5f %10s %12s\n", f.Frames[i], a, sig, step)
	}
	for _, x := range f.Warnings {
		w("  warning %s: %s\n", x.Code, x.Message)
	}
	return b.String()
}
