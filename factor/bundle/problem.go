package bundle

import (
	"fmt"
	"math"
	"sync"

	"trackfactor/factor"
)

// problem is the least-squares problem: observations grouped by point
// (cameras ascending within a point), the free points and the camera
// model.
type problem struct {
	nf    int          // cameras
	start []int        // observations of point j: start[j] … start[j+1]−1
	cam   []int32      // camera of each observation
	uv    [][2]float64 // measured pixel of each observation
	ref   int          // reference (gauge) point
	loss  lossFn
	// chunks split the points into per-thread ranges of similar work.
	chunks []int
}

func (p *problem) np() int   { return len(p.start) - 1 }
func (p *problem) nobs() int { return len(p.cam) }

// lossFn evaluates ρ(s) and ρ'(s) of a squared residual length s.
type lossFn struct {
	kind Loss
	c2   float64 // scale²
}

// eval returns ρ(s) and the weight ρ'(s) (see Loss for the formulas).
func (l lossFn) eval(s float64) (rho, w float64) {
	switch l.kind {
	case Huber:
		if s <= l.c2 {
			return s, 1
		}
		r := math.Sqrt(s)
		c := math.Sqrt(l.c2)
		return 2*c*r - l.c2, c / r
	case Cauchy:
		return l.c2 * math.Log1p(s/l.c2), 1 / (1 + s/l.c2)
	default:
		return s, 1
	}
}

// makeChunks splits the points into ranges whose cost Σ k² (k the
// observations of a point: the Schur update is quadratic in k) is
// balanced over the threads.
func (p *problem) makeChunks(threads int) {
	np := p.np()
	if threads < 1 {
		threads = 1
	}
	if threads > np {
		threads = max(np, 1)
	}
	total := 0.0
	for j := 0; j < np; j++ {
		k := float64(p.start[j+1] - p.start[j])
		total += k*k + 1
	}
	p.chunks = []int{0}
	acc := 0.0
	for j := 0; j < np; j++ {
		k := float64(p.start[j+1] - p.start[j])
		acc += k*k + 1
		if len(p.chunks) < threads && acc >= total*float64(len(p.chunks))/float64(threads) {
			p.chunks = append(p.chunks, j+1)
		}
	}
	if p.chunks[len(p.chunks)-1] != np {
		p.chunks = append(p.chunks, np)
	}
}

// parallel runs fn(c, lo, hi) over the chunks, one goroutine each.
func (p *problem) parallel(fn func(c, lo, hi int)) {
	n := len(p.chunks) - 1
	if n <= 1 {
		fn(0, 0, p.np())
		return
	}
	var wg sync.WaitGroup
	for c := 0; c < n; c++ {
		wg.Add(1)
		go func(c int) {
			defer wg.Done()
			fn(c, p.chunks[c], p.chunks[c+1])
		}(c)
	}
	wg.Wait()
}

// evaluation of a state: cost ½Σρ, the unweighted sum of squares and
// whether every pixel was defined.
type evaluation struct {
	cost, ss float64
	ok       bool
}

// evaluate computes the cost of the model and points.
func (p *problem) evaluate(m model, X [][3]float64) evaluation {
	parts := make([]evaluation, len(p.chunks)-1)
	p.parallel(func(c, lo, hi int) {
		e := evaluation{ok: true}
		for j := lo; j < hi; j++ {
			for o := p.start[j]; o < p.start[j+1]; o++ {
				u, v, ok := m.project(int(p.cam[o]), &X[j], nil)
				if !ok {
					e.ok = false
					continue
				}
				r0, r1 := u-p.uv[o][0], v-p.uv[o][1]
				s := r0*r0 + r1*r1
				rho, _ := p.loss.eval(s)
				e.cost += 0.5 * rho
				e.ss += s
			}
		}
		parts[c] = e
	})
	out := evaluation{ok: true}
	for _, e := range parts {
		out.cost += e.cost
		out.ss += e.ss
		out.ok = out.ok && e.ok
	}
	if !out.ok {
		out.cost = math.Inf(1)
	}
	return out
}

// setup maps a Reconstruction onto the measurements.
type setup struct {
	prob *problem
	// pointRec[j] is the index in rec.Points of free point j.
	pointRec []int
	// camRow[i] is the measurement row of rec.Cameras[i] (−1: none).
	camRow []int
	// camObs counts the observations of each camera.
	camObs []int
	// skipped counts rec points left as they are.
	skipped int
	// colOf[k] is the measurement column of rec.Points[k] (−1: none).
	colOf []int
}

