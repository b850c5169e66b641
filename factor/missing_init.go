package factor

// Initialisation of the missing-data problem.
//
// 1. The largest well-conditioned complete block: greedy growth from seed
//    frames (add the frame that keeps the most common tracks; on a banded,
//    turntable-like pattern this walks along the band), scored by the
//    number of entries k·n; candidates are checked in that order until one
//    is well conditioned: σ₃ ≥ 3σ₄ of the centred block (the structure
//    rises above the noise) and σ₃ ≥ 1e-6 σ₁.
// 2. The block is factorised in closed form: rows centred, rank-3 SVD,
//    M̂ = U₃Σ₃^½, Ŝ = Σ₃^½V₃ᵀ, t = the row means (Tomasi and Kanade, IJCV
//    9(2), 1992).
// 3. Propagation (Tomasi and Kanade, CMU-CS-92-104, 1992, "filling in"
//    the missing entries from a complete block; cited from memory): new points are solved
//    from the known cameras that see them (≥ 2 frames, the 3×3 normal
//    matrix Σ M_fᵀM_f well conditioned), new cameras from the known points
//    they see (≥ 4 points not in a plane: U_f = [M_f t_f] from the centred
//    least-squares fit M_f = (Σ w̃ X̃ᵀ)(Σ X̃X̃ᵀ)⁻¹). Each round adds only the
//    cameras seeing at least half as many known points as the best
//    candidate, so the best-determined solves come first, and re-solves
//    the known points those cameras see.
// 4. Frames the propagation cannot reach (fewer than four known points,
//    possible on sparse random patterns) start from the camera of the
//    known frame they share most tracks with; the joint refinement and the
//    random restarts then settle them.

import (
	"fmt"
	"math"
	"sort"

	"gonum.org/v1/gonum/mat"
)

// incInit is the starting point found by propagation.
type incInit struct {
	u           []float64 // 8F cameras, normalised coordinates
	X           []float64 // 3P points
	blockFrames []int     // positions in the problem
	blockPoints []int
	blockValues []float64 // singular values of the centred block (normalised)
	rounds      int
	propagated  int // frames reached by propagation (block included)
	filled      int // frames started from a neighbour's camera
}

type incBlockCand struct {
	frames []int
	points incBits
	n      int
}

// incEig3 returns the eigenvalues of the packed symmetric 3×3 matrix
// c = (c00, c01, c02, c11, c12, c22), largest first, by the trigonometric
// closed form (Smith, Commun. ACM 4(4), 1961).
func incEig3(c [6]float64) [3]float64 {
	p1 := c[1]*c[1] + c[2]*c[2] + c[4]*c[4]
	q := (c[0] + c[3] + c[5]) / 3
	p2 := (c[0]-q)*(c[0]-q) + (c[3]-q)*(c[3]-q) + (c[5]-q)*(c[5]-q) + 2*p1
	if p2 == 0 {
		return [3]float64{q, q, q}
	}
	p := math.Sqrt(p2 / 6)
	b0, b3, b5 := (c[0]-q)/p, (c[3]-q)/p, (c[5]-q)/p
	b1, b2, b4 := c[1]/p, c[2]/p, c[4]/p
	r := (b0*(b3*b5-b4*b4) - b1*(b1*b5-b4*b2) + b2*(b1*b4-b3*b2)) / 2
	r = math.Max(-1, math.Min(1, r))
	phi := math.Acos(r) / 3
	e1 := q + 2*p*math.Cos(phi)
	e3 := q + 2*p*math.Cos(phi+2*math.Pi/3)
	return [3]float64{e1, 3*q - e1 - e3, e3}
}

func incWellConditioned(c [6]float64, rel float64) bool {
	e := incEig3(c)
	return e[0] > 0 && e[2] > rel*e[0]
}

