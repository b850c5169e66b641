package synth

import (
	"fmt"
	"math"
	"math/rand/v2"
)

// Dimensions of the part in mm (see the package documentation for the frame).
const (
	LowerShaftRadiusMM  = 12.0
	LowerShaftLengthMM  = 30.0
	CollarAcrossFlatsMM = 40.0
	CollarThicknessMM   = 10.0
	UpperShaftRadiusMM  = 8.0
	UpperShaftLengthMM  = 25.0

	// PartHeightMM is the overall height (lower shaft + collar + upper shaft).
	PartHeightMM = LowerShaftLengthMM + CollarThicknessMM + UpperShaftLengthMM

	// CollarZ0MM and CollarZ1MM are the heights of the collar's bottom and
	// top faces.
	CollarZ0MM = LowerShaftLengthMM
	CollarZ1MM = LowerShaftLengthMM + CollarThicknessMM

	sqrt3 = 1.7320508075688772935274463415058723669428
	// CollarCornerRadiusMM is the collar's circumradius, across-flats/√3
	// (regular hexagon: across corners = across flats × 2/√3).
	CollarCornerRadiusMM = CollarAcrossFlatsMM / sqrt3

	apothem = CollarAcrossFlatsMM / 2
)

// Face identifiers of the part's surface (the internal caps where the
// pieces meet never win a ray: the neighbouring piece is hit first).
const (
	faceNone = iota - 1
	faceLowerSide
	faceLowerBottom
	faceLowerTop // internal
	faceCollarFlat0
	faceCollarFlat1
	faceCollarFlat2
	faceCollarFlat3
	faceCollarFlat4
	faceCollarFlat5
	faceCollarBottom
	faceCollarTop
	faceUpperSide
	faceUpperBottom // internal
	faceUpperTop
)

// hexNormal returns the collar's flat normal k, (cos 60k°, sin 60k°), k = 0..5.
func hexNormal(k int) [2]float64 {
	switch k {
	case 0:
		return [2]float64{1, 0}
	case 1:
		return [2]float64{0.5, sqrt3 / 2}
	case 2:
		return [2]float64{-0.5, sqrt3 / 2}
	case 3:
		return [2]float64{-1, 0}
	case 4:
		return [2]float64{-0.5, -sqrt3 / 2}
	case 5:
		return [2]float64{0.5, -sqrt3 / 2}
	}
	panic(fmt.Sprintf("synth: internal error: hexagon flat %d", k))
}

type vec3 = [3]float64

func dot(a, b vec3) float64 { return a[0]*b[0] + a[1]*b[1] + a[2]*b[2] }

func norm(a vec3) float64 { return math.Sqrt(dot(a, a)) }

// rayPre holds the per-ray quantities shared by the part's coaxial pieces:
// for the ray o + t·d, the infinite cylinder x²+y² = r² is met where
// a·t² + 2b·t + (c0 − r²) = 0 with a = dx²+dy², b = ox·dx+oy·dy,
// c0 = ox²+oy²; the planes z = 0, CollarZ0, CollarZ1, PartHeight at tz[i].
type rayPre struct {
	o, d      vec3
	a, b, c0  float64
	invA      float64
	tz        [4]float64
	up, level bool // d[2] > 0; d[2] == 0
}

// planeZ returns the height of the plane tz[i] refers to.
func planeZ(i int) float64 {
	switch i {
	case 0:
		return 0
	case 1:
		return CollarZ0MM
	case 2:
		return CollarZ1MM
	}
	return PartHeightMM
}

func newRayPre(o, d vec3) rayPre {
	p := rayPre{o: o, d: d}
	p.a = d[0]*d[0] + d[1]*d[1]
	p.b = o[0]*d[0] + o[1]*d[1]
	p.c0 = o[0]*o[0] + o[1]*o[1]
	if p.a != 0 {
		p.invA = 1 / p.a
	}
	if d[2] == 0 {
		p.level = true
		return p
	}
	inv := 1 / d[2]
	p.up = d[2] > 0
	p.tz = [4]float64{-o[2] * inv, (CollarZ0MM - o[2]) * inv, (CollarZ1MM - o[2]) * inv, (PartHeightMM - o[2]) * inv}
	return p
}

