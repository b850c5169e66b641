package synth

import (
	"bytes"
	"context"
	"errors"
	"image"
	"image/png"
	"math"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"testing"
)

func render(t testing.TB, s *Scene, f int) *image.RGBA {
	t.Helper()
	img, err := s.Render(context.Background(), f)
	if err != nil {
		t.Fatal(err)
	}
	return img
}

// Rendering is a pure function of the options and the frame: the same
// bytes twice and with 1 or 2 goroutines, every optional stage on (noise,
// blur, backdrop, highlight) so each one's determinism is exercised.
func TestRenderDeterministic(t *testing.T) {
	o := Options{Projection: Pinhole, Backdrop: true, Highlight: true, NoiseSigma: 3, BlurSigma: 0.7, StepDeg: 5}
	if testing.Short() {
		o.Width, o.Height = 200, 150
	}
	s := mustNew(t, o)
	a := render(t, s, 3)
	b := render(t, s, 3)
	if !bytes.Equal(a.Pix, b.Pix) {
		t.Fatal("the same frame rendered twice differs")
	}
	prev := runtime.GOMAXPROCS(1)
	c := render(t, mustNew(t, o), 3)
	runtime.GOMAXPROCS(2)
	d := render(t, mustNew(t, o), 3)
	runtime.GOMAXPROCS(prev)
	if !bytes.Equal(a.Pix, c.Pix) || !bytes.Equal(c.Pix, d.Pix) {
		t.Fatal("GOMAXPROCS 1 and 2 give different bytes")
	}
	// The seed and the frame do matter (the comparisons above can fail).
	o2 := o
	o2.Seed = 2
	if bytes.Equal(a.Pix, render(t, mustNew(t, o2), 3).Pix) {
		t.Error("seeds 1 and 2 give the same image")
	}
	if bytes.Equal(a.Pix, render(t, s, 4).Pix) {
		t.Error("frames 3 and 4 give the same image")
	}
}

// grey converts to luma with the ITU-R BT.601 weights (as OpenCV's
// RGB2GRAY).
func grey(img *image.RGBA) []float64 {
	b := img.Bounds()
	g := make([]float64, b.Dx()*b.Dy())
	for y := 0; y < b.Dy(); y++ {
		for x := 0; x < b.Dx(); x++ {
			p := img.Pix[y*img.Stride+4*x:]
			g[y*b.Dx()+x] = 0.299*float64(p[0]) + 0.587*float64(p[1]) + 0.114*float64(p[2])
		}
	}
	return g
}

// minEigenMap is the Shi–Tomasi response (Shi & Tomasi 1994, "Good
// features to track"): the smaller eigenvalue of the structure tensor
// M = Σ_w [Ix² IxIy; IxIy Iy²] over a 5×5 window, with central-difference
// gradients; λmin = (a+c)/2 − √(((a−c)/2)² + b²).
func minEigenMap(g []float64, W, H int) []float64 {
	ix := make([]float64, W*H)
	iy := make([]float64, W*H)
	for y := 1; y < H-1; y++ {
		for x := 1; x < W-1; x++ {
			i := y*W + x
			ix[i] = (g[i+1] - g[i-1]) / 2
			iy[i] = (g[i+W] - g[i-W]) / 2
		}
	}
	out := make([]float64, W*H)
	for y := 3; y < H-3; y++ {
		for x := 3; x < W-3; x++ {
			var a, b, c float64
			for dy := -2; dy <= 2; dy++ {
				for dx := -2; dx <= 2; dx++ {
					i := (y+dy)*W + x + dx
					a += ix[i] * ix[i]
					b += ix[i] * iy[i]
					c += iy[i] * iy[i]
				}
			}
			h := (a - c) / 2
			out[y*W+x] = (a+c)/2 - math.Sqrt(h*h+b*b)
		}
	}
	return out
}

// countCorners counts 3×3 local maxima of the response above frac of its
// maximum (the quality-level rule of Shi–Tomasi detectors, common practice).
func countCorners(r []float64, W, H int, frac float64) int {
	mx := 0.0
	for _, v := range r {
		mx = math.Max(mx, v)
	}
	th := frac * mx
	n := 0
	for y := 1; y < H-1; y++ {
		for x := 1; x < W-1; x++ {
			v := r[y*W+x]
			if v <= th {
				continue
			}
			peak := true
			for dy := -1; dy <= 1 && peak; dy++ {
				for dx := -1; dx <= 1; dx++ {
					if (dx != 0 || dy != 0) && r[(y+dy)*W+x+dx] >= v {
						peak = false
						break
					}
				}
			}
			if peak {
				n++
			}
		}
	}
	return n
}

