package synth

import "math"

// mix64 is the splitmix64 finaliser (Steele, Lea & Flood 2014, "Fast
// splittable pseudorandom number generators"): a bijective avalanche of
// 64 bits, used as a stateless hash so every sample and every pixel's noise
// is a pure function of its coordinates (deterministic in parallel).
func mix64(z uint64) uint64 {
	z ^= z >> 30
	z *= 0xbf58476d1ce4e5b9
	z ^= z >> 27
	z *= 0x94d049bb133111eb
	z ^= z >> 31
	return z
}

// Odd multipliers that spread lattice coordinates before mix64 (the golden
// ratio constant of splitmix64 and two of xxHash's primes).
const (
	hk1 = 0x9E3779B97F4A7C15
	hk2 = 0xC2B2AE3D27D4EB4F
	hk3 = 0x165667B19E3779F9
)

// Salts that derive independent streams from the scene seed.
const (
	saltTexture  = 0x7465787475726531 // part texture cells
	saltSmooth   = 0x736d6f6f74686e31 // part smooth noise
	saltBackdrop = 0x6261636b64726f70 // backdrop cells
	saltNoise    = 0x696d6167656e6f69 // image noise
)

func hash3(seed uint64, i, j, k int64) uint64 {
	return mix64(seed + uint64(i)*hk1 + uint64(j)*hk2 + uint64(k)*hk3)
}

// unit16 maps 16 bits of h (starting at bit shift) to [0, 1).
func unit16(h uint64, shift uint) float64 {
	return float64((h>>shift)&0xffff) * (1.0 / 65536)
}

// Texture constants.
const (
	// voronoiJitter is the span of a seed's position inside its cell:
	// along each axis the seed lies in [0.05, 0.95] of the cell. The
	// nearest seed is searched among the 3×3×3 cells around the point
	// (Worley's scheme); a nearer seed two cells away is possible only in
	// rare configurations, and since the search is deterministic such a
	// miss changes the pattern, never its consistency between frames.
	voronoiJitter = 0.9
	jitterLo      = 0.5 - voronoiJitter/2 // 0.05

	partGreyLo   = 0.18 // albedo range of the part's cells
	partGreyHi   = 0.95
	partTint     = 0.14 // ± relative tint of red and blue per cell
	smoothAmp    = 0.07 // ± relative amplitude of the smooth noise
	smoothCellMM = 7.0  // lattice size of the smooth noise

	backdropCellMM = 6.0
	backdropGreyLo = 0.08
	backdropGreyHi = 0.42
)

// partTexture is the part's solid texture.
type partTexture struct {
	seed, smoothSeed uint64
	inv, smoothInv   float64 // 1/cell size
}

func newPartTexture(seed int64, cellMM float64) partTexture {
	return partTexture{
		seed:       mix64(uint64(seed) ^ saltTexture),
		smoothSeed: mix64(uint64(seed) ^ saltSmooth),
		inv:        1 / cellMM,
		smoothInv:  1 / smoothCellMM,
	}
}

// lowerBound2 returns, for a coordinate fraction f ∈ [0,1) in its cell,
// the squared lower bounds of the distance to a seed in the cell below
// (−1), the own cell (0) and the cell above (+1).
func lowerBound2(f float64) [3]float64 {
	a := f + jitterLo
	b := 1 + jitterLo - f
	return [3]float64{a * a, 0, b * b}
}

// voronoi3 returns the hash of the cell whose seed is nearest to p
// (in cell units) among the 27 cells around p (Worley 1996).
func voronoi3(seed uint64, px, py, pz float64) uint64 {
	fx0, fy0, fz0 := math.Floor(px), math.Floor(py), math.Floor(pz)
	ix, iy, iz := int64(fx0), int64(fy0), int64(fz0)
	fx, fy, fz := px-fx0, py-fy0, pz-fz0
	lx, ly, lz := lowerBound2(fx), lowerBound2(fy), lowerBound2(fz)
	best := math.Inf(1)
	var bestH uint64
	// Own cell first, so the lower bounds prune most neighbours unhashed.
	order := [3]int64{0, -1, 1}
	for _, dk := range order {
		bz := lz[dk+1]
		if bz >= best {
			continue
		}
		for _, dj := range order {
			by := bz + ly[dj+1]
			if by >= best {
				continue
			}
			for _, di := range order {
				if by+lx[di+1] >= best {
					continue
				}
				h := hash3(seed, ix+di, iy+dj, iz+dk)
				sx := float64(di) + jitterLo + voronoiJitter*unit16(h, 0) - fx
				sy := float64(dj) + jitterLo + voronoiJitter*unit16(h, 16) - fy
				sz := float64(dk) + jitterLo + voronoiJitter*unit16(h, 32) - fz
				if d2 := sx*sx + sy*sy + sz*sz; d2 < best {
					best, bestH = d2, h
				}
			}
		}
	}
	return bestH
}