// slab returns the parameter interval of the ray inside the slab between
// planes i < j (indices of tz), and whether the entry is through the
// lower plane. A level ray is inside for all t or never.
func (p *rayPre) slab(i, j int) (tin, tout float64, lower, ok bool) {
	if p.level {
		return math.Inf(-1), math.Inf(1), false, p.o[2] >= planeZ(i) && p.o[2] <= planeZ(j)
	}
	if p.up {
		return p.tz[i], p.tz[j], true, true
	}
	return p.tz[j], p.tz[i], false, true
}

// cyl returns the parameter interval of the ray inside the infinite
// cylinder of radius r: t = (−b ∓ √(b² − a·c))/a, c = c0 − r². The entry
// root has no cancellation for rays that approach the axis (b < 0), which
// all hitting rays from outside do.
func (p *rayPre) cyl(r float64) (t0, t1 float64, ok bool) {
	c := p.c0 - r*r
	if p.a == 0 {
		return math.Inf(-1), math.Inf(1), c <= 0
	}
	disc := p.b*p.b - p.a*c
	if disc < 0 {
		return 0, 0, false
	}
	sq := math.Sqrt(disc)
	return (-p.b - sq) * p.invA, (-p.b + sq) * p.invA, true
}

// cylinderEntry intersects the solid cylinder of radius r between the
// planes i and i+1: entry = max of the slab's and the side's entries,
// exit = min of their exits, a hit when entry ≤ exit and entry > 0.
func (p *rayPre) cylinderEntry(r float64, i int, side, bottom, top int) (float64, int) {
	tin, tout, lower, ok := p.slab(i, i+1)
	if !ok {
		return 0, faceNone
	}
	face := top
	if lower {
		face = bottom
	}
	c0, c1, ok := p.cyl(r)
	if !ok {
		return 0, faceNone
	}
	if c0 > tin {
		tin, face = c0, side
	}
	tout = fmin(tout, c1)
	if tin > tout || tin <= 0 || math.IsInf(tin, 0) {
		return 0, faceNone
	}
	return tin, face
}

// hexEntry intersects the collar, the convex prism {n_k·(x,y) ≤ AF/2,
// CollarZ0 ≤ z ≤ CollarZ1}, by the same rule with its eight planes.
func (p *rayPre) hexEntry() (float64, int) {
	tin, tout, lower, ok := p.slab(1, 2)
	if !ok {
		return 0, faceNone
	}
	face := faceCollarTop
	if lower {
		face = faceCollarBottom
	}
	o, d := &p.o, &p.d
	// Flat normals n0 = (1, 0), n1 = (1/2, √3/2), n2 = (−1/2, √3/2);
	// opposite flats share them up to sign, n_{k+3} = −n_k.
	const s3 = sqrt3 / 2
	dens := [3]float64{d[0], 0.5*d[0] + s3*d[1], -0.5*d[0] + s3*d[1]}
	pos := [3]float64{o[0], 0.5*o[0] + s3*o[1], -0.5*o[0] + s3*o[1]}
	for k := 0; k < 3; k++ {
		den, po := dens[k], pos[k]
		if den == 0 {
			if po > apothem || -po > apothem {
				return 0, faceNone
			}
			continue
		}
		// Plane k: n·(o+td) = h → t = (h − n·o)/den; plane k+3: (−h − n·o)/den.
		inv := 1 / den
		ta := (apothem - po) * inv
		tb := (-apothem - po) * inv
		fa := faceCollarFlat0 + k
		if ta > tb {
			ta, tb = tb, ta
			fa += 3
		}
		if ta > tin {
			tin, face = ta, fa
		}
		tout = fmin(tout, tb)
	}
	if tin > tout || tin <= 0 || math.IsInf(tin, 0) {
		return 0, faceNone
	}
	return tin, face
}

