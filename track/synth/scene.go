package synth

import (
	"fmt"
	"math"
	"sync"
)

// Lighting and backdrop constants (see the package documentation).
const (
	ambient  = 0.32 // ka
	diffuse  = 0.68 // kd
	specular = 0.6  // ks
	// shininess m of the Phong lobe; m = 8 is evaluated by three squarings.
	// The lobe is broad on purpose: the part's faces are vertical or
	// horizontal, and a vertical face mirrors a light at elevation eL into
	// a camera at elevation e only at r·v ≤ cos(eL + e), so a narrow lobe
	// would leave no visible highlight.
	shininess = 8
	// highlightMin is the specular term (fraction of full scale, ≈ 8 grey
	// levels) above which HighlightMask marks a pixel.
	highlightMin = 0.03

	// The light is directional and fixed relative to the camera; at the
	// default elevation it comes from 8° above the turntable plane and
	// 35° to the left of the viewing direction (a low side light, so that
	// the shaft sides catch the highlight: r·v reaches cos 28° ≈ 0.88).
	lightElevationDeg = 8.0
	lightAzimuthDeg   = 35.0

	// BackgroundGrey is the flat background level without the backdrop.
	BackgroundGrey = 40.0
	// BackdropDistanceMM is how far behind the turntable axis (along the
	// horizontal viewing direction) the backdrop plane stands.
	BackdropDistanceMM = 70.0
)

// Scene is a resolved synthetic turntable sequence. Create it with New.
// Methods taking a frame index f panic when f is outside [0, Len()).
type Scene struct {
	opts   Options
	angles []float64 // turntable angle per frame, degrees
	frames []frame

	rlab   [3][3]float64 // lab → camera
	t      vec3          // translation (same for every frame)
	target vec3          // look-at point on the axis
	fx     float64       // focal length (pinhole) or scale (orthographic)
	cx, cy float64
	pin    bool
	cLab   vec3    // pinhole camera centre in the lab frame
	w0     float64 // orthographic ray start depth (camera z of ray origins)

	lightCam vec3 // unit vector towards the light, camera coordinates

	tex      partTexture
	bdSeed   uint64
	bdShade  float64 // ka + kd·max(0, n·L) of the backdrop (normal towards the camera)
	bdMu     sync.Mutex
	bdCache  []float32 // per-pixel backdrop colour (RGB), computed on first use
	bdFilled bool
}

// frame is the per-frame camera and ray basis, in part coordinates.
type frame struct {
	r     [3][3]float64 // world → camera
	c     vec3          // pinhole camera centre
	light vec3          // towards the light
}

func rotZ(deg float64) [3][3]float64 {
	s, c := math.Sincos(deg * math.Pi / 180)
	return [3][3]float64{{c, -s, 0}, {s, c, 0}, {0, 0, 1}}
}

func matMul(a, b [3][3]float64) [3][3]float64 {
	var m [3][3]float64
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			m[i][j] = a[i][0]*b[0][j] + a[i][1]*b[1][j] + a[i][2]*b[2][j]
		}
	}
	return m
}

func matVec(a [3][3]float64, v vec3) vec3 {
	return vec3{dot(a[0], v), dot(a[1], v), dot(a[2], v)}
}

// matTVec returns aᵀ·v.
func matTVec(a [3][3]float64, v vec3) vec3 {
	return vec3{
		a[0][0]*v[0] + a[1][0]*v[1] + a[2][0]*v[2],
		a[0][1]*v[0] + a[1][1]*v[1] + a[2][1]*v[2],
		a[0][2]*v[0] + a[1][2]*v[1] + a[2][2]*v[2],
	}
}

// labRotation returns R_lab for elevation e (rows: image x, image y, view).
func labRotation(eDeg float64) [3][3]float64 {
	s, c := math.Sincos(eDeg * math.Pi / 180)
	return [3][3]float64{{1, 0, 0}, {0, -s, -c}, {0, c, -s}}
}

// rims are the part's circular edges (height, radius) that bound its image
// over a full turn; the collar's corners are covered by its circumcircle.
func rims() [][2]float64 {
	return [][2]float64{
		{0, LowerShaftRadiusMM}, {CollarZ0MM, LowerShaftRadiusMM},
		{CollarZ0MM, CollarCornerRadiusMM}, {CollarZ1MM, CollarCornerRadiusMM},
		{CollarZ1MM, UpperShaftRadiusMM}, {PartHeightMM, UpperShaftRadiusMM},
	}
}

