package track

import (
	"fmt"
	"math"
	"sync"
	"sync/atomic"
)

// RefineOptions configures drift-free refinement: after Lucas–Kanade
// predicts a track's position in a new frame, the position is aligned
// against the track's reference patch, cut from the frame the track began
// in, so that errors do not add up from frame to frame. The zero value of
// every field means its default.
type RefineOptions struct {
	// Off turns refinement off: positions are plain frame-to-frame LK and
	// Observation.Quality stays 0.
	Off bool
	// HalfPatch is the half-size of the reference patch: the patch is
	// (2·HalfPatch+1)² pixels. Default 7 (15×15).
	HalfPatch int
	// MaxIter is the most Gauss–Newton iterations per point. Default 20.
	MaxIter int
	// Epsilon stops the iterations when an update moves every patch corner
	// by less than Epsilon pixels. Default 0.005.
	Epsilon float64
	// MinNCC ends a track (DropAppearance) when the normalised
	// cross-correlation between the aligned patch and the reference falls
	// below it. Default 0.85 (chosen on the synthetic highlight scene: it
	// ends most tracks that slide with a highlight and keeps most others);
	// negative disables the check.
	MinNCC float64
	// MaxShift ends a track (DropAppearance) when refinement moves it
	// more than MaxShift pixels away from LK's prediction: the reference
	// no longer agrees with the frame-to-frame motion. Default 2.
	MaxShift float64
	// Workers is the number of goroutines refining points in parallel.
	// Default 2.
	Workers int
	// Sigma is the standard deviation in pixels of the Gaussian that
	// smooths every frame (and so every reference patch) before
	// alignment. Smoothing makes the alignment insensitive to the small
	// blur differences that resampling and the camera put between frames
	// (Birchfield's KLT implementation smooths with σ = 0.7 for the same
	// reason, from memory). Default 0.7; negative turns smoothing off.
	Sigma float64
}

const (
	defaultHalfPatch = 7
	defaultRefIter   = 20
	defaultRefEps    = 0.02
	defaultMinNCC    = 0.85
	defaultMaxShift  = 2.0
	defaultWorkers   = 2
	defaultSigma     = 0.7
	// minAffineScale and maxAffineScale bound the singular values of the
	// refined affine part: a patch squeezed or stretched beyond them is
	// taken as lost (appearance drift).
	minAffineScale = 0.25
	maxAffineScale = 4.0
)

func (o RefineOptions) withDefaults() RefineOptions {
	if o.HalfPatch == 0 {
		o.HalfPatch = defaultHalfPatch
	}
	if o.MaxIter == 0 {
		o.MaxIter = defaultRefIter
	}
	if o.Epsilon == 0 {
		o.Epsilon = defaultRefEps
	}
	if o.MinNCC == 0 {
		o.MinNCC = defaultMinNCC
	}
	if o.MaxShift == 0 {
		o.MaxShift = defaultMaxShift
	}
	if o.Workers == 0 {
		o.Workers = defaultWorkers
	}
	if o.Sigma == 0 {
		o.Sigma = defaultSigma
	}

	return o
}

// Validate reports the first option that breaks its rule.
func (o RefineOptions) Validate() error {
	switch {
	case o.HalfPatch < 0 || (o.HalfPatch > 0 && o.HalfPatch < 2):
		return fmt.Errorf("track: refine HalfPatch %d must be at least 2 (0 = default %d)", o.HalfPatch, defaultHalfPatch)
	case o.MaxIter < 0:
		return fmt.Errorf("track: refine MaxIter %d is negative; use 0 for the default %d", o.MaxIter, defaultRefIter)
	case o.Epsilon < 0 || math.IsNaN(o.Epsilon):
		return fmt.Errorf("track: refine Epsilon %g must be a positive number of pixels (0 = default %g)", o.Epsilon, defaultRefEps)
	case o.MinNCC >= 1 || math.IsNaN(o.MinNCC):
		return fmt.Errorf("track: refine MinNCC %g must be below 1 (0 = default %g, negative = off)", o.MinNCC, defaultMinNCC)
	case o.MaxShift < 0 || math.IsNaN(o.MaxShift):
		return fmt.Errorf("track: refine MaxShift %g must be a positive number of pixels (0 = default %g)", o.MaxShift, defaultMaxShift)
	case math.IsNaN(o.Sigma) || o.Sigma > 10:
		return fmt.Errorf("track: refine Sigma %g must be at most 10 px (0 = default %g, negative = off)", o.Sigma, defaultSigma)
	case o.Workers < 0:
		return fmt.Errorf("track: refine Workers %d is negative; use 0 for the default %d", o.Workers, defaultWorkers)
	}
	return nil
}