// intersectPart returns the nearest hit of the ray o + t·d (t > 0, o
// outside the part) with the part and the face hit, or faceNone.
func intersectPart(o, d vec3) (float64, int) {
	p := newRayPre(o, d)
	// Bounding cylinder (the collar's circumcircle, whole height) first:
	// most background rays stop here.
	b0, b1, ok := p.cyl(CollarCornerRadiusMM)
	if !ok {
		return 0, faceNone
	}
	s0, s1, _, ok := p.slab(0, 3)
	if !ok || fmax(b0, s0) > fmin(b1, s1) || fmin(b1, s1) <= 0 {
		return 0, faceNone
	}
	best, face := math.Inf(1), faceNone
	if t, f := p.cylinderEntry(LowerShaftRadiusMM, 0, faceLowerSide, faceLowerBottom, faceLowerTop); f != faceNone {
		best, face = t, f
	}
	// The collar only if the ray meets its circumscribed cylinder.
	if c0, c1, _, ok := p.slab(1, 2); ok && fmax(b0, c0) <= fmin(b1, c1) && fmax(b0, c0) < best {
		if t, f := p.hexEntry(); f != faceNone && t < best {
			best, face = t, f
		}
	}
	if t, f := p.cylinderEntry(UpperShaftRadiusMM, 2, faceUpperSide, faceUpperBottom, faceUpperTop); f != faceNone && t < best {
		best, face = t, f
	}
	return best, face
}

// fmin and fmax are math.Min and math.Max without the NaN and ±0 rules
// (which the ray tests never meet), cheap enough to inline.
func fmin(a, b float64) float64 {
	if a < b {
		return a
	}
	return b
}

func fmax(a, b float64) float64 {
	if a > b {
		return a
	}
	return b
}

// faceNormal returns the outward unit normal of face at the surface point X.
func faceNormal(face int, X vec3) vec3 {
	switch face {
	case faceLowerSide, faceUpperSide:
		h := math.Hypot(X[0], X[1])
		if h == 0 {
			return vec3{1, 0, 0}
		}
		return vec3{X[0] / h, X[1] / h, 0}
	case faceLowerBottom, faceCollarBottom, faceUpperBottom:
		return vec3{0, 0, -1}
	case faceLowerTop, faceCollarTop, faceUpperTop:
		return vec3{0, 0, 1}
	case faceCollarFlat0, faceCollarFlat1, faceCollarFlat2, faceCollarFlat3, faceCollarFlat4, faceCollarFlat5:
		n := hexNormal(face - faceCollarFlat0)
		return vec3{n[0], n[1], 0}
	}
	panic(fmt.Sprintf("synth: internal error: no normal for face %d", face))
}

// insideHex reports whether (x, y) is inside the collar's hexagon, within tol.
func insideHex(x, y, tol float64) bool {
	for k := 0; k < 3; k++ {
		n := hexNormal(k)
		p := n[0]*x + n[1]*y
		if p > apothem+tol || -p > apothem+tol {
			return false
		}
	}
	return true
}

// surfaceTolMM is how far from the exposed surface a point may be and
// still count as on it (SurfaceNormal, Visible): far above the rounding of
// points computed in float64 (≈1e-14 mm), far below anything visible.
const surfaceTolMM = 1e-6

