package track

import (
	"image"
	"math"
	"math/rand"
	"testing"

	"gocv.io/x/gocv"
)

// grayFloat loads a photograph as the smoothed float image refinement
// works on (σ = 0.7, as the tracker's default).
func grayFloat(tb testing.TB, path string) (*floatImage, func()) {
	tb.Helper()
	g := readGray(tb, path)
	f := gocv.NewMat()
	g.ConvertTo(&f, gocv.MatTypeCV32F)
	g.Close()
	gocv.GaussianBlur(f, &f, image.Point{}, 0.7, 0.7, gocv.BorderReflect101)
	p, err := f.DataPtrFloat32()
	if err != nil {
		tb.Fatal(err)
	}
	return &floatImage{w: f.Cols(), h: f.Rows(), pix: p}, func() { f.Close() }
}

// TestVectorKernelMatchesGo: the AVX2 kernel (cvshim.cpp) must compute the
// same sums as the plain Go loop, on a real photograph (opencv-doc
// graf1.png) for 2000 random patches (half-sizes 2..10, so strides 8..24
// with 1..7 padding lanes) under random affine warps near identity.
// Tolerance: 1e-5 of the sum's scale (Σ|terms|): the kernel accumulates in
// float32 over 8 lanes, the Go loop in float64; float32 has a relative
// precision of 6e-8, and a few hundred terms per lane stay far below this.
func TestVectorKernelMatchesGo(t *testing.T) {
	if !haveVectorKernel {
		t.Skip("no AVX2/FMA on this CPU; the Go loop is used everywhere")
	}
	im, done := grayFloat(t, extData(t, "graf1.png"))
	defer done()
	rng := rand.New(rand.NewSource(3))
	buf := make([]float32, 30*30)
	tested := 0
	for trial := 0; trial < 2000; trial++ {
		h := 2 + rng.Intn(9)
		x := 40 + rng.Float64()*float64(im.w-80)
		y := 40 + rng.Float64()*float64(im.h-80)
		p, ok := newRefPatch(im, x, y, h, buf)
		if !ok {
			continue
		}
		th := (rng.Float64() - 0.5) * 0.2
		sc := 1 + (rng.Float64()-0.5)*0.2
		m := [6]float64{sc * math.Cos(th), -sc * math.Sin(th), x + rng.Float64()*4 - 2,
			sc * math.Sin(th), sc * math.Cos(th), y + rng.Float64()*4 - 2}
		var a, b, scale patchSums
		p.sumsScalar(im, &m, h, true, &a)
		patchSumsVector(im, p, &m, h, &b)
		// Scale of each sum: the same sums of absolute values.
		abs := *p
		abs.t = make([]float32, len(p.t))
		abs.sd = make([]float32, len(p.sd))
		for i, v := range p.sd {
			abs.sd[i] = float32(math.Abs(float64(v)))
		}
		abs.sumsScalar(im, &m, h, true, &scale)
		for q := 0; q < 6; q++ {
			if d := math.Abs(a.b[q] - b.b[q]); d > 1e-5*scale.b[q]+1e-9 {
				t.Fatalf("half %d b[%d]: Go %g, kernel %g (scale %g)", h, q, a.b[q], b.b[q], scale.b[q])
			}
		}
		for _, c := range [][3]float64{{a.si, b.si, scale.si}, {a.sii, b.sii, scale.sii}, {a.sit, b.sit, math.Abs(a.sit) + scale.si*255}} {
			if math.Abs(c[0]-c[1]) > 1e-5*c[2] {
				t.Fatalf("half %d intensity sums: Go %g, kernel %g", h, c[0], c[1])
			}
		}
		tested++
	}
	if tested < 1500 {
		t.Fatalf("only %d patches had texture enough", tested)
	}
}