// floatImage is a greyscale image as float32, row-major, values 0..255.
type floatImage struct {
	w, h int
	pix  []float32
}

// at samples the image bilinearly at (x, y), pixel centres at integer
// coordinates; positions outside are clamped to the border (replicate).
func (im *floatImage) at(x, y float64) float64 {
	if x < 0 {
		x = 0
	} else if x > float64(im.w-1) {
		x = float64(im.w - 1)
	}
	if y < 0 {
		y = 0
	} else if y > float64(im.h-1) {
		y = float64(im.h - 1)
	}
	x0, y0 := int(x), int(y)
	fx, fy := x-float64(x0), y-float64(y0)
	x1, y1 := x0+1, y0+1
	if x1 >= im.w {
		x1 = x0
	}
	if y1 >= im.h {
		y1 = y0
	}
	r0 := im.pix[y0*im.w:]
	r1 := im.pix[y1*im.w:]
	a := float64(r0[x0]) + fx*(float64(r0[x1])-float64(r0[x0]))
	b := float64(r1[x0]) + fx*(float64(r1[x1])-float64(r1[x0]))
	return a + fy*(b-a)
}

var probeIntGrid bool
var probeMu sync.Mutex
var probeIters map[int]int

// refPatch is a track's reference appearance and its current warp.
//
// The template T is cut on the pixel grid of the track's first frame,
// centred on the pixel nearest the detected corner, so it is never
// resampled (resampling at a sub-pixel offset would blur it by an amount
// that depends on the offset, and the alignment would inherit a per-track
// bias). The corner itself sits at (dx, dy), |dx|, |dy| ≤ ½, in template
// coordinates (u, v).
//
// The warp maps template coordinates to image coordinates (Baker &
// Matthews 2004, eq. 2, affine):
//
//	W(u,v; p) = [1+p1  p3  p5] [u v 1]ᵀ
//	            [p2  1+p4  p6]
//
// stored as m = (a11, a12, tx, a21, a22, ty); the track's position is
// W(dx, dy).
type refPatch struct {
	t      []float32   // template T(u,v), (2h+1)² row-major
	sd     []float32   // 6 projected steepest-descent images, interleaved: sd[6k+q]
	hinv   [36]float64 // inverse Gauss–Newton Hessian (6×6, row-major)
	tm     float64     // mean of T
	tn     float64     // ‖T − mean‖
	dx, dy float64     // the corner in template coordinates
	m      [6]float64  // current warp
}

// pos is the track's position under warp m.
func (p *refPatch) pos(m *[6]float64) (x, y float64) {
	return m[0]*p.dx + m[1]*p.dy + m[2], m[3]*p.dx + m[4]*p.dy + m[5]
}