// New validates opts, resolves the defaults and precomputes the cameras.
// Errors are *OptionError values.
func New(opts Options) (*Scene, error) {
	o, err := opts.resolve()
	if err != nil {
		return nil, err
	}
	s := &Scene{opts: o}
	s.angles = make([]float64, o.Frames)
	for i := range s.angles {
		if len(o.AnglesDeg) > 0 {
			s.angles[i] = o.AnglesDeg[i]
		} else {
			s.angles[i] = o.StartDeg + float64(i)*o.StepDeg
		}
	}
	W, H := float64(o.Width), float64(o.Height)
	s.cx, s.cy = (W-1)/2, (H-1)/2
	s.rlab = labRotation(o.ElevationDeg)
	se, ce := math.Sincos(o.ElevationDeg * math.Pi / 180)

	// Orthographic extent over a full turn: a rim point (r cos φ, r sin φ, z)
	// has image y (mm, down) = −sin e·r·sin φ − cos e·z, i.e. the rim spans
	// −cos e·z ± r·|sin e|; image x spans ±r.
	ylo, yhi, xr := math.Inf(1), math.Inf(-1), 0.0
	for _, rm := range rims() {
		ylo = math.Min(ylo, -ce*rm[0]-rm[1]*math.Abs(se))
		yhi = math.Max(yhi, -ce*rm[0]+rm[1]*math.Abs(se))
		xr = math.Max(xr, rm[1])
	}
	// Target on the axis at the height whose image is the extent's middle.
	zc := -(ylo + yhi) / 2 / ce
	s.target = vec3{0, 0, zc}
	fitScale := math.Min(DefaultFill*H/(yhi-ylo), DefaultFill*W/(2*xr))
	tl := matVec(s.rlab, s.target)

	// Bounding sphere about the target: the camera must stay outside it.
	rb := 0.0
	for _, rm := range rims() {
		rb = math.Max(rb, math.Hypot(rm[1], rm[0]-zc))
	}

	switch o.Projection {
	case Orthographic:
		if o.PixelsPerMM == 0 {
			s.opts.PixelsPerMM = fitScale
		}
		s.fx = s.opts.PixelsPerMM
		s.t = vec3{s.cx - s.fx*tl[0], s.cy - s.fx*tl[1], 0}
		s.w0 = tl[2] - rb - 1
	case Pinhole:
		s.pin = true
		s.fx = o.FocalPx
		if o.DistanceMM == 0 {
			d, err := fitDistance(s.rlab, s.target, s.fx, DefaultFill*H, DefaultFill*W, rb)
			if err != nil {
				return nil, err
			}
			s.opts.DistanceMM = d
		}
		if s.opts.DistanceMM <= rb*1.05 {
			return nil, optErr("DistanceMM", s.opts.DistanceMM, fmt.Sprintf("puts the camera inside or at the part's bounding sphere; use more than %.1f mm, or 0 for the fit", rb*1.05))
		}
		// Camera centre C = target − D·view; T = −R_lab·C = −R_lab·target + (0,0,D).
		s.t = vec3{-tl[0], -tl[1], -tl[2] + s.opts.DistanceMM}
		s.cLab = matTVec(s.rlab, vec3{-s.t[0], -s.t[1], -s.t[2]})
	}

	// Light: fixed in camera coordinates, defined at the default elevation.
	{
		le, la := lightElevationDeg*math.Pi/180, lightAzimuthDeg*math.Pi/180
		l := vec3{-math.Sin(la) * math.Cos(le), -math.Cos(la) * math.Cos(le), math.Sin(le)} // lab, towards the light
		s.lightCam = matVec(labRotation(DefaultElevationDeg), l)
		// Backdrop normal (0, −1, 0) in the lab: n·L = −L_lab[1].
		s.bdShade = ambient
		if nl := -matTVec(s.rlab, s.lightCam)[1]; nl > 0 {
			s.bdShade += diffuse * nl
		}
	}

	s.frames = make([]frame, o.Frames)
	for i, a := range s.angles {
		r := matMul(s.rlab, rotZ(a))
		fr := frame{r: r, light: matTVec(r, s.lightCam)}
		if s.pin {
			fr.c = matTVec(r, vec3{-s.t[0], -s.t[1], -s.t[2]})
		}
		s.frames[i] = fr
	}
	s.tex = newPartTexture(o.Seed, o.TextureCellMM)
	s.bdSeed = mix64(uint64(o.Seed) ^ saltBackdrop)
	return s, nil
}

