package synth

import (
	"context"
	"fmt"
	"image"
	"image/png"
	"math"
	"os"
	"path/filepath"
	"runtime"
	"strconv"
	"sync"
	"sync/atomic"
)

// parallelRows calls fn(y) for every y in [0, h) on GOMAXPROCS goroutines.
// Each row is written by exactly one call, so the result does not depend
// on the number of goroutines. It stops early when ctx is cancelled.
func parallelRows(ctx context.Context, h int, fn func(y int)) error {
	workers := runtime.GOMAXPROCS(0)
	if workers > h {
		workers = h
	}
	var next atomic.Int64
	var wg sync.WaitGroup
	for w := 0; w < workers; w++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for {
				if ctx.Err() != nil {
					return
				}
				y := int(next.Add(1) - 1)
				if y >= h {
					return
				}
				fn(y)
			}
		}()
	}
	wg.Wait()
	if err := ctx.Err(); err != nil {
		return fmt.Errorf("synth: rendering stopped: %w", err)
	}
	return nil
}

// shade returns the colour (0..255 scale) of the part point X with
// outward normal n seen along the ray direction d, and the specular term
// (0 when Highlight is off):
//
//	I = 255·(albedo·(ka + kd·max(0, n·L)) + ks·max(0, r·v)^m), r = 2(n·L)n − L, v = −d/|d|.
func (s *Scene) shade(fr *frame, X, n, d vec3) (r, g, b, spec float64) {
	ar, ag, ab := s.tex.albedo(X)
	nl := dot(n, fr.light)
	k := ambient
	if nl > 0 {
		k += diffuse * nl
	}
	r, g, b = 255*ar*k, 255*ag*k, 255*ab*k
	if s.opts.Highlight {
		spec = s.specular(fr, n, d, nl)
		r += 255 * spec
		g += 255 * spec
		b += 255 * spec
	}
	return r, g, b, spec
}

// specular returns ks·max(0, r·v)^m (Phong 1975), zero when the surface
// faces away from the light.
func (s *Scene) specular(fr *frame, n, d vec3, nl float64) float64 {
	if nl <= 0 {
		return 0
	}
	l := fr.light
	rv := -((2*nl*n[0]-l[0])*d[0] + (2*nl*n[1]-l[1])*d[1] + (2*nl*n[2]-l[2])*d[2]) / norm(d)
	if rv <= 0 {
		return 0
	}
	rv *= rv // ^2
	rv *= rv // ^4
	rv *= rv // ^8 = shininess
	return specular * rv
}

// backdropSample returns the colour of the backdrop at image point (x, y),
// or the flat background when the ray does not reach it. The backdrop is
// the lab plane Y = BackdropDistanceMM, textured in its (X, Z)
// coordinates, lit by the same light; it does not depend on the frame.
func (s *Scene) backdropSample(x, y float64) (r, g, b float64) {
	var o, d vec3
	rl := &s.rlab
	if s.pin {
		a, bb := (x-s.cx)/s.fx, (y-s.cy)/s.fx
		o = s.cLab
		d = vec3{a*rl[0][0] + bb*rl[1][0] + rl[2][0], a*rl[0][1] + bb*rl[1][1] + rl[2][1], a*rl[0][2] + bb*rl[1][2] + rl[2][2]}
	} else {
		u, v := (x-s.t[0])/s.fx, (y-s.t[1])/s.fx
		o = vec3{u*rl[0][0] + v*rl[1][0] + s.w0*rl[2][0], u*rl[0][1] + v*rl[1][1] + s.w0*rl[2][1], u*rl[0][2] + v*rl[1][2] + s.w0*rl[2][2]}
		d = rl[2]
	}
	if d[1] <= 0 {
		return BackgroundGrey, BackgroundGrey, BackgroundGrey
	}
	t := (BackdropDistanceMM - o[1]) / d[1]
	if t <= 0 {
		return BackgroundGrey, BackgroundGrey, BackgroundGrey
	}
	px, pz := o[0]+t*d[0], o[2]+t*d[2]
	ar, ag, ab := backdropAlbedo(s.bdSeed, px, pz)
	k := s.bdShade
	return 255 * ar * k, 255 * ag * k, 255 * ab * k
}

// subOffsets returns the sample offsets inside a pixel, (k+0.5)/n − 0.5.
func subOffsets(n int) []float64 {
	off := make([]float64, n)
	for k := range off {
		off[k] = (float64(k)+0.5)/float64(n) - 0.5
	}
	return off
}