// The default frame must carry enough texture to track: at least 500
// Shi–Tomasi local maxima above 1 % of the strongest response (the brief's
// floor for the default view; measured: see the log).
func TestTextureHasCorners(t *testing.T) {
	s := mustNew(t, Options{})
	img := render(t, s, 0)
	W, H := s.opts.Width, s.opts.Height
	n := countCorners(minEigenMap(grey(img), W, H), W, H, 0.01)
	t.Logf("default frame: %d corners", n)
	if n < 500 {
		t.Errorf("default frame has %d corners, want ≥ 500", n)
	}
	// Only the part carries texture: the corners must be on it.
	mask := s.ObjectMask(0)
	r := minEigenMap(grey(img), W, H)
	for i, v := range r {
		if v > 0 && !near(mask, W, H, i, 4) {
			t.Fatalf("texture response %.3g at pixel %d, more than 4 px from the part", v, i)
		}
	}
}

// near reports whether a mask pixel lies within rad pixels of pixel i.
func near(mask []bool, W, H, i, rad int) bool {
	x0, y0 := i%W, i/W
	for y := max(0, y0-rad); y <= min(H-1, y0+rad); y++ {
		for x := max(0, x0-rad); x <= min(W-1, x0+rad); x++ {
			if mask[y*W+x] {
				return true
			}
		}
	}
	return false
}

// The default fit makes the part span 65 % of the image height over a full
// turn; in one frame the silhouette (the ObjectMask rows) must span 60–70 %
// as the brief asks, for both projections.
func TestDefaultFill(t *testing.T) {
	for _, proj := range []Projection{Orthographic, Pinhole} {
		s := mustNew(t, Options{Projection: proj, AnglesDeg: []float64{0, 25, 90}})
		for f := 0; f < s.Len(); f++ {
			m := s.ObjectMask(f)
			top, bot, left, right := s.opts.Height, -1, s.opts.Width, -1
			for i, v := range m {
				if v {
					x, y := i%s.opts.Width, i/s.opts.Width
					top, bot = min(top, y), max(bot, y)
					left, right = min(left, x), max(right, x)
				}
			}
			fill := float64(bot-top+1) / float64(s.opts.Height)
			if fill < 0.60 || fill > 0.70 {
				t.Errorf("%s frame %d: part spans %.3f of the height, want 0.60–0.70", proj, f, fill)
			}
			if left <= 0 || right >= s.opts.Width-1 || top <= 0 || bot >= s.opts.Height-1 {
				t.Errorf("%s frame %d: part touches the border", proj, f)
			}
		}
	}
}

// Without backdrop and noise the background is exactly BackgroundGrey, so
// every pixel more than one pixel away from the ObjectMask must have that
// value (anti-aliasing reaches at most half a pixel past a pixel centre),
// and a pixel whose whole neighbourhood is on the part must not.
func TestObjectMaskMatchesImage(t *testing.T) {
	s := mustNew(t, Options{Width: 320, Height: 240, StartDeg: 20})
	img := render(t, s, 0)
	m := s.ObjectMask(0)
	W, H := 320, 240
	bg := uint8(BackgroundGrey)
	inside, insideBg := 0, 0
	for i, v := range m {
		p := img.Pix[4*i : 4*i+3]
		isBg := p[0] == bg && p[1] == bg && p[2] == bg
		if !near(m, W, H, i, 1) && !isBg {
			t.Fatalf("pixel (%d,%d) away from the part is %v, want background", i%W, i/W, p)
		}
		if v && !nearOff(m, W, H, i) {
			inside++
			if isBg {
				insideBg++
			}
		}
	}
	if inside < 1000 || insideBg > inside/1000 {
		t.Errorf("%d of %d interior part pixels look like background", insideBg, inside)
	}
}

// nearOff reports whether a pixel next to i (3×3) is off the mask.
func nearOff(mask []bool, W, H, i int) bool {
	x0, y0 := i%W, i/W
	for y := max(0, y0-1); y <= min(H-1, y0+1); y++ {
		for x := max(0, x0-1); x <= min(W-1, x0+1); x++ {
			if !mask[y*W+x] {
				return true
			}
		}
	}
	return false
}