// newRefPatch cuts the reference patch for the corner at (x, y) from im
// and precomputes the inverse-compositional quantities. It reports false
// when the patch has too little texture for a stable affine fit. buf is
// scratch of at least (2h+3)² floats.
//
// Inverse compositional algorithm (Baker & Matthews, "Lucas–Kanade 20
// years on: a unifying framework", IJCV 56(3), 2004, Fig. 4):
// steepest-descent images SD_j = ∇T · ∂W/∂p_j at p = 0, with
// ∂W/∂p = [u 0 v 0 1 0; 0 u 0 v 0 1]; Hessian H = Σ SDᵀ SD. Both depend on
// the template alone, so they are computed once per track, here.
//
// Gain and bias: the frame is modelled as I(W(x;p)) = (1+g)·T(x) + b, a
// linear appearance model with basis {T, 1}. Its effect is projected out of
// the steepest-descent images (SD_j ← SD_j − Σ_k ⟨SD_j, e_k⟩ e_k over an
// orthonormal basis e_k of span{T, 1}), the "project out" inverse
// compositional algorithm for linear appearance variation (Hager &
// Belhumeur, PAMI 20(10), 1998; Baker, Gross & Matthews, "Lucas–Kanade 20
// years on, part 3", CMU-RI-TR-03-35, 2003, section 4.2). Gain and bias then
// leave the geometric update untouched.
func newRefPatch(im *floatImage, x, y float64, h int, buf []float32) (*refPatch, bool) {
	n := 2*h + 1
	nb := n + 2
	g := buf[:nb*nb]
	cx, cy := x, y
	if probeIntGrid {
		cx, cy = math.Round(x), math.Round(y)
	}
	for j := 0; j < nb; j++ {
		for i := 0; i < nb; i++ {
			g[j*nb+i] = float32(im.at(cx+float64(i-h-1), cy+float64(j-h-1)))
		}
	}
	np := n * n
	// One allocation per track: template, then the interleaved
	// steepest-descent images.
	mem := make([]float32, 7*np)
	p := &refPatch{t: mem[:np:np], sd: mem[np:], dx: x - cx, dy: y - cy}
	var sum float64
	for j := 0; j < n; j++ {
		for i := 0; i < n; i++ {
			v := g[(j+1)*nb+i+1]
			p.t[j*n+i] = v
			sum += float64(v)
		}
	}
	p.tm = sum / float64(np)
	var ss float64
	for _, v := range p.t {
		d := float64(v) - p.tm
		ss += d * d
	}
	p.tn = math.Sqrt(ss)
	if p.tn < 1e-6 {
		return nil, false
	}
	// Steepest-descent images from central differences of the template,
	// one image per parameter (planar layout while projecting).
	var sdp [6][]float64
	for q := range sdp {
		sdp[q] = make([]float64, np)
	}
	for j := 0; j < n; j++ {
		for i := 0; i < n; i++ {
			k := j*n + i
			tx := 0.5 * float64(g[(j+1)*nb+i+2]-g[(j+1)*nb+i])
			ty := 0.5 * float64(g[(j+2)*nb+i+1]-g[j*nb+i+1])
			u, v := float64(i-h), float64(j-h)
			sdp[0][k] = tx * u
			sdp[1][k] = ty * u
			sdp[2][k] = tx * v
			sdp[3][k] = ty * v
			sdp[4][k] = tx
			sdp[5][k] = ty
		}
	}
	// Project out span{1, T−mean} (orthogonal, so two separate projections).
	inv := 1 / float64(np)
	for q := 0; q < 6; q++ {
		s := sdp[q]
		var d1, d2 float64
		for k, v := range s {
			d1 += v
			d2 += v * (float64(p.t[k]) - p.tm)
		}
		m1 := d1 * inv
		m2 := d2 / ss
		for k := range s {
			s[k] -= m1 + m2*(float64(p.t[k])-p.tm)
		}
	}
	var hm [36]float64
	for a := 0; a < 6; a++ {
		for b := a; b < 6; b++ {
			var acc float64
			for k := range sdp[a] {
				acc += sdp[a][k] * sdp[b][k]
			}
			hm[a*6+b], hm[b*6+a] = acc, acc
		}
	}
	if !invert6(&hm, &p.hinv) {
		return nil, false
	}
	for q := 0; q < 6; q++ {
		for k := 0; k < np; k++ {
			p.sd[6*k+q] = float32(sdp[q][k])
		}
	}
	p.m = [6]float64{1, 0, cx, 0, 1, cy}
	return p, true
}