// backdrop returns the per-pixel mean backdrop colour, computing it on
// first use (it is the same for every frame).
func (s *Scene) backdrop(ctx context.Context) ([]float32, error) {
	s.bdMu.Lock()
	defer s.bdMu.Unlock()
	if s.bdFilled {
		return s.bdCache, nil
	}
	W, H, n := s.opts.Width, s.opts.Height, s.opts.Supersample
	off := subOffsets(n)
	buf := make([]float32, W*H*3)
	inv := 1 / float64(n*n)
	err := parallelRows(ctx, H, func(y int) {
		for x := 0; x < W; x++ {
			var r, g, b float64
			for _, oy := range off {
				for _, ox := range off {
					sr, sg, sb := s.backdropSample(float64(x)+ox, float64(y)+oy)
					r, g, b = r+sr, g+sg, b+sb
				}
			}
			i := (y*W + x) * 3
			buf[i], buf[i+1], buf[i+2] = float32(r*inv), float32(g*inv), float32(b*inv)
		}
	})
	if err != nil {
		return nil, err
	}
	s.bdCache, s.bdFilled = buf, true
	return buf, nil
}

// renderLinear renders frame f into a W×H×3 float32 buffer (0..255 scale,
// before blur and noise).
func (s *Scene) renderLinear(ctx context.Context, f int) ([]float32, error) {
	fr := s.frame(f)
	W, H, n := s.opts.Width, s.opts.Height, s.opts.Supersample
	var bd []float32
	if s.opts.Backdrop {
		var err error
		if bd, err = s.backdrop(ctx); err != nil {
			return nil, err
		}
	}
	off := subOffsets(n)
	inv := 1 / float64(n*n)
	buf := make([]float32, W*H*3)
	bx0, by0, bx1, by1 := s.imageBounds(fr)
	err := parallelRows(ctx, H, func(y int) {
		var missed [MaxSupersample * MaxSupersample]uint8
		rowOut := float64(y)+0.5 < by0 || float64(y)-0.5 > by1
		for x := 0; x < W; x++ {
			var r, g, b float64
			var nm int
			if rowOut || float64(x)+0.5 < bx0 || float64(x)-0.5 > bx1 {
				nm = n * n // no sample of this pixel can reach the part
			} else {
				nm = s.samplePixel(fr, x, y, off, &missed, &r, &g, &b)
			}
			i := (y*W + x) * 3
			switch {
			case nm == 0:
			case !s.opts.Backdrop:
				k := float64(nm) * BackgroundGrey
				r, g, b = r+k, g+k, b+k
			case nm == n*n: // all background: the cached mean
				buf[i], buf[i+1], buf[i+2] = bd[i], bd[i+1], bd[i+2]
				continue
			default:
				for _, m := range missed[:nm] {
					sr, sg, sb := s.backdropSample(float64(x)+off[int(m)%n], float64(y)+off[int(m)/n])
					r, g, b = r+sr, g+sg, b+sb
				}
			}
			buf[i], buf[i+1], buf[i+2] = float32(r*inv), float32(g*inv), float32(b*inv)
		}
	})
	if err != nil {
		return nil, err
	}
	return buf, nil
}

// samplePixel adds to r, g, b the colours of the samples of pixel (x, y)
// that hit the part, lists the missed ones in missed and returns their
// number.
func (s *Scene) samplePixel(fr *frame, x, y int, off []float64, missed *[MaxSupersample * MaxSupersample]uint8, r, g, b *float64) int {
	n := len(off)
	nm := 0
	for sy, oy := range off {
		for sx, ox := range off {
			o, d := s.ray(fr, float64(x)+ox, float64(y)+oy)
			t, face := intersectPart(o, d)
			if face == faceNone {
				missed[nm] = uint8(sy*n + sx)
				nm++
				continue
			}
			X := vec3{o[0] + t*d[0], o[1] + t*d[1], o[2] + t*d[2]}
			sr, sg, sb, _ := s.shade(fr, X, faceNormal(face, X), d)
			*r, *g, *b = *r+sr, *g+sg, *b+sb
		}
	}
	return nm
}