// incFindBlock searches the largest well-conditioned complete block.
func incFindBlock(pr *incProblem) (frames, points []int, values []float64, err error) {
	fb := make([]incBits, pr.nf)
	for f := range fb {
		fb[f] = newIncBits(pr.np)
		for _, k := range pr.fObs[pr.fStart[f]:pr.fStart[f+1]] {
			fb[f].set(pr.obsPt[k])
		}
	}
	const minBlockPoints = 5 // the centred block then has rank ≥ 4, so σ₄ measures the noise
	seeds := make([]int, 0, pr.nf)
	if pr.nf <= 64 {
		for f := 0; f < pr.nf; f++ {
			seeds = append(seeds, f)
		}
	} else {
		for i := 0; i < 64; i++ {
			seeds = append(seeds, i*pr.nf/64)
		}
	}
	maxGrow := min(pr.nf, 40)
	var cands []incBlockCand
	for _, s := range seeds {
		set := append(incBits(nil), fb[s]...)
		fr := []int{s}
		in := make([]bool, pr.nf)
		in[s] = true
		for len(fr) < maxGrow {
			best, bestN := -1, -1
			for g := 0; g < pr.nf; g++ {
				if in[g] {
					continue
				}
				if n := incAndCount(set, fb[g]); n > bestN {
					best, bestN = g, n
				}
			}
			if best < 0 || bestN < minBlockPoints {
				break
			}
			set.andWith(fb[best])
			fr = append(fr, best)
			in[best] = true
			cands = append(cands, incBlockCand{frames: append([]int(nil), fr...), points: append(incBits(nil), set...), n: bestN})
		}
	}
	if len(cands) == 0 {
		return nil, nil, nil, fmt.Errorf("factor: %w: no two frames share %d tracks; the tracks are too short or the views unrelated", ErrDisconnected, minBlockPoints)
	}
	sort.SliceStable(cands, func(i, j int) bool {
		return len(cands[i].frames)*cands[i].n > len(cands[j].frames)*cands[j].n
	})
	bestQ := -1.0
	var bestF, bestP []int
	var bestV []float64
	tested := 0
	seen := map[string]bool{}
	for _, c := range cands {
		if tested >= 12 {
			break
		}
		fr := append([]int(nil), c.frames...)
		sort.Ints(fr)
		key := fmt.Sprint(fr)
		if seen[key] {
			continue
		}
		seen[key] = true
		tested++
		var pts []int
		for p := 0; p < pr.np; p++ {
			if c.points.has(p) {
				pts = append(pts, p)
			}
		}
		vals := incBlockSpectrum(pr, fr, pts)
		q := vals[2] / math.Max(vals[3], 1e-300)
		if vals[2] < 1e-6*vals[0] {
			q = 0
		}
		if q >= 3 {
			return fr, pts, vals, nil
		}
		if q > bestQ {
			bestQ, bestF, bestP, bestV = q, fr, pts, vals
		}
	}
	if bestQ <= 0 {
		return nil, nil, nil, fmt.Errorf("factor: %w: every complete block of frames and tracks is degenerate (σ₃ ≈ 0: planar points or no rotation)", ErrDisconnected)
	}
	return bestF, bestP, bestV, nil
}

// incBlockMatrix gathers the complete block (normalised coordinates).
func incBlockMatrix(pr *incProblem, frames, points []int) *mat.Dense {
	pos := make(map[int]int, len(frames))
	for i, f := range frames {
		pos[f] = i
	}
	B := mat.NewDense(2*len(frames), len(points), nil)
	for j, p := range points {
		for k := pr.pStart[p]; k < pr.pStart[p+1]; k++ {
			if i, ok := pos[pr.frame[k]]; ok {
				B.Set(2*i, j, pr.obsX[k])
				B.Set(2*i+1, j, pr.obsY[k])
			}
		}
	}
	return B
}

func incBlockSpectrum(pr *incProblem, frames, points []int) []float64 {
	wc, _ := centre(incBlockMatrix(pr, frames, points))
	var svd mat.SVD
	if !svd.Factorize(wc, mat.SVDNone) {
		return []float64{1, 0, 0, 0}
	}
	v := svd.Values(nil)
	for len(v) < 4 {
		v = append(v, 0)
	}
	return v
}