// invert6 inverts a symmetric positive-definite 6×6 matrix by Cholesky
// factorisation (A = L·Lᵀ, then A⁻¹ = L⁻ᵀ·L⁻¹). It reports false if a pivot
// is not positive or the matrix is ill-conditioned (pivot ratio < 1e-12).
func invert6(a, out *[36]float64) bool {
	var l [36]float64
	maxd := 0.0
	for i := 0; i < 6; i++ {
		maxd = math.Max(maxd, a[i*6+i])
	}
	for j := 0; j < 6; j++ {
		s := a[j*6+j]
		for k := 0; k < j; k++ {
			s -= l[j*6+k] * l[j*6+k]
		}
		if !(s > 1e-12*maxd) {
			return false
		}
		l[j*6+j] = math.Sqrt(s)
		for i := j + 1; i < 6; i++ {
			s := a[i*6+j]
			for k := 0; k < j; k++ {
				s -= l[i*6+k] * l[j*6+k]
			}
			l[i*6+j] = s / l[j*6+j]
		}
	}
	// Linv (lower triangular).
	var li [36]float64
	for i := 0; i < 6; i++ {
		li[i*6+i] = 1 / l[i*6+i]
		for j := 0; j < i; j++ {
			s := 0.0
			for k := j; k < i; k++ {
				s -= l[i*6+k] * li[k*6+j]
			}
			li[i*6+j] = s / l[i*6+i]
		}
	}
	for i := 0; i < 6; i++ {
		for j := 0; j < 6; j++ {
			s := 0.0
			for k := max(i, j); k < 6; k++ {
				s += li[k*6+i] * li[k*6+j]
			}
			out[i*6+j] = s
		}
	}
	return true
}

// refineResult is the outcome of aligning one point.
type refineResult struct {
	x, y float64
	ncc  float64
	ok   bool
	iter int
}

// patchSums are the sums one pass over the warped patch accumulates: the
// right-hand side b = Σ_k SD_kᵀ·(I(W(u_k)) − T_k) of the Gauss–Newton
// step, and Σ I, Σ I², Σ I·(T − mean T) for the normalised
// cross-correlation.
type patchSums struct {
	b            [6]float64
	si, sii, sit float64
}