// voronoi2 is voronoi3 in the plane.
func voronoi2(seed uint64, px, py float64) uint64 {
	fx0, fy0 := math.Floor(px), math.Floor(py)
	ix, iy := int64(fx0), int64(fy0)
	fx, fy := px-fx0, py-fy0
	lx, ly := lowerBound2(fx), lowerBound2(fy)
	best := math.Inf(1)
	var bestH uint64
	order := [3]int64{0, -1, 1}
	for _, dj := range order {
		by := ly[dj+1]
		if by >= best {
			continue
		}
		for _, di := range order {
			if by+lx[di+1] >= best {
				continue
			}
			h := hash3(seed, ix+di, iy+dj, 0)
			sx := float64(di) + jitterLo + voronoiJitter*unit16(h, 0) - fx
			sy := float64(dj) + jitterLo + voronoiJitter*unit16(h, 16) - fy
			if d2 := sx*sx + sy*sy; d2 < best {
				best, bestH = d2, h
			}
		}
	}
	return bestH
}

// smoothstep is 3t² − 2t³, the C¹ interpolant of value noise.
func smoothstep(t float64) float64 { return t * t * (3 - 2*t) }

// lattice returns the lattice value at (i, j, k) in [−1, 1).
func lattice(seed uint64, i, j, k int64) float64 {
	return float64(hash3(seed, i, j, k)>>11)*(2.0/(1<<53)) - 1
}

// valueNoise3 is trilinearly (smoothstep-weighted) interpolated lattice
// noise in [−1, 1] (Perlin 1985 "value noise" variant, common practice).
func valueNoise3(seed uint64, px, py, pz float64) float64 {
	fx0, fy0, fz0 := math.Floor(px), math.Floor(py), math.Floor(pz)
	ix, iy, iz := int64(fx0), int64(fy0), int64(fz0)
	u, v, w := smoothstep(px-fx0), smoothstep(py-fy0), smoothstep(pz-fz0)
	lerp := func(a, b, t float64) float64 { return a + (b-a)*t }
	c00 := lerp(lattice(seed, ix, iy, iz), lattice(seed, ix+1, iy, iz), u)
	c10 := lerp(lattice(seed, ix, iy+1, iz), lattice(seed, ix+1, iy+1, iz), u)
	c01 := lerp(lattice(seed, ix, iy, iz+1), lattice(seed, ix+1, iy, iz+1), u)
	c11 := lerp(lattice(seed, ix, iy+1, iz+1), lattice(seed, ix+1, iy+1, iz+1), u)
	return lerp(lerp(c00, c10, v), lerp(c01, c11, v), w)
}

// albedo returns the part's RGB reflectance at the part point X (mm).
func (t *partTexture) albedo(X vec3) (r, g, b float64) {
	h := voronoi3(t.seed, X[0]*t.inv, X[1]*t.inv, X[2]*t.inv)
	v := partGreyLo + (partGreyHi-partGreyLo)*unit16(h, 48)
	v *= 1 + smoothAmp*valueNoise3(t.smoothSeed, X[0]*t.smoothInv, X[1]*t.smoothInv, X[2]*t.smoothInv)
	h2 := mix64(h ^ saltTexture)
	// Machined-steel base tint (slightly warm), per-cell red/blue shift.
	r = v * (1 + partTint*(unit16(h2, 0)-0.5))
	g = v * 0.98
	b = v * 0.94 * (1 + partTint*(unit16(h2, 16)-0.5))
	return r, g, b
}

// backdropAlbedo returns the backdrop's reflectance at plane coordinates
// (u, w) in mm: coarse, darker, bluish cells.
func backdropAlbedo(seed uint64, u, w float64) (r, g, b float64) {
	h := voronoi2(seed, u*(1/backdropCellMM), w*(1/backdropCellMM))
	v := backdropGreyLo + (backdropGreyHi-backdropGreyLo)*unit16(h, 48)
	return v * 0.80, v * 0.90, v
}