// incPropagate builds the starting cameras of the problem.
func incPropagate(pr *incProblem) (*incInit, error) {
	bf, bp, bv, err := incFindBlock(pr)
	if err != nil {
		return nil, err
	}
	res := &incInit{u: make([]float64, 8*pr.nf), X: make([]float64, 3*pr.np), blockFrames: bf, blockPoints: bp, blockValues: bv}
	wc, t := centre(incBlockMatrix(pr, bf, bp))
	r3, err := factorRank3(wc)
	if err != nil {
		return nil, err
	}
	knownF := make([]bool, pr.nf)
	knownP := make([]bool, pr.np)
	for i, f := range bf {
		for a := 0; a < 2; a++ {
			for j := 0; j < 3; j++ {
				res.u[8*f+4*a+j] = r3.M.At(2*i+a, j)
			}
			res.u[8*f+4*a+3] = t[2*i+a]
		}
		knownF[f] = true
	}
	for j, p := range bp {
		for a := 0; a < 3; a++ {
			res.X[3*p+a] = r3.S.At(a, j)
		}
		knownP[p] = true
	}
	res.propagated, res.rounds, res.filled = pr.propagate(res.u, res.X, knownF, knownP)
	return res, nil
}

// propagate extends known cameras and points to the whole problem (steps 3
// and 4 of the file comment). It returns the number of frames reached by
// propagation, the rounds it took and the number of frames filled in from
// a neighbour.
func (pr *incProblem) propagate(u, X []float64, knownF, knownP []bool) (propagated, rounds, filled int) {
	const relCond = 1e-6 // smallest eigenvalue ratio of a solve's normal matrix
	nKnownF := 0
	for _, k := range knownF {
		if k {
			nKnownF++
		}
	}
	for {
		// Points from known cameras.
		for p := 0; p < pr.np; p++ {
			if !knownP[p] && pr.solvePointKnown(p, u, X, knownF, relCond) {
				knownP[p] = true
			}
		}
		// Cameras from known points, best-determined first.
		counts := make([]int, pr.nf)
		best := 0
		for f := 0; f < pr.nf; f++ {
			if knownF[f] {
				continue
			}
			for _, k := range pr.fObs[pr.fStart[f]:pr.fStart[f+1]] {
				if knownP[pr.obsPt[k]] {
					counts[f]++
				}
			}
			best = max(best, counts[f])
		}
		thr := max(MinPoints, best/2)
		var added []int
		for f := 0; f < pr.nf; f++ {
			if !knownF[f] && counts[f] >= thr && pr.solveCameraKnown(f, u, X, knownP, relCond) {
				added = append(added, f)
			}
		}
		if len(added) == 0 {
			break
		}
		rounds++
		for _, f := range added {
			knownF[f] = true
		}
		nKnownF += len(added)
		// Re-solve the known points the new cameras see.
		touched := make([]bool, pr.np)
		for _, f := range added {
			for _, k := range pr.fObs[pr.fStart[f]:pr.fStart[f+1]] {
				touched[pr.obsPt[k]] = true
			}
		}
		for p := 0; p < pr.np; p++ {
			if touched[p] && knownP[p] {
				pr.solvePointKnown(p, u, X, knownF, relCond)
			}
		}
	}
	propagated = nKnownF
	// Frames out of reach start from the camera of the known frame they
	// share most tracks with (or the nearest known frame).
	if nKnownF < pr.nf {
		fb := make([]incBits, pr.nf)
		for f := range fb {
			fb[f] = newIncBits(pr.np)
			for _, k := range pr.fObs[pr.fStart[f]:pr.fStart[f+1]] {
				fb[f].set(pr.obsPt[k])
			}
		}
		for f := 0; f < pr.nf; f++ {
			if knownF[f] {
				continue
			}
			src, bestN, bestD := -1, -1, math.MaxInt
			for g := 0; g < pr.nf; g++ {
				if !knownF[g] {
					continue
				}
				n := incAndCount(fb[f], fb[g])
				d := incAbs(f - g)
				if n > bestN || (n == bestN && d < bestD) {
					src, bestN, bestD = g, n, d
				}
			}
			copy(u[8*f:8*f+8], u[8*src:8*src+8])
			filled++
		}
	}
	return propagated, rounds, filled
}