// align runs the inverse-compositional iterations from the warp p.m with
// its translation moved so that the track's position is the LK prediction
// (x, y), updating p.m in place on success. half is the patch half-size.
//
// Each iteration (Baker & Matthews 2004, Fig. 4): E(u) = I(W(u;p)) − T(u);
// Δp = H⁻¹ Σ SDᵀ E; W(·;p) ← W(·;p) ∘ W(·;Δp)⁻¹. The normalised
// cross-correlation with T is taken from the samples of the last
// iteration, whose update moved the patch by less than Epsilon (or the
// iterations hit MaxIter).
func (p *refPatch) align(im *floatImage, x, y float64, half int, o *RefineOptions) refineResult {
	np := (2*half + 1) * (2*half + 1)
	m := p.m
	m[2] = x - (m[0]*p.dx + m[1]*p.dy)
	m[5] = y - (m[3]*p.dx + m[4]*p.dy)
	r := refineResult{}
	hf := float64(half)
	var s patchSums
	for it := 0; it < o.MaxIter; it++ {
		r.iter = it + 1
		p.sums(im, &m, half, &s)
		b := &s.b
		var dp [6]float64
		for a := 0; a < 6; a++ {
			h := p.hinv[a*6 : a*6+6 : a*6+6]
			dp[a] = h[0]*b[0] + h[1]*b[1] + h[2]*b[2] + h[3]*b[3] + h[4]*b[4] + h[5]*b[5]
		}
		// W(Δp) = [[1+dp0, dp2, dp4], [dp1, 1+dp3, dp5]]; compose with its
		// inverse: M ← M · W(Δp)⁻¹.
		a11, a12, a21, a22 := 1+dp[0], dp[2], dp[1], 1+dp[3]
		det := a11*a22 - a12*a21
		if !(math.Abs(det) > 1e-9) {
			return refineResult{}
		}
		i11, i12, i21, i22 := a22/det, -a12/det, -a21/det, a11/det
		it1 := -(i11*dp[4] + i12*dp[5])
		it2 := -(i21*dp[4] + i22*dp[5])
		n0 := m[0]*i11 + m[1]*i21
		n1 := m[0]*i12 + m[1]*i22
		n2 := m[0]*it1 + m[1]*it2 + m[2]
		n3 := m[3]*i11 + m[4]*i21
		n4 := m[3]*i12 + m[4]*i22
		n5 := m[3]*it1 + m[4]*it2 + m[5]
		m = [6]float64{n0, n1, n2, n3, n4, n5}
		if math.IsNaN(n2) || math.IsNaN(n5) || math.IsInf(n2, 0) || math.IsInf(n5, 0) {
			return refineResult{}
		}
		// Largest motion of a patch corner under the update.
		step := math.Abs(dp[4]) + math.Abs(dp[5]) + hf*(math.Abs(dp[0])+math.Abs(dp[1])+math.Abs(dp[2])+math.Abs(dp[3]))
		if step < o.Epsilon {
			break
		}
	}
	r.x, r.y = p.pos(&m)
	if math.Hypot(r.x-x, r.y-y) > o.MaxShift || !affineScaleOK(m) {
		return refineResult{x: r.x, y: r.y, iter: r.iter}
	}
	// Normalised cross-correlation of the sampled patch with T.
	vi := s.sii - s.si*s.si/float64(np)
	if vi > 1e-12 {
		r.ncc = s.sit / (math.Sqrt(vi) * p.tn)
	}
	r.ok = true
	p.m = m
	probeMu.Lock()
	if probeIters != nil {
		probeIters[r.iter]++
	}
	probeMu.Unlock()
	return r
}

// sums makes one pass over the patch warped by m (see patchSums). When the
// warped patch (with one pixel to spare) lies inside the image, samples
// are bilinear without clamping and the warped coordinates advance
// incrementally along each row; otherwise each sample is clamped to the
// border.
func (p *refPatch) sums(im *floatImage, m *[6]float64, half int, s *patchSums) {
	n := 2*half + 1
	hf := float64(half)
	inside := true
	for _, c := range [4][2]float64{{-hf, -hf}, {hf, -hf}, {-hf, hf}, {hf, hf}} {
		x := m[0]*c[0] + m[1]*c[1] + m[2]
		y := m[3]*c[0] + m[4]*c[1] + m[5]
		if !(x >= 0 && y >= 0 && x < float64(im.w-1) && y < float64(im.h-1)) {
			inside = false
			break
		}
	}
	var b0, b1, b2, b3, b4, b5, si, sii, sit float64
	w := im.w
	pix := im.pix
	tm := p.tm
	t := p.t[:n*n]
	sd := p.sd[:6*n*n]
	k := 0
	for j := 0; j < n; j++ {
		v := float64(j) - hf
		X := -hf*m[0] + m[1]*v + m[2]
		Y := -hf*m[3] + m[4]*v + m[5]
		for i := 0; i < n; i++ {
			var val float64
			if inside {
				x0, y0 := int(X), int(Y)
				fx, fy := X-float64(x0), Y-float64(y0)
				o := y0*w + x0
				q := pix[o : o+w+2 : o+w+2]
				q00, q01 := float64(q[0]), float64(q[1])
				q10, q11 := float64(q[w]), float64(q[w+1])
				top := q00 + fx*(q01-q00)
				bot := q10 + fx*(q11-q10)
				val = top + fy*(bot-top)
			} else {
				val = im.at(X, Y)
			}
			tk := float64(t[k])
			e := val - tk
			g := sd[6*k : 6*k+6 : 6*k+6]
			b0 += float64(g[0]) * e
			b1 += float64(g[1]) * e
			b2 += float64(g[2]) * e
			b3 += float64(g[3]) * e
			b4 += float64(g[4]) * e
			b5 += float64(g[5]) * e
			si += val
			sii += val * val
			sit += val * (tk - tm)
			X += m[0]
			Y += m[3]
			k++
		}
	}
	s.b = [6]float64{b0, b1, b2, b3, b4, b5}
	s.si, s.sii, s.sit = si, sii, sit
}

