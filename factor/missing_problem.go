package factor

// The missing-data problem: observations in normalised coordinates, stored
// by point (CSR) and by frame, and small dense helpers shared by the
// solvers.

import (
	"math"
	"sync"
)

// incNorm maps pixels to normalised coordinates: (x − cx)/scale.
type incNorm struct{ cx, cy, scale float64 }

// incProblem holds the observations of a missing-data problem in
// normalised coordinates, by point (CSR, frames ascending) and by frame.
type incProblem struct {
	nf, np         int
	frames, points []int // positions in the Measurements
	norm           incNorm
	pStart         []int // observations of point p: pStart[p] ≤ k < pStart[p+1]
	frame, obsPt   []int // frame and point of observation k
	obsX, obsY     []float64
	wt             []float64 // weight of observation k (1 least squares, 0 rejected)
	fStart, fObs   []int     // observations of frame f: fObs[fStart[f]:fStart[f+1]]
}

// newIncProblem collects the observed entries of the given frames and
// points (nil: all). The normalisation is computed when norm is nil.
func newIncProblem(m *Measurements, frames, points []int, norm *incNorm) *incProblem {
	nfAll, npAll := m.Dims()
	if frames == nil {
		frames = make([]int, nfAll)
		for i := range frames {
			frames[i] = i
		}
	}
	if points == nil {
		points = make([]int, npAll)
		for i := range points {
			points[i] = i
		}
	}
	pr := &incProblem{nf: len(frames), np: len(points), frames: frames, points: points}
	pr.pStart = make([]int, pr.np+1)
	for j, p := range points {
		n := 0
		for _, f := range frames {
			if m.Observed(f, p) {
				n++
			}
		}
		pr.pStart[j+1] = pr.pStart[j] + n
	}
	nobs := pr.pStart[pr.np]
	pr.frame = make([]int, nobs)
	pr.obsPt = make([]int, nobs)
	pr.obsX = make([]float64, nobs)
	pr.obsY = make([]float64, nobs)
	pr.wt = make([]float64, nobs)
	k := 0
	for j, p := range points {
		for i, f := range frames {
			if m.Observed(f, p) {
				pr.frame[k], pr.obsPt[k] = i, j
				pr.obsX[k], pr.obsY[k] = m.W.At(2*f, p), m.W.At(2*f+1, p)
				pr.wt[k] = 1
				k++
			}
		}
	}
	if norm == nil {
		var sx, sy float64
		for k := range pr.obsX {
			sx += pr.obsX[k]
			sy += pr.obsY[k]
		}
		nn := math.Max(1, float64(nobs))
		n := incNorm{cx: sx / nn, cy: sy / nn}
		ss := 0.0
		for k := range pr.obsX {
			dx, dy := pr.obsX[k]-n.cx, pr.obsY[k]-n.cy
			ss += dx*dx + dy*dy
		}
		n.scale = math.Sqrt(ss / (2 * nn))
		if !(n.scale > 0) {
			n.scale = 1
		}
		norm = &n
	}
	pr.norm = *norm
	for k := range pr.obsX {
		pr.obsX[k] = (pr.obsX[k] - pr.norm.cx) / pr.norm.scale
		pr.obsY[k] = (pr.obsY[k] - pr.norm.cy) / pr.norm.scale
	}
	pr.fStart = make([]int, pr.nf+1)
	for _, f := range pr.frame {
		pr.fStart[f+1]++
	}
	for f := 0; f < pr.nf; f++ {
		pr.fStart[f+1] += pr.fStart[f]
	}
	pr.fObs = make([]int, nobs)
	fill := append([]int(nil), pr.fStart[:pr.nf]...)
	for k, f := range pr.frame {
		pr.fObs[fill[f]] = k
		fill[f]++
	}
	return pr
}

// gaugeC is the constant c of the normal form MᵀM = cI: 2F/3, the value
// true rotation rows give on average.
func (pr *incProblem) gaugeC() float64 { return 2 * float64(pr.nf) / 3 }

func (pr *incProblem) inlierCount() int {
	n := 0
	for _, w := range pr.wt {
		if w > 0 {
			n++
		}
	}
	return n
}

// chunks splits the points into at most threads contiguous ranges of about
// equal work (a point with n observations costs ~n² in the normal
// equations).
func (pr *incProblem) chunks(threads int) []int {
	threads = max(1, min(threads, pr.np))
	total := 0.0
	for p := 0; p < pr.np; p++ {
		n := float64(pr.pStart[p+1] - pr.pStart[p])
		total += n*n + 4
	}
	b := []int{0}
	acc := 0.0
	for p := 0; p < pr.np && len(b) < threads; p++ {
		n := float64(pr.pStart[p+1] - pr.pStart[p])
		acc += n*n + 4
		if acc >= total*float64(len(b))/float64(threads) {
			b = append(b, p+1)
		}
	}
	if b[len(b)-1] != pr.np {
		b = append(b, pr.np)
	}
	return b
}