func incAbs(i int) int {
	if i < 0 {
		return -i
	}
	return i
}

// solvePointKnown solves X_p from the known cameras that observe p; it
// reports false when fewer than two do or the normal matrix is ill
// conditioned.
func (pr *incProblem) solvePointKnown(p int, u, X []float64, knownF []bool, rel float64) bool {
	var c [6]float64
	var b [3]float64
	n := 0
	for k := pr.pStart[p]; k < pr.pStart[p+1]; k++ {
		f := pr.frame[k]
		if !knownF[f] {
			continue
		}
		n++
		U := u[8*f : 8*f+8]
		rx, ry := pr.obsX[k]-U[3], pr.obsY[k]-U[7]
		b[0] += U[0]*rx + U[4]*ry
		b[1] += U[1]*rx + U[5]*ry
		b[2] += U[2]*rx + U[6]*ry
		c[0] += U[0]*U[0] + U[4]*U[4]
		c[1] += U[0]*U[1] + U[4]*U[5]
		c[2] += U[0]*U[2] + U[4]*U[6]
		c[3] += U[1]*U[1] + U[5]*U[5]
		c[4] += U[1]*U[2] + U[5]*U[6]
		c[5] += U[2]*U[2] + U[6]*U[6]
	}
	if n < 2 || !incWellConditioned(c, rel) {
		return false
	}
	l, ok := incChol3(c)
	if !ok {
		return false
	}
	y0, y1, y2 := incFwd3(l, b[0], b[1], b[2])
	X[3*p], X[3*p+1], X[3*p+2] = incBwd3(l, y0, y1, y2)
	return true
}

// solveCameraKnown solves U_f from the known points frame f observes; it
// reports false when fewer than MinPoints do or they are nearly coplanar.
func (pr *incProblem) solveCameraKnown(f int, u, X []float64, knownP []bool, rel float64) bool {
	obs := pr.fObs[pr.fStart[f]:pr.fStart[f+1]]
	var mx [3]float64
	var mw [2]float64
	n := 0
	for _, k := range obs {
		p := pr.obsPt[k]
		if !knownP[p] {
			continue
		}
		n++
		for a := 0; a < 3; a++ {
			mx[a] += X[3*p+a]
		}
		mw[0] += pr.obsX[k]
		mw[1] += pr.obsY[k]
	}
	if n < MinPoints {
		return false
	}
	for a := range mx {
		mx[a] /= float64(n)
	}
	mw[0] /= float64(n)
	mw[1] /= float64(n)
	var g [6]float64
	var cm [2][3]float64
	for _, k := range obs {
		p := pr.obsPt[k]
		if !knownP[p] {
			continue
		}
		d := [3]float64{X[3*p] - mx[0], X[3*p+1] - mx[1], X[3*p+2] - mx[2]}
		wx, wy := pr.obsX[k]-mw[0], pr.obsY[k]-mw[1]
		g[0] += d[0] * d[0]
		g[1] += d[0] * d[1]
		g[2] += d[0] * d[2]
		g[3] += d[1] * d[1]
		g[4] += d[1] * d[2]
		g[5] += d[2] * d[2]
		for a := 0; a < 3; a++ {
			cm[0][a] += wx * d[a]
			cm[1][a] += wy * d[a]
		}
	}
	if !incWellConditioned(g, rel) {
		return false
	}
	l, ok := incChol3(g)
	if !ok {
		return false
	}
	for a := 0; a < 2; a++ {
		// M_f row a = G⁻¹ cm_a (G symmetric).
		y0, y1, y2 := incFwd3(l, cm[a][0], cm[a][1], cm[a][2])
		m0, m1, m2 := incBwd3(l, y0, y1, y2)
		U := u[8*f+4*a : 8*f+4*a+4]
		U[0], U[1], U[2] = m0, m1, m2
		U[3] = mw[a] - (m0*mx[0] + m1*mx[1] + m2*mx[2])
	}
	return true
}