func checkShape(m *factor.Measurements) (nf, np int) {
	if m == nil || m.W == nil {
		panic("bundle: nil measurements")
	}
	r, c := m.W.Dims()
	if r%2 != 0 {
		panic(fmt.Sprintf("bundle: W has %d rows, want 2 per frame", r))
	}
	if m.Mask != nil && len(m.Mask) != r/2*c {
		panic(fmt.Sprintf("bundle: mask has %d entries, want F×P = %d", len(m.Mask), r/2*c))
	}
	if m.Frames != nil && len(m.Frames) != r/2 {
		panic(fmt.Sprintf("bundle: %d frame indices for %d frames", len(m.Frames), r/2))
	}
	if m.Tracks != nil && len(m.Tracks) != c {
		panic(fmt.Sprintf("bundle: %d track ids for %d points", len(m.Tracks), c))
	}
	return r / 2, c
}

// newSetup pairs rec's cameras with measurement rows (by Frame: the
// index in m.Frames when given, else the row itself) and rec's points with
// columns (by Track through m.Tracks, else the column), and collects the
// observations of every point seen by at least minViews cameras.
func newSetup(m *factor.Measurements, rec *factor.Reconstruction, minViews int, loss lossFn) (*setup, error) {
	nf, np := checkShape(m)
	if rec == nil || len(rec.Cameras) == 0 || len(rec.Points) == 0 {
		panic("bundle: empty reconstruction")
	}
	rowOf := map[int]int{}
	for f := 0; f < nf; f++ {
		id := f
		if m.Frames != nil {
			id = m.Frames[f]
		}
		rowOf[id] = f
	}
	colOfID := map[int]int{}
	for j := 0; j < np; j++ {
		id := j
		if m.Tracks != nil {
			id = m.Tracks[j]
		}
		colOfID[id] = j
	}
	st := &setup{camRow: make([]int, len(rec.Cameras)), camObs: make([]int, len(rec.Cameras)), colOf: make([]int, len(rec.Points))}
	camOfRow := make([]int, nf)
	for f := range camOfRow {
		camOfRow[f] = -1
	}
	for i, c := range rec.Cameras {
		r, ok := rowOf[c.Frame]
		if !ok {
			st.camRow[i] = -1
			continue
		}
		if camOfRow[r] >= 0 {
			return nil, fmt.Errorf("bundle: cameras %d and %d both claim frame %d; give each frame one camera", camOfRow[r], i, c.Frame)
		}
		st.camRow[i] = r
		camOfRow[r] = i
	}
	seen := map[int]int{}
	p := &problem{nf: len(rec.Cameras), start: []int{0}, loss: loss}
	for k, pt := range rec.Points {
		if prev, dup := seen[pt.Track]; dup {
			return nil, fmt.Errorf("bundle: points %d and %d have the same track id %d; give each track one point", prev, k, pt.Track)
		}
		seen[pt.Track] = k
		for _, x := range pt.X {
			if math.IsNaN(x) || math.IsInf(x, 0) {
				return nil, fmt.Errorf("bundle: point of track %d has a non-finite coordinate %v; drop it before refinement", pt.Track, pt.X)
			}
		}
		col, ok := colOfID[pt.Track]
		st.colOf[k] = -1
		if !ok {
			st.skipped++
			continue
		}
		st.colOf[k] = col
		n := 0
		for r := 0; r < nf; r++ {
			if camOfRow[r] >= 0 && m.Observed(r, col) {
				n++
			}
		}
		if n < minViews {
			st.skipped++
			continue
		}
		// Cameras ascending: walk the rows in the cameras' order.
		for i := range rec.Cameras {
			r := st.camRow[i]
			if r < 0 || !m.Observed(r, col) {
				continue
			}
			u, v := m.W.At(2*r, col), m.W.At(2*r+1, col)
			if math.IsNaN(u) || math.IsNaN(v) || math.IsInf(u, 0) || math.IsInf(v, 0) {
				return nil, fmt.Errorf("bundle: track %d in frame %d has a non-finite observation (%v, %v); mark it unobserved in the mask", pt.Track, rec.Cameras[i].Frame, u, v)
			}
			p.cam = append(p.cam, int32(i))
			p.uv = append(p.uv, [2]float64{u, v})
			st.camObs[i]++
		}
		p.start = append(p.start, len(p.cam))
		st.pointRec = append(st.pointRec, k)
	}
	st.prob = p
	if p.np() == 0 {
		return nil, fmt.Errorf("bundle: no point is observed in %d or more frames of the reconstruction; check that the measurements belong to it (frame and track ids)", minViews)
	}
	// The reference point: the one with the most observations, the
	// lowest track id among equals (so the gauge does not depend on the
	// order of the points).
	best := 0
	for j := 1; j < p.np(); j++ {
		nj, nb := p.start[j+1]-p.start[j], p.start[best+1]-p.start[best]
		if nj > nb || nj == nb && rec.Points[st.pointRec[j]].Track < rec.Points[st.pointRec[best]].Track {
			best = j
		}
	}
	p.ref = best
	return st, nil
}