// The highlight is fixed to the light: its image region stays where the
// light's reflection is, so the part points under it change as the part
// turns (it slides over the surface), and inside HighlightMask the frame
// is brighter than the same frame rendered without the highlight.
func TestHighlight(t *testing.T) {
	o := Options{Width: 320, Height: 240, Highlight: true, AnglesDeg: []float64{0, 20}}
	s := mustNew(t, o)
	o.Highlight = false
	plain := mustNew(t, o)
	if plain.HighlightMask(0) != nil {
		t.Fatal("HighlightMask without Highlight is not nil")
	}
	var pts [2][3]float64
	for f := 0; f < 2; f++ {
		m := s.HighlightMask(f)
		a, b := grey(render(t, s, f)), grey(render(t, plain, f))
		n, diff := 0, 0.0
		var cx, cy float64
		for i, v := range m {
			if v {
				n++
				diff += a[i] - b[i]
				cx += float64(i % 320)
				cy += float64(i / 320)
			}
		}
		if n < 50 {
			t.Fatalf("frame %d: highlight covers %d pixels", f, n)
		}
		if diff/float64(n) < 8 {
			t.Errorf("frame %d: highlight adds %.1f grey levels on average, want ≥ 8", f, diff/float64(n))
		}
		// The brightest highlight pixel on the upper shaft: its part point.
		best, bi := 0.0, -1
		for i, v := range m {
			if X, ok := s.Raycast(f, float64(i%320), float64(i/320)); v && ok && surfaceFace(X) == faceUpperSide && a[i]-b[i] > best {
				best, bi = a[i]-b[i], i
			}
		}
		if bi < 0 {
			t.Fatalf("frame %d: no highlight on the upper shaft", f)
		}
		pts[f], _ = s.Raycast(f, float64(bi%320), float64(bi/320))
	}
	// 20° on the 7 mm shaft moves a surface point by 2.4 mm.
	if d := dist(pts[0], pts[1]); d < 1 {
		t.Errorf("the highlight stays on the same part point (moved %.2f mm)", d)
	}
}

func TestWriteFrames(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "frames")
	s := mustNew(t, Options{Width: 64, Height: 48, Frames: 3, NoiseSigma: 2})
	var calls [][2]int
	paths, err := s.WriteFrames(context.Background(), dir, func(d, n int) { calls = append(calls, [2]int{d, n}) })
	if err != nil {
		t.Fatal(err)
	}
	want := []string{"000.png", "001.png", "002.png"}
	if len(paths) != 3 || len(calls) != 3 || calls[2] != [2]int{3, 3} {
		t.Fatalf("paths %v, progress %v", paths, calls)
	}
	for f, p := range paths {
		if filepath.Base(p) != want[f] {
			t.Errorf("frame %d written as %s, want %s", f, filepath.Base(p), want[f])
		}
		fh, err := os.Open(p)
		if err != nil {
			t.Fatal(err)
		}
		img, err := png.Decode(fh)
		fh.Close()
		if err != nil {
			t.Fatal(err)
		}
		ref := render(t, s, f)
		for y := 0; y < 48; y++ {
			for x := 0; x < 64; x++ {
				r, g, b, _ := img.At(x, y).RGBA()
				q := ref.Pix[y*ref.Stride+4*x:]
				if uint8(r>>8) != q[0] || uint8(g>>8) != q[1] || uint8(b>>8) != q[2] {
					t.Fatalf("%s differs from Render at (%d,%d)", p, x, y)
				}
			}
		}
	}
	ents, _ := os.ReadDir(dir)
	if len(ents) != 3 {
		t.Errorf("folder holds %d entries (temporary files left?)", len(ents))
	}
	if n := mustNew(t, Options{Frames: 1000}).FrameName(999); n != "999.png" {
		t.Errorf("FrameName(999) of 1000 = %s", n)
	}
	if n := mustNew(t, Options{Frames: 1001}).FrameName(7); n != "0007.png" {
		t.Errorf("FrameName(7) of 1001 = %s", n)
	}
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if _, err := s.WriteFrames(ctx, dir, nil); !errors.Is(err, context.Canceled) {
		t.Errorf("cancelled WriteFrames: err = %v", err)
	}
}