// surfaceFaces lists in out the exposed faces X lies on (within
// surfaceTolMM): one inside a face, two on an edge, three at a collar
// corner. It returns their number.
func surfaceFaces(X vec3, out *[4]int) int {
	const tol = surfaceTolMM
	x, y, z := X[0], X[1], X[2]
	r := math.Hypot(x, y)
	n := 0
	add := func(f int) {
		if n < len(out) {
			out[n] = f
			n++
		}
	}
	if math.Abs(r-LowerShaftRadiusMM) <= tol && z >= -tol && z <= CollarZ0MM+tol {
		add(faceLowerSide)
	}
	if math.Abs(z) <= tol && r <= LowerShaftRadiusMM+tol {
		add(faceLowerBottom)
	}
	if z >= CollarZ0MM-tol && z <= CollarZ1MM+tol && insideHex(x, y, tol) {
		for k := 0; k < 6; k++ {
			if hn := hexNormal(k); math.Abs(hn[0]*x+hn[1]*y-apothem) <= tol {
				add(faceCollarFlat0 + k)
			}
		}
		if math.Abs(z-CollarZ0MM) <= tol && r >= LowerShaftRadiusMM-tol {
			add(faceCollarBottom)
		}
		if math.Abs(z-CollarZ1MM) <= tol && r >= UpperShaftRadiusMM-tol {
			add(faceCollarTop)
		}
	}
	if math.Abs(r-UpperShaftRadiusMM) <= tol && z >= CollarZ1MM-tol && z <= PartHeightMM+tol {
		add(faceUpperSide)
	}
	if math.Abs(z-PartHeightMM) <= tol && r <= UpperShaftRadiusMM+tol {
		add(faceUpperTop)
	}
	return n
}

// surfaceFace returns the first exposed face X lies on, or faceNone.
func surfaceFace(X vec3) int {
	var fs [4]int
	if surfaceFaces(X, &fs) == 0 {
		return faceNone
	}
	return fs[0]
}

// SurfaceNormal returns the outward unit normal of the part's surface at X
// (part coordinates, mm) and ok = false when X is not on the exposed
// surface (within 1e-6 mm). On an edge, one of the adjacent faces' normals.
func (s *Scene) SurfaceNormal(X [3]float64) (n [3]float64, ok bool) {
	f := surfaceFace(X)
	if f == faceNone {
		return n, false
	}
	return faceNormal(f, X), true
}

// BoundingBox returns the part's axis-aligned bounding box in part
// coordinates (mm): x ∈ ±AF/2 (flats at azimuth 0° and 180°), y ∈ ±AF/√3
// (corners at 90° and 270°), z ∈ [0, PartHeightMM].
func (s *Scene) BoundingBox() (min, max [3]float64) {
	return [3]float64{-apothem, -CollarCornerRadiusMM, 0}, [3]float64{apothem, CollarCornerRadiusMM, PartHeightMM}
}

// Diagonal returns the length of the bounding box's diagonal in mm.
func (s *Scene) Diagonal() float64 {
	lo, hi := s.BoundingBox()
	return norm(vec3{hi[0] - lo[0], hi[1] - lo[1], hi[2] - lo[2]})
}

// hexCorner returns the k-th corner (azimuth 30°+60°k) at height z.
func hexCorner(k int, z float64) vec3 {
	a := (30 + 60*float64(k%6)) * math.Pi / 180
	return vec3{CollarCornerRadiusMM * math.Cos(a), CollarCornerRadiusMM * math.Sin(a), z}
}

// Landmarks returns named, exactly known points of the part (mm, part
// coordinates), all on its surface:
//
//	"collar-top-0" … "collar-top-5"        collar corners on the top face (z = 40),
//	"collar-bottom-0" … "collar-bottom-5"  the corners below them (z = 30),
//	"base-centre", "top-centre"            the axis' ends (z = 0 and z = 65).
//
// Corner k lies at azimuth 30°+60°k on the radius AF/√3 = 40/√3; adjacent
// corners are 40/√3 ≈ 23.094 mm apart, opposite ones 2·40/√3 ≈ 46.188 mm,
// a top corner and the bottom one below it 10 mm, the axis' ends 65 mm.
func (s *Scene) Landmarks() map[string][3]float64 {
	m := make(map[string][3]float64, 14)
	for k := 0; k < 6; k++ {
		m[fmt.Sprintf("collar-top-%d", k)] = hexCorner(k, CollarZ1MM)
		m[fmt.Sprintf("collar-bottom-%d", k)] = hexCorner(k, CollarZ0MM)
	}
	m["base-centre"] = [3]float64{0, 0, 0}
	m["top-centre"] = [3]float64{0, 0, PartHeightMM}
	return m
}