// incFrameChunks splits the frames into at most threads contiguous ranges.
func incFrameChunks(nf, threads int) []int {
	threads = max(1, min(threads, nf))
	b := make([]int, threads+1)
	for i := range b {
		b[i] = i * nf / threads
	}
	return b
}

// incParallel runs fn on every range [b[c], b[c+1]); range 0 on the
// calling goroutine.
func incParallel(b []int, fn func(c, lo, hi int)) {
	if len(b) <= 2 {
		if len(b) == 2 {
			fn(0, b[0], b[1])
		}
		return
	}
	var wg sync.WaitGroup
	for c := 1; c+1 < len(b); c++ {
		wg.Add(1)
		go func(c int) {
			defer wg.Done()
			fn(c, b[c], b[c+1])
		}(c)
	}
	fn(0, b[0], b[1])
	wg.Wait()
}

// incChol3 factors the packed symmetric c = (c00, c01, c02, c11, c12, c22)
// as LLᵀ with l = (l00, l10, l11, l20, l21, l22).
func incChol3(c [6]float64) (l [6]float64, ok bool) {
	if !(c[0] > 0) {
		return l, false
	}
	l[0] = math.Sqrt(c[0])
	l[1] = c[1] / l[0]
	d := c[3] - l[1]*l[1]
	if !(d > 1e-14*c[3]) {
		return l, false
	}
	l[2] = math.Sqrt(d)
	l[3] = c[2] / l[0]
	l[4] = (c[4] - l[3]*l[1]) / l[2]
	d = c[5] - l[3]*l[3] - l[4]*l[4]
	if !(d > 1e-14*c[5]) {
		return l, false
	}
	l[5] = math.Sqrt(d)
	return l, true
}

// incFwd3 solves L y = b.
func incFwd3(l [6]float64, b0, b1, b2 float64) (y0, y1, y2 float64) {
	y0 = b0 / l[0]
	y1 = (b1 - l[1]*y0) / l[2]
	y2 = (b2 - l[3]*y0 - l[4]*y1) / l[5]
	return
}

// incBwd3 solves Lᵀ x = y.
func incBwd3(l [6]float64, y0, y1, y2 float64) (x0, x1, x2 float64) {
	x2 = y2 / l[5]
	x1 = (y1 - l[4]*x2) / l[2]
	x0 = (y0 - l[1]*x1 - l[3]*x2) / l[0]
	return
}

// residualNorms returns the 2D residual length of every observation
// (rejected ones included) at the cameras u and points X.
func (pr *incProblem) residualNorms(u, X, buf []float64) []float64 {
	if cap(buf) < len(pr.wt) {
		buf = make([]float64, len(pr.wt))
	}
	buf = buf[:len(pr.wt)]
	for k := range pr.wt {
		x := X[3*pr.obsPt[k] : 3*pr.obsPt[k]+3]
		U := u[8*pr.frame[k] : 8*pr.frame[k]+8]
		ex := pr.obsX[k] - (U[0]*x[0] + U[1]*x[1] + U[2]*x[2] + U[3])
		ey := pr.obsY[k] - (U[4]*x[0] + U[5]*x[1] + U[6]*x[2] + U[7])
		buf[k] = math.Hypot(ex, ey)
	}
	return buf
}

// inlierSS is the unweighted sum of squared residuals over the
// observations with weight > 0, normalised units.
func (pr *incProblem) inlierSS(u, X []float64) float64 {
	s := 0.0
	for k, w := range pr.wt {
		if w == 0 {
			continue
		}
		x := X[3*pr.obsPt[k] : 3*pr.obsPt[k]+3]
		U := u[8*pr.frame[k] : 8*pr.frame[k]+8]
		ex := pr.obsX[k] - (U[0]*x[0] + U[1]*x[1] + U[2]*x[2] + U[3])
		ey := pr.obsY[k] - (U[4]*x[0] + U[5]*x[1] + U[6]*x[2] + U[7])
		s += ex*ex + ey*ey
	}
	return s
}

// cost3 is the reduced cost f(U) of rank-3 cameras u; X receives the
// eliminated points.
func (pr *incProblem) cost3(u, X []float64, threads int) float64 {
	d := incDim(3)
	b := pr.chunks(threads)
	sc := make([]*incScratch, len(b)-1)
	mo := pr.maxObs()
	for i := range sc {
		sc[i] = newIncScratch(d, mo)
	}
	return pr.evalCost(u, X, d, b, sc)
}

// costFloor is the cost below which a fit is exact to rounding: 1e-24 per
// observed coordinate in normalised units (residuals of ~1e-12 of the
// image spread). Costs below it count as zero when runs are compared and
// stop a run as converged.
func (pr *incProblem) costFloor() float64 { return 1e-24 * float64(2*len(pr.wt)) }