func TestOptions(t *testing.T) {
	s := mustNew(t, Options{})
	o := s.Options()
	if o.Seed != 1 || o.Width != 640 || o.Height != 480 || o.Frames != 36 || o.StepDeg != 1 ||
		o.ElevationDeg != 20 || o.Projection != Orthographic || o.Supersample != 3 || o.FocalPx != 800 ||
		o.PixelsPerMM <= 0 || o.TextureCellMM != 1.6 {
		t.Errorf("resolved defaults %+v", o)
	}
	if s.Len() != 36 || s.AngleDeg(35) != 35 {
		t.Errorf("Len %d, AngleDeg(35) %g", s.Len(), s.AngleDeg(35))
	}
	// Resolved options rebuild the same scene.
	s2 := mustNew(t, o)
	R1, T1 := s.Camera(5)
	R2, T2 := s2.Camera(5)
	if R1 != R2 || T1 != T2 {
		t.Error("New(s.Options()) gives other cameras")
	}
	lvl := mustNew(t, Options{ElevationSet: true})
	if R, _ := lvl.Camera(0); lvl.Options().ElevationDeg != 0 || R[2] != [3]float64{0, 1, 0} {
		t.Errorf("ElevationSet with 0: view axis %v", R[2])
	}
	p := mustNew(t, Options{Projection: Pinhole})
	if d := p.Options().DistanceMM; d < 100 || d > 300 {
		t.Errorf("fitted pinhole distance %g mm", d)
	}
	un := mustNew(t, Options{AnglesDeg: []float64{5, 6, 20}})
	if un.Len() != 3 || un.AngleDeg(2) != 20 || un.Options().Frames != 3 {
		t.Errorf("explicit angles: Len %d, angle %g", un.Len(), un.AngleDeg(2))
	}
	bad := []struct {
		o     Options
		field string
	}{
		{Options{Width: -1}, "Width"},
		{Options{Height: 20000}, "Height"},
		{Options{Frames: -2}, "Frames"},
		{Options{StepDeg: math.NaN()}, "StepDeg"},
		{Options{AnglesDeg: []float64{0, math.Inf(1)}}, "AnglesDeg[1]"},
		{Options{ElevationDeg: 95}, "ElevationDeg"},
		{Options{Projection: "fisheye"}, "Projection"},
		{Options{PixelsPerMM: -1}, "PixelsPerMM"},
		{Options{FocalPx: -5}, "FocalPx"},
		{Options{Projection: Pinhole, DistanceMM: 20}, "DistanceMM"},
		{Options{Projection: Pinhole, FocalPx: 50}, "FocalPx"},
		{Options{NoiseSigma: -1}, "NoiseSigma"},
		{Options{Supersample: 9}, "Supersample"},
		{Options{BlurSigma: 100}, "BlurSigma"},
		{Options{TextureCellMM: 0.001}, "TextureCellMM"},
	}
	for _, c := range bad {
		_, err := New(c.o)
		var oe *OptionError
		if !errors.As(err, &oe) || oe.Field != c.field || !strings.HasPrefix(err.Error(), "synth: ") {
			t.Errorf("New(%+v): err = %v, want an OptionError on %s", c.o, err, c.field)
		}
	}
	func() {
		defer func() {
			if r := recover(); r == nil {
				t.Error("Camera(36) of 36 frames did not panic")
			}
		}()
		s.Camera(36)
	}()
}

// Benchmarks: the goal is well under 0.5 s per 640×480 frame at 3×3
// supersampling on 2 cores.
func BenchmarkRender640x480(b *testing.B) {
	for _, c := range []struct {
		name string
		o    Options
	}{
		{"orthographic", Options{}},
		{"pinhole", Options{Projection: Pinhole}},
		{"all-effects", Options{Projection: Pinhole, Backdrop: true, Highlight: true, NoiseSigma: 2, BlurSigma: 0.8}},
	} {
		b.Run(c.name, func(b *testing.B) {
			s := mustNew(b, c.o)
			render(b, s, 0) // backdrop cache
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				if _, err := s.Render(context.Background(), i%s.Len()); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

// Supersampling must be centred on the pixel centres of the convention
// Project uses (integer coordinates): with a level orthographic camera the
// upper shaft's left silhouette is the vertical line x_e = cx − 8·s, and a
// pixel x straddling it must miss the part with exactly the samples of the
// sub-columns x − 1/2 + (k + 1/2)/n < x_e. A half-pixel shift of the
// sample grid would change these counts. With 4.8 px/mm the edge is at
// 319.5 − 38.4 = 281.1, 0.6 px into pixel 281, which every n ≥ 2 splits.
func TestSupersampleGridCentred(t *testing.T) {
	for _, n := range []int{1, 2, 3, 8} {
		s := mustNew(t, Options{ElevationSet: true, Supersample: n, StartDeg: 7, PixelsPerMM: 4.8})
		fr := s.frame(0)
		_, _, cx, _ := s.Intrinsics()
		xe := cx - UpperShaftRadiusMM*s.opts.PixelsPerMM
		_, yr := s.Project(0, [3]float64{0, 0, 52})
		y := int(math.Round(yr))
		off := subOffsets(n)
		checked := 0
		for x := int(math.Floor(xe)) - 2; x <= int(math.Floor(xe))+2; x++ {
			var missed [MaxSupersample * MaxSupersample]uint8
			var r, g, b float64
			got := s.samplePixel(fr, x, y, off, &missed, &r, &g, &b)
			cols := 0
			for k := 0; k < n; k++ {
				if float64(x)-0.5+(float64(k)+0.5)/float64(n) < xe {
					cols++
				}
			}
			if got != n*cols {
				t.Errorf("n=%d pixel x=%d (edge at %.4f): %d samples miss, want %d", n, x, xe, got, n*cols)
			}
			if cols > 0 && cols < n {
				checked++
			}
		}
		if n > 1 && checked == 0 {
			t.Errorf("n=%d: no pixel straddles the edge at %.4f", n, xe)
		}
	}
}
