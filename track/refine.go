package track

import (
	"fmt"
	"math"
	"sync"
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
	defaultRefEps    = 0.005
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

// refPatch is a track's reference appearance and its current warp.
//
// The warp maps patch coordinates (u, v), centred on the reference point,
// to image coordinates (Baker & Matthews 2004, eq. 2, affine):
//
//	W(u,v; p) = [1+p1  p3  p5] [u v 1]ᵀ
//	            [p2  1+p4  p6]
//
// stored as m = (a11, a12, tx, a21, a22, ty); (tx, ty) is the track's
// position.
type refPatch struct {
	t    []float32   // template T(u,v), (2h+1)² row-major
	sd   []float32   // 6 projected steepest-descent images, interleaved: sd[6k+q]
	hinv [36]float64 // inverse Gauss–Newton Hessian (6×6, row-major)
	tm   float64     // mean of T
	tn   float64     // ‖T − mean‖
	m    [6]float64  // current warp
}

// newRefPatch cuts the reference patch around (x, y) from im and
// precomputes the inverse-compositional quantities. It reports false when
// the patch has too little texture for a stable affine fit. buf is scratch
// of at least (2h+3)² floats.
//
// Inverse compositional algorithm (Baker & Matthews, "Lucas–Kanade 20
// years on: a unifying framework", IJCV 56(3), 2004, Fig. 4):
// steepest-descent images SD_j = ∇T · ∂W/∂p_j at p = 0, with
// ∂W/∂p = [u 0 v 0 1 0; 0 u 0 v 0 1]; Hessian H = Σ SDᵀ SD.
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
	for j := 0; j < nb; j++ {
		for i := 0; i < nb; i++ {
			g[j*nb+i] = float32(im.at(x+float64(i-h-1), y+float64(j-h-1)))
		}
	}
	p := &refPatch{t: make([]float32, n*n), sd: make([]float32, 6*n*n)}
	np := n * n
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
	// Steepest-descent images from central differences of the template.
	for j := 0; j < n; j++ {
		for i := 0; i < n; i++ {
			k := j*n + i
			tx := 0.5 * float64(g[(j+1)*nb+i+2]-g[(j+1)*nb+i])
			ty := 0.5 * float64(g[(j+2)*nb+i+1]-g[j*nb+i+1])
			u, v := float64(i-h), float64(j-h)
			p.sd[0*np+k] = float32(tx * u)
			p.sd[1*np+k] = float32(ty * u)
			p.sd[2*np+k] = float32(tx * v)
			p.sd[3*np+k] = float32(ty * v)
			p.sd[4*np+k] = float32(tx)
			p.sd[5*np+k] = float32(ty)
		}
	}
	// Project out span{1, T−mean} (orthogonal, so two separate projections).
	inv := 1 / float64(np)
	for q := 0; q < 6; q++ {
		s := p.sd[q*np : (q+1)*np]
		var d1, d2 float64
		for k, v := range s {
			d1 += float64(v)
			d2 += float64(v) * (float64(p.t[k]) - p.tm)
		}
		m1 := d1 * inv
		m2 := d2 / ss
		for k := range s {
			s[k] -= float32(m1 + m2*(float64(p.t[k])-p.tm))
		}
	}
	var hm [36]float64
	for a := 0; a < 6; a++ {
		sa := p.sd[a*np : (a+1)*np]
		for b := a; b < 6; b++ {
			sb := p.sd[b*np : (b+1)*np]
			var acc float64
			for k := range sa {
				acc += float64(sa[k]) * float64(sb[k])
			}
			hm[a*6+b], hm[b*6+a] = acc, acc
		}
	}
	if !invert6(&hm, &p.hinv) {
		return nil, false
	}
	// Interleave the steepest-descent images (sd[6k+q]) for the
	// per-pixel loop of align.
	il := make([]float32, 6*np)
	for q := 0; q < 6; q++ {
		for k := 0; k < np; k++ {
			il[6*k+q] = p.sd[q*np+k]
		}
	}
	p.sd = il
	p.m = [6]float64{1, 0, x, 0, 1, y}
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

// align runs the inverse-compositional iterations from the warp p.m with
// its translation replaced by the LK prediction (x, y), updating p.m in
// place on success. half is the patch half-size.
//
// Each iteration (Baker & Matthews 2004, Fig. 4): E(u) = I(W(u;p)) − T(u);
// Δp = H⁻¹ Σ SDᵀ E; W(·;p) ← W(·;p) ∘ W(·;Δp)⁻¹.
func (p *refPatch) align(im *floatImage, x, y float64, half int, o *RefineOptions) refineResult {
	n := 2*half + 1
	np := n * n
	m := p.m
	m[2], m[5] = x, y
	r := refineResult{}
	hf := float64(half)
	for it := 0; it < o.MaxIter; it++ {
		r.iter = it + 1
		var b [6]float64
		p.errorDot(im, &m, half, &b)
		var dp [6]float64
		for a := 0; a < 6; a++ {
			s := 0.0
			for c := 0; c < 6; c++ {
				s += p.hinv[a*6+c] * b[c]
			}
			dp[a] = s
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
		if math.IsNaN(n2) || math.IsNaN(n5) {
			return refineResult{}
		}
		// Largest motion of a patch corner under the update.
		step := math.Abs(dp[4]) + math.Abs(dp[5]) + hf*(math.Abs(dp[0])+math.Abs(dp[1])+math.Abs(dp[2])+math.Abs(dp[3]))
		if step < o.Epsilon {
			break
		}
	}
	if math.Hypot(m[2]-x, m[5]-y) > o.MaxShift || !affineScaleOK(m) {
		return refineResult{x: m[2], y: m[5], iter: r.iter}
	}
	// Normalised cross-correlation of the aligned patch with T.
	var si, sii, sit float64
	k := 0
	for j := 0; j < n; j++ {
		v := float64(j - half)
		for i := 0; i < n; i++ {
			u := float64(i - half)
			val := im.at(m[0]*u+m[1]*v+m[2], m[3]*u+m[4]*v+m[5])
			si += val
			sii += val * val
			sit += val * (float64(p.t[k]) - p.tm)
			k++
		}
	}
	vi := sii - si*si/float64(np)
	ncc := 0.0
	if vi > 1e-12 {
		ncc = sit / (math.Sqrt(vi) * p.tn)
	}
	r.x, r.y, r.ncc, r.ok = m[2], m[5], ncc, true
	p.m = m
	return r
}

// errorDot accumulates b = Σ_k SD_kᵀ·E_k with E_k = I(W(u_k; m)) − T_k
// over the patch. When the warped patch (with one pixel to spare) lies
// inside the image, samples are bilinear without clamping and the warped
// coordinates advance incrementally along each row.
func (p *refPatch) errorDot(im *floatImage, m *[6]float64, half int, b *[6]float64) {
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
	var b0, b1, b2, b3, b4, b5 float64
	w := im.w
	pix := im.pix
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
				q00, q01 := float64(pix[o]), float64(pix[o+1])
				q10, q11 := float64(pix[o+w]), float64(pix[o+w+1])
				top := q00 + fx*(q01-q00)
				bot := q10 + fx*(q11-q10)
				val = top + fy*(bot-top)
			} else {
				val = im.at(X, Y)
			}
			e := val - float64(p.t[k])
			sd := p.sd[6*k : 6*k+6 : 6*k+6]
			b0 += float64(sd[0]) * e
			b1 += float64(sd[1]) * e
			b2 += float64(sd[2]) * e
			b3 += float64(sd[3]) * e
			b4 += float64(sd[4]) * e
			b5 += float64(sd[5]) * e
			X += m[0]
			Y += m[3]
			k++
		}
	}
	*b = [6]float64{b0, b1, b2, b3, b4, b5}
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

// refineAll aligns points idx of pts in parallel over o.Workers goroutines;
// patches[i] is the reference of point i (nil = skip). Results go to res.
func refineAll(im *floatImage, patches []*refPatch, xs, ys []float64, res []refineResult, half int, o *RefineOptions) {
	n := len(patches)
	w := o.Workers
	if w > n {
		w = n
	}
	if w <= 1 {
		for i := 0; i < n; i++ {
			if patches[i] != nil {
				res[i] = patches[i].align(im, xs[i], ys[i], half, o)
			}
		}
		return
	}
	var wg sync.WaitGroup
	chunk := (n + w - 1) / w
	for s := 0; s < n; s += chunk {
		e := min(n, s+chunk)
		wg.Add(1)
		go func(s, e int) {
			defer wg.Done()
			for i := s; i < e; i++ {
				if patches[i] != nil {
					res[i] = patches[i].align(im, xs[i], ys[i], half, o)
				}
			}
		}(s, e)
	}
	wg.Wait()
}