// surfacePiece is one exposed face of the part for area-weighted sampling.
type surfacePiece struct {
	area   float64
	sample func(r *rand.Rand) vec3
}

func surfacePieces() []surfacePiece {
	hexArea := sqrt3 / 2 * CollarAcrossFlatsMM * CollarAcrossFlatsMM // (√3/2)·AF²
	side := CollarCornerRadiusMM                                     // hexagon side = circumradius
	cyl := func(r, z0, z1 float64) func(*rand.Rand) vec3 {
		return func(g *rand.Rand) vec3 {
			a := 2 * math.Pi * g.Float64()
			return vec3{r * math.Cos(a), r * math.Sin(a), z0 + (z1-z0)*g.Float64()}
		}
	}
	disc := func(r, z float64) func(*rand.Rand) vec3 {
		return func(g *rand.Rand) vec3 {
			a := 2 * math.Pi * g.Float64()
			rr := r * math.Sqrt(g.Float64()) // uniform on the disc
			return vec3{rr * math.Cos(a), rr * math.Sin(a), z}
		}
	}
	annulus := func(rin, z float64) func(*rand.Rand) vec3 {
		return func(g *rand.Rand) vec3 {
			for { // rejection from the hexagon's bounding square
				x := (2*g.Float64() - 1) * CollarCornerRadiusMM
				y := (2*g.Float64() - 1) * CollarCornerRadiusMM
				if insideHex(x, y, 0) && math.Hypot(x, y) >= rin {
					return vec3{x, y, z}
				}
			}
		}
	}
	ps := []surfacePiece{
		{2 * math.Pi * LowerShaftRadiusMM * LowerShaftLengthMM, cyl(LowerShaftRadiusMM, 0, CollarZ0MM)},
		{math.Pi * LowerShaftRadiusMM * LowerShaftRadiusMM, disc(LowerShaftRadiusMM, 0)},
		{hexArea - math.Pi*LowerShaftRadiusMM*LowerShaftRadiusMM, annulus(LowerShaftRadiusMM, CollarZ0MM)},
		{hexArea - math.Pi*UpperShaftRadiusMM*UpperShaftRadiusMM, annulus(UpperShaftRadiusMM, CollarZ1MM)},
		{2 * math.Pi * UpperShaftRadiusMM * UpperShaftLengthMM, cyl(UpperShaftRadiusMM, CollarZ1MM, PartHeightMM)},
		{math.Pi * UpperShaftRadiusMM * UpperShaftRadiusMM, disc(UpperShaftRadiusMM, PartHeightMM)},
	}
	for k := 0; k < 6; k++ {
		a, b := hexCorner(k+5, 0), hexCorner(k, 0) // corners at 60k−30° and 60k+30°
		ps = append(ps, surfacePiece{side * CollarThicknessMM, func(g *rand.Rand) vec3 {
			u := g.Float64()
			return vec3{a[0] + u*(b[0]-a[0]), a[1] + u*(b[1]-a[1]), CollarZ0MM + CollarThicknessMM*g.Float64()}
		}})
	}
	return ps
}

// SurfacePoints returns n points drawn uniformly (by area) from the part's
// exposed surface, from a generator seeded with seed (PCG, math/rand/v2:
// the same seed gives the same points on every platform).
func (s *Scene) SurfacePoints(n int, seed int64) [][3]float64 {
	if n < 0 {
		panic(fmt.Sprintf("synth: SurfacePoints: negative count %d", n))
	}
	g := rand.New(rand.NewPCG(uint64(seed), 0x5eed5eed5eed5eed))
	ps := surfacePieces()
	total := 0.0
	for _, p := range ps {
		total += p.area
	}
	out := make([][3]float64, n)
	for i := range out {
		u := g.Float64() * total
		j := 0
		for j < len(ps)-1 && u >= ps[j].area {
			u -= ps[j].area
			j++
		}
		out[i] = ps[j].sample(g)
	}
	return out
}