// fitDistance finds the pinhole distance at which the rims' image spans
// at most hPx vertically and wPx horizontally (the larger ratio decides),
// by fixed-point iteration D ← D·extent/target (the extent is close to
// inversely proportional to D).
func fitDistance(rlab [3][3]float64, target vec3, f, hPx, wPx, rb float64) (float64, error) {
	const n = 180
	var pts []vec3
	for _, rm := range rims() {
		for i := 0; i < n; i++ {
			sn, cs := math.Sincos(2 * math.Pi * float64(i) / n)
			pts = append(pts, vec3{rm[1] * cs, rm[1] * sn, rm[0]})
		}
	}
	tl := matVec(rlab, target)
	d := 4 * rb
	for it := 0; it < 100; it++ {
		xlo, xhi, ylo, yhi := math.Inf(1), math.Inf(-1), math.Inf(1), math.Inf(-1)
		for _, p := range pts {
			q := matVec(rlab, p)
			z := q[2] - tl[2] + d
			x, y := f*(q[0]-tl[0])/z, f*(q[1]-tl[1])/z
			xlo, xhi = math.Min(xlo, x), math.Max(xhi, x)
			ylo, yhi = math.Min(ylo, y), math.Max(yhi, y)
		}
		ratio := math.Max((yhi-ylo)/hPx, (xhi-xlo)/wPx)
		nd := d * ratio
		if nd <= rb*1.05 {
			return 0, optErr("FocalPx", f, fmt.Sprintf("too short to fit the part into the image from outside its bounding sphere (%.1f mm); give a longer FocalPx or a DistanceMM", rb))
		}
		if math.Abs(nd-d) <= 1e-12*d {
			return nd, nil
		}
		d = nd
	}
	return d, nil
}

// Options returns the resolved options (defaults filled in, fitted
// PixelsPerMM or DistanceMM included, ElevationSet true); New of them
// gives the same scene.
func (s *Scene) Options() Options {
	o := s.opts
	o.AnglesDeg = append([]float64(nil), s.opts.AnglesDeg...)
	if len(o.AnglesDeg) == 0 {
		o.AnglesDeg = nil
	}
	return o
}

// Len returns the number of frames.
func (s *Scene) Len() int { return len(s.frames) }

func (s *Scene) frame(f int) *frame {
	if f < 0 || f >= len(s.frames) {
		panic(fmt.Sprintf("synth: frame %d out of range [0, %d)", f, len(s.frames)))
	}
	return &s.frames[f]
}

// AngleDeg returns the turntable angle of frame f in degrees.
func (s *Scene) AngleDeg(f int) float64 {
	s.frame(f)
	return s.angles[f]
}

// Target returns the point on the turntable axis (part coordinates, mm)
// the camera looks at; it projects to the principal point (cx, cy) in
// every frame.
func (s *Scene) Target() [3]float64 { return s.target }

// Camera returns the world→camera rotation R (rows: image x axis, image y
// axis, viewing direction; R[2] = R[0] × R[1]) and the translation T of
// frame f; world is the part's frame (Z up the turntable axis, origin at
// the centre of the part's bottom face).
//
//	pinhole:      Xc = R·X + T, x = fx·Xc/Zc + cx, y = fy·Yc/Zc + cy
//	orthographic: x = s·R[0]·X + T[0], y = s·R[1]·X + T[1], T[2] = 0
//
// with s = PixelsPerMM (returned as fx by Intrinsics).
func (s *Scene) Camera(f int) (R [3][3]float64, T [3]float64) {
	return s.frame(f).r, s.t
}

// Intrinsics returns the pinhole focal lengths and principal point in
// pixels; for the orthographic camera fx = fy = PixelsPerMM and (cx, cy)
// is where Target() projects. (cx, cy) = ((W−1)/2, (H−1)/2).
func (s *Scene) Intrinsics() (fx, fy, cx, cy float64) {
	return s.fx, s.fx, s.cx, s.cy
}