// imageBounds returns a rectangle of the image (pixels, with a one-pixel
// margin) outside which no ray hits the part in frame fr: the bounds of
// the projected corners of the part's bounding prism (a convex solid in
// front of the camera projects into the hull of its corners' images).
func (s *Scene) imageBounds(fr *frame) (x0, y0, x1, y1 float64) {
	x0, y0, x1, y1 = math.Inf(1), math.Inf(1), math.Inf(-1), math.Inf(-1)
	const r = CollarCornerRadiusMM
	for i := 0; i < 8; i++ {
		X := vec3{r, r, 0}
		if i&1 != 0 {
			X[0] = -r
		}
		if i&2 != 0 {
			X[1] = -r
		}
		if i&4 != 0 {
			X[2] = PartHeightMM
		}
		x, y := s.project(fr, X)
		if math.IsNaN(x) { // cannot happen outside the bounding sphere; be safe
			return math.Inf(-1), math.Inf(-1), math.Inf(1), math.Inf(1)
		}
		x0, y0, x1, y1 = math.Min(x0, x), math.Min(y0, y), math.Max(x1, x), math.Max(y1, y)
	}
	return x0 - 1, y0 - 1, x1 + 1, y1 + 1
}

// gaussKernel returns the normalised 1D Gaussian weights exp(−i²/2σ²) for
// i ∈ [−⌈3σ⌉, ⌈3σ⌉].
func gaussKernel(sigma float64) []float64 {
	rad := int(math.Ceil(3 * sigma))
	if rad < 1 {
		rad = 1
	}
	k := make([]float64, 2*rad+1)
	sum := 0.0
	for i := range k {
		x := float64(i - rad)
		k[i] = math.Exp(-x * x / (2 * sigma * sigma))
		sum += k[i]
	}
	for i := range k {
		k[i] /= sum
	}
	return k
}

// blur applies a separable Gaussian blur (borders replicated) in place.
func blur(ctx context.Context, buf []float32, W, H int, sigma float64) error {
	k := gaussKernel(sigma)
	rad := len(k) / 2
	tmp := make([]float32, len(buf))
	clamp := func(v, hi int) int {
		if v < 0 {
			return 0
		}
		if v > hi {
			return hi
		}
		return v
	}
	if err := parallelRows(ctx, H, func(y int) {
		row := buf[y*W*3 : (y+1)*W*3]
		for x := 0; x < W; x++ {
			var r, g, b float64
			for i, w := range k {
				j := clamp(x+i-rad, W-1) * 3
				r += w * float64(row[j])
				g += w * float64(row[j+1])
				b += w * float64(row[j+2])
			}
			o := (y*W + x) * 3
			tmp[o], tmp[o+1], tmp[o+2] = float32(r), float32(g), float32(b)
		}
	}); err != nil {
		return err
	}
	return parallelRows(ctx, H, func(y int) {
		for x := 0; x < W; x++ {
			var r, g, b float64
			for i, w := range k {
				j := (clamp(y+i-rad, H-1)*W + x) * 3
				r += w * float64(tmp[j])
				g += w * float64(tmp[j+1])
				b += w * float64(tmp[j+2])
			}
			o := (y*W + x) * 3
			buf[o], buf[o+1], buf[o+2] = float32(r), float32(g), float32(b)
		}
	})
}

// gauss returns a standard normal deviate from the hash h by the
// Box–Muller transform (Box & Muller 1958): √(−2 ln u1)·cos(2π u2), with
// u1 ∈ (0, 1] and u2 ∈ [0, 1) from the high and low 32 bits.
func gauss(h uint64) float64 {
	u1 := (float64(h>>32) + 1) * (1.0 / (1 << 32))
	u2 := float64(h&0xffffffff) * (1.0 / (1 << 32))
	return math.Sqrt(-2*math.Log(u1)) * math.Cos(2*math.Pi*u2)
}

