package track

import (
	"context"
	"fmt"
	"image"
	"image/color"
	"math"
	"math/rand"
	"os"
	"path/filepath"
	"sort"
	"testing"

	"gocv.io/x/gocv"
)

// extData returns the path of a file of Debian's opencv-doc package
// (examples/data), fetched into testdata/ext by scripts/fetch-testdata.sh.
// Under -short a missing file skips the test; in the full run it fails.
func extData(tb testing.TB, name string) string {
	tb.Helper()
	p := filepath.Join("..", "testdata", "ext", "opencv-doc", "examples", "data", name)
	if _, err := os.Stat(p); err != nil {
		if testing.Short() {
			tb.Skipf("opencv-doc test data absent (%s); run scripts/fetch-testdata.sh", name)
		}
		tb.Fatalf("opencv-doc test data absent (%s); run scripts/fetch-testdata.sh first", name)
	}
	return p
}

// readGray loads an image file as 8-bit greyscale.
func readGray(tb testing.TB, path string) gocv.Mat {
	tb.Helper()
	m := gocv.IMRead(path, gocv.IMReadGrayScale)
	if m.Empty() {
		tb.Fatalf("cannot decode %s", path)
	}
	return m
}

// matToGray copies an 8-bit greyscale Mat into an image.Gray.
func matToGray(tb testing.TB, m gocv.Mat) *image.Gray {
	tb.Helper()
	if m.Type() != gocv.MatTypeCV8UC1 {
		tb.Fatalf("matToGray: type %v", m.Type())
	}
	g := image.NewGray(image.Rect(0, 0, m.Cols(), m.Rows()))
	for y := 0; y < m.Rows(); y++ {
		for x := 0; x < m.Cols(); x++ {
			g.Pix[y*g.Stride+x] = m.GetUCharAt(y, x)
		}
	}
	return g
}

// percentile returns the p-th percentile (0..100, nearest rank) of v.
func percentile(v []float64, p float64) float64 {
	if len(v) == 0 {
		return math.NaN()
	}
	s := append([]float64(nil), v...)
	sort.Float64s(s)
	k := int(math.Ceil(p/100*float64(len(s)))) - 1
	if k < 0 {
		k = 0
	}
	if k >= len(s) {
		k = len(s) - 1
	}
	return s[k]
}

// noiseImage makes a smooth random texture (sum of random blobs) for
// tests that need no external data. Invented data.
func noiseImage(w, h int, seed int64) *image.RGBA {
	rng := rand.New(rand.NewSource(seed))
	f := make([]float64, w*h)
	for k := 0; k < w*h/40; k++ {
		cx, cy := rng.Float64()*float64(w), rng.Float64()*float64(h)
		r := 1.5 + rng.Float64()*3
		a := rng.Float64()*2 - 1
		x0, x1 := int(cx-3*r), int(cx+3*r)
		y0, y1 := int(cy-3*r), int(cy+3*r)
		for y := max(0, y0); y <= min(h-1, y1); y++ {
			for x := max(0, x0); x <= min(w-1, x1); x++ {
				dx, dy := float64(x)-cx, float64(y)-cy
				f[y*w+x] += a * math.Exp(-(dx*dx+dy*dy)/(2*r*r))
			}
		}
	}
	im := image.NewRGBA(image.Rect(0, 0, w, h))
	for i, v := range f {
		g := uint8(math.Max(0, math.Min(255, 128+60*v)))
		im.Set(i%w, i/w, color.RGBA{g, uint8(255 - int(g)), g / 2, 255})
	}
	return im
}

// matSource is a Source over BGR Mats owned by the test.
type matSource struct {
	mats  []gocv.Mat
	names []string
}

func (s *matSource) Len() int          { return len(s.mats) }
func (s *matSource) Name(i int) string { return s.names[i] }
func (s *matSource) Size() (int, int)  { return s.mats[0].Cols(), s.mats[0].Rows() }
func (s *matSource) Close() error {
	for i := range s.mats {
		s.mats[i].Close()
	}
	return nil
}
func (s *matSource) Read(_ context.Context, i int, dst *gocv.Mat) error {
	s.mats[i].CopyTo(dst)
	return nil
}

// warpSequence makes frames k = 0..n-1 of img warped by affine(k) (2×3,
// destination = A·source + t) with the given interpolation, borders
// replicated.
func warpSequence(tb testing.TB, img gocv.Mat, n int, affine func(k int) [6]float64, interp gocv.InterpolationFlags) *matSource {
	tb.Helper()
	s := &matSource{}
	for k := 0; k < n; k++ {
		a := affine(k)
		m := gocv.NewMatWithSize(2, 3, gocv.MatTypeCV64F)
		for i := 0; i < 6; i++ {
			m.SetDoubleAt(i/3, i%3, a[i])
		}
		dst := gocv.NewMat()
		gocv.WarpAffineWithParams(img, &dst, m, image.Pt(img.Cols(), img.Rows()), interp, gocv.BorderReplicate, color.RGBA{})
		m.Close()
		s.mats = append(s.mats, dst)
		s.names = append(s.names, fmt.Sprintf("warp-%02d", k))
	}
	return s
}