// Project returns the pixel position of the part point X in frame f. For
// the pinhole camera a point at or behind the camera plane gives NaN.
func (s *Scene) Project(f int, X [3]float64) (x, y float64) {
	fr := s.frame(f)
	return s.project(fr, X)
}

func (s *Scene) project(fr *frame, X vec3) (x, y float64) {
	if !s.pin {
		return s.fx*dot(fr.r[0], X) + s.t[0], s.fx*dot(fr.r[1], X) + s.t[1]
	}
	xc := matVec(fr.r, X)
	xc[0] += s.t[0]
	xc[1] += s.t[1]
	xc[2] += s.t[2]
	if xc[2] <= 0 {
		return math.NaN(), math.NaN()
	}
	return s.fx*xc[0]/xc[2] + s.cx, s.fx*xc[1]/xc[2] + s.cy
}

// ray returns the ray through the image point (x, y) of frame fr in part
// coordinates: origin o (outside the part) and direction d (not unit).
//
//	pinhole:      o = C,                  d = Rᵀ·((x−cx)/fx, (y−cy)/fy, 1)
//	orthographic: o = Rᵀ·(u, v, w0),      d = R[2], u = (x−T0)/s, v = (y−T1)/s
func (s *Scene) ray(fr *frame, x, y float64) (o, d vec3) {
	r := &fr.r
	if s.pin {
		a, b := (x-s.cx)/s.fx, (y-s.cy)/s.fx
		return fr.c, vec3{
			a*r[0][0] + b*r[1][0] + r[2][0],
			a*r[0][1] + b*r[1][1] + r[2][1],
			a*r[0][2] + b*r[1][2] + r[2][2],
		}
	}
	u, v := (x-s.t[0])/s.fx, (y-s.t[1])/s.fx
	return vec3{
		u*r[0][0] + v*r[1][0] + s.w0*r[2][0],
		u*r[0][1] + v*r[1][1] + s.w0*r[2][1],
		u*r[0][2] + v*r[1][2] + s.w0*r[2][2],
	}, r[2]
}

// Raycast returns the part's surface point (part coordinates, mm) seen at
// the image point (x, y) of frame f, the nearest intersection of the
// pixel's ray with the part; ok = false when the ray misses the part
// (background or backdrop).
func (s *Scene) Raycast(f int, x, y float64) (X [3]float64, ok bool) {
	fr := s.frame(f)
	o, d := s.ray(fr, x, y)
	t, face := intersectPart(o, d)
	if face == faceNone {
		return X, false
	}
	return vec3{o[0] + t*d[0], o[1] + t*d[1], o[2] + t*d[2]}, true
}

// Visible reports whether the part point X is seen in frame f: it lies on
// the exposed surface (within 1e-6 mm), faces the camera (on an edge or a
// corner: one of its faces does), projects inside
// the image ([-0.5, W-0.5) × [-0.5, H-0.5)) and nothing of the part lies in
// front of it along its ray (ray cast back, 1e-6 mm tolerance).
func (s *Scene) Visible(f int, X [3]float64) bool {
	fr := s.frame(f)
	var faces [4]int
	nf := surfaceFaces(X, &faces)
	if nf == 0 {
		return false
	}
	var toCam vec3
	if s.pin {
		toCam = vec3{fr.c[0] - X[0], fr.c[1] - X[1], fr.c[2] - X[2]}
	} else {
		toCam = vec3{-fr.r[2][0], -fr.r[2][1], -fr.r[2][2]}
	}
	front := false // on an edge, one front-facing face suffices
	for _, fc := range faces[:nf] {
		if dot(faceNormal(fc, X), toCam) > 0 {
			front = true
		}
	}
	if !front {
		return false
	}
	x, y := s.project(fr, X)
	if !(x >= -0.5 && x < float64(s.opts.Width)-0.5 && y >= -0.5 && y < float64(s.opts.Height)-0.5) {
		return false
	}
	o, d := s.ray(fr, x, y)
	t, hf := intersectPart(o, d)
	if hf == faceNone {
		return true // grazing the silhouette: nothing in front
	}
	dn := norm(d)
	// Parameter of X along the ray (X is on it up to rounding).
	tx := dot(vec3{X[0] - o[0], X[1] - o[1], X[2] - o[2]}, d) / (dn * dn)
	return t*dn >= tx*dn-surfaceTolMM
}