// affineScaleOK checks the singular values of the warp's 2×2 part lie in
// [minAffineScale, maxAffineScale] and it does not mirror.
func affineScaleOK(m [6]float64) bool {
	a, b, c, d := m[0], m[1], m[3], m[4]
	det := a*d - b*c
	if det <= 0 {
		return false
	}
	// σ1² + σ2² = ‖A‖_F², σ1·σ2 = det.
	f := a*a + b*b + c*c + d*d
	disc := math.Sqrt(math.Max(0, f*f-4*det*det))
	s1 := math.Sqrt((f + disc) / 2)
	s2 := det / s1
	return s1 <= maxAffineScale && s2 >= minAffineScale
}

// refineBatch is one frame's refinement work: point i is aligned against
// patches[i] (nil = skip) from the LK prediction (xs[i], ys[i]) into
// res[i]. Workers take blocks of refineBlock points from next.
type refineBatch struct {
	im      *floatImage
	patches []*refPatch
	xs, ys  []float64
	res     []refineResult
	half    int
	o       *RefineOptions
	next    atomic.Int64
}

// refineBlock is the number of points a worker takes at a time: small
// enough to balance the load, large enough that the shared counter is
// touched rarely.
const refineBlock = 16

func (b *refineBatch) work() {
	n := int64(len(b.patches))
	for {
		s := b.next.Add(refineBlock) - refineBlock
		if s >= n {
			return
		}
		e := min(n, s+refineBlock)
		for i := s; i < e; i++ {
			if p := b.patches[i]; p != nil {
				b.res[i] = p.align(b.im, b.xs[i], b.ys[i], b.half, b.o)
			}
		}
	}
}

// refinePool is a fixed pool of goroutines that refine one frame's points
// together with the calling goroutine: Workers−1 helpers are started once
// per Run and reused for every frame, so there is no per-frame goroutine
// or allocation.
type refinePool struct {
	start chan *refineBatch
	wg    sync.WaitGroup
	batch refineBatch
	n     int // helpers
}

func newRefinePool(workers int) *refinePool {
	p := &refinePool{n: max(0, workers-1)}
	if p.n > 0 {
		p.start = make(chan *refineBatch, p.n)
		for i := 0; i < p.n; i++ {
			go func() {
				for b := range p.start {
					b.work()
					p.wg.Done()
				}
			}()
		}
	}
	return p
}

// run aligns every point with a patch and waits for all of them.
func (p *refinePool) run(im *floatImage, patches []*refPatch, xs, ys []float64, res []refineResult, half int, o *RefineOptions) {
	b := &p.batch
	b.im, b.patches, b.xs, b.ys, b.res, b.half, b.o = im, patches, xs, ys, res, half, o
	b.next.Store(0)
	helpers := min(p.n, (len(patches)+refineBlock-1)/refineBlock-1)
	p.wg.Add(max(0, helpers))
	for i := 0; i < helpers; i++ {
		p.start <- b
	}
	b.work()
	p.wg.Wait()
	b.im, b.patches, b.xs, b.ys, b.res, b.o = nil, nil, nil, nil, nil, nil
}

// close stops the helpers.
func (p *refinePool) close() {
	if p.start != nil {
		close(p.start)
		p.start = nil
	}
}