// applyAffine maps p by a (2×3 row-major).
func applyAffine(a [6]float64, x, y float64) (float64, float64) {
	return a[0]*x + a[1]*y + a[2], a[3]*x + a[4]*y + a[5]
}

// invAffine inverts a 2×3 affine map.
func invAffine(a [6]float64) [6]float64 {
	det := a[0]*a[4] - a[1]*a[3]
	i0, i1, i3, i4 := a[4]/det, -a[1]/det, -a[3]/det, a[0]/det
	return [6]float64{i0, i1, -(i0*a[2] + i1*a[5]), i3, i4, -(i3*a[2] + i4*a[5])}
}

// warpSequenceSS makes frames like warpSequence but warps a ss× upsampled
// copy (bicubic) with bilinear interpolation and averages back down
// (INTER_AREA), so every frame, frame 0 included, integrates light over
// its pixels like a camera and the interpolation's blur is ss times
// smaller than a pixel.
func warpSequenceSS(tb testing.TB, img gocv.Mat, n int, affine func(k int) [6]float64, ss int) *matSource {
	tb.Helper()
	big := gocv.NewMat()
	defer big.Close()
	// Upsampling maps pixel centre x to ss·x + (ss−1)/2 (OpenCV's resize
	// aligns pixel areas, not centres).
	gocv.Resize(img, &big, image.Pt(img.Cols()*ss, img.Rows()*ss), 0, 0, gocv.InterpolationCubic)
	s := &matSource{}
	c := float64(ss-1) / 2
	for k := 0; k < n; k++ {
		a := affine(k)
		// Conjugate the warp into the big image's coordinates:
		// X = ss·x + c, so A' = A, t' = ss·t + c·(I − A)·1.
		ab := [6]float64{a[0], a[1], float64(ss)*a[2] + c*(1-a[0]-a[1]), a[3], a[4], float64(ss)*a[5] + c*(1-a[3]-a[4])}
		m := gocv.NewMatWithSize(2, 3, gocv.MatTypeCV64F)
		for i := 0; i < 6; i++ {
			m.SetDoubleAt(i/3, i%3, ab[i])
		}
		w := gocv.NewMat()
		gocv.WarpAffineWithParams(big, &w, m, image.Pt(big.Cols(), big.Rows()), gocv.InterpolationLinear, gocv.BorderReplicate, color.RGBA{})
		m.Close()
		dst := gocv.NewMat()
		gocv.Resize(w, &dst, image.Pt(img.Cols(), img.Rows()), 0, 0, gocv.InterpolationArea)
		w.Close()
		s.mats = append(s.mats, dst)
		s.names = append(s.names, fmt.Sprintf("warp-%02d", k))
	}
	return s
}

// occluderFrames composites an invented sliding occluder over frames: a
// flat grey (110) vertical bar of width w px whose left edge is at
// x0 + v·f in frame f, anti-aliased by area coverage, with Gaussian noise
// of σ = 1 grey level (seeded) so that it looks like the rest of the frame.
// cov(f, x) is the bar's coverage of the pixel column centred at x.
func occluderFrames(imgs []image.Image, x0, v, w float64, seed int64) (out []image.Image, cov func(f int, x float64) float64) {
	cov = func(f int, x float64) float64 {
		a := x0 + v*float64(f)
		return math.Max(0, math.Min(x+0.5, a+w)-math.Max(x-0.5, a))
	}
	rng := rand.New(rand.NewSource(seed))
	for f, im := range imgs {
		b := im.Bounds()
		dst := image.NewRGBA(image.Rect(0, 0, b.Dx(), b.Dy()))
		for y := 0; y < b.Dy(); y++ {
			for x := 0; x < b.Dx(); x++ {
				r, g, bb, _ := im.At(b.Min.X+x, b.Min.Y+y).RGBA()
				c := math.Min(1, cov(f, float64(x)))
				px := [3]float64{float64(r >> 8), float64(g >> 8), float64(bb >> 8)}
				if c > 0 {
					n := rng.NormFloat64()
					for k := range px {
						px[k] = (1-c)*px[k] + c*(110+n)
					}
				}
				o := dst.PixOffset(x, y)
				for k := range px {
					dst.Pix[o+k] = uint8(math.Max(0, math.Min(255, math.Round(px[k]))))
				}
				dst.Pix[o+3] = 255
			}
		}
		out = append(out, dst)
	}
	return out, cov
}