// Render renders frame f. The bytes depend only on the options and f,
// not on GOMAXPROCS. It returns an error only when ctx is cancelled.
func (s *Scene) Render(ctx context.Context, f int) (*image.RGBA, error) {
	W, H := s.opts.Width, s.opts.Height
	buf, err := s.renderLinear(ctx, f)
	if err != nil {
		return nil, err
	}
	if s.opts.BlurSigma > 0 {
		if err := blur(ctx, buf, W, H, s.opts.BlurSigma); err != nil {
			return nil, err
		}
	}
	img := image.NewRGBA(image.Rect(0, 0, W, H))
	sigma := s.opts.NoiseSigma
	nseed := mix64(uint64(s.opts.Seed)^saltNoise) + uint64(f)*hk1
	err = parallelRows(ctx, H, func(y int) {
		for x := 0; x < W; x++ {
			i := y*W + x
			px := img.Pix[y*img.Stride+x*4:]
			for c := 0; c < 3; c++ {
				v := float64(buf[i*3+c])
				if sigma > 0 {
					v += sigma * gauss(mix64(nseed+uint64(i*3+c)*hk2))
				}
				v = math.Round(v)
				if v < 0 {
					v = 0
				} else if v > 255 {
					v = 255
				}
				px[c] = uint8(v)
			}
			px[3] = 255
		}
	})
	if err != nil {
		return nil, err
	}
	return img, nil
}

// ObjectMask returns a W×H row-major mask, true where the part covers the
// pixel centre in frame f.
func (s *Scene) ObjectMask(f int) []bool {
	fr := s.frame(f)
	W, H := s.opts.Width, s.opts.Height
	m := make([]bool, W*H)
	_ = parallelRows(context.Background(), H, func(y int) {
		for x := 0; x < W; x++ {
			o, d := s.ray(fr, float64(x), float64(y))
			_, face := intersectPart(o, d)
			m[y*W+x] = face != faceNone
		}
	})
	return m
}

// HighlightMask returns a W×H row-major mask, true where the specular term
// at the pixel centre exceeds 3 % of full scale (≈ 8 grey levels), for
// tests of appearance drift; nil when Options.Highlight is off.
func (s *Scene) HighlightMask(f int) []bool {
	fr := s.frame(f)
	if !s.opts.Highlight {
		return nil
	}
	W, H := s.opts.Width, s.opts.Height
	m := make([]bool, W*H)
	_ = parallelRows(context.Background(), H, func(y int) {
		for x := 0; x < W; x++ {
			o, d := s.ray(fr, float64(x), float64(y))
			t, face := intersectPart(o, d)
			if face == faceNone {
				continue
			}
			X := vec3{o[0] + t*d[0], o[1] + t*d[1], o[2] + t*d[2]}
			n := faceNormal(face, X)
			m[y*W+x] = s.specular(fr, n, d, dot(n, fr.light)) > highlightMin
		}
	})
	return m
}

// FrameName returns the file name WriteFrames uses for frame f: the index
// zero-padded to the width of the last index, at least 3 digits
// ("000.png", "001.png", …), so names sort in frame order.
func (s *Scene) FrameName(f int) string {
	s.frame(f)
	w := len(strconv.Itoa(len(s.frames) - 1))
	if w < 3 {
		w = 3
	}
	return fmt.Sprintf("%0*d.png", w, f)
}

// WriteFrames renders every frame into dir (created if missing) as PNG
// files named by FrameName, each written under a temporary name and
// renamed into place, and returns their paths. progress, if not nil, is
// called after each frame with the number done and the total.
func (s *Scene) WriteFrames(ctx context.Context, dir string, progress func(done, total int)) ([]string, error) {
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return nil, fmt.Errorf("synth: cannot create the output folder: %w", err)
	}
	paths := make([]string, 0, len(s.frames))
	for f := range s.frames {
		img, err := s.Render(ctx, f)
		if err != nil {
			return paths, err
		}
		p := filepath.Join(dir, s.FrameName(f))
		if err := writePNG(p, img); err != nil {
			return paths, err
		}
		paths = append(paths, p)
		if progress != nil {
			progress(f+1, len(s.frames))
		}
	}
	return paths, nil
}

func writePNG(path string, img image.Image) error {
	tmp, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".*.tmp")
	if err != nil {
		return fmt.Errorf("synth: cannot write frame %s: %w", path, err)
	}
	name := tmp.Name()
	fail := func(err error) error {
		tmp.Close()
		os.Remove(name)
		return fmt.Errorf("synth: cannot write frame %s: %w", path, err)
	}
	if err := png.Encode(tmp, img); err != nil {
		return fail(err)
	}
	if err := tmp.Close(); err != nil {
		os.Remove(name)
		return fmt.Errorf("synth: cannot write frame %s: %w", path, err)
	}
	if err := os.Rename(name, path); err != nil {
		os.Remove(name)
		return fmt.Errorf("synth: cannot write frame %s: %w", path, err)
	}
	return nil
}
