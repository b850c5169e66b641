package track

import (
	"fmt"
	"image"
	"math"
	"slices"

	"gocv.io/x/gocv"
)

// DetectOptions configures Shi–Tomasi corner detection with sub-pixel
// refinement. The zero value of every field means its default.
type DetectOptions struct {
	// MaxCorners is the most corners returned, strongest first.
	// Default 1000.
	MaxCorners int
	// Quality is the fraction of the strongest corner's score below which
	// corners are rejected (OpenCV's qualityLevel). Default 0.01.
	Quality float64
	// MinDistance is the smallest distance in pixels between two returned
	// corners. Default 7. Negative means no minimum.
	MinDistance float64
	// BlockSize is the side in pixels of the window over which the
	// gradient covariance is summed (odd, ≥ 3). Default 3.
	BlockSize int
	// SubPixHalfWin is the half-size of the cornerSubPix search window:
	// the window is (2·SubPixHalfWin+1)² pixels. Default 5 (11×11).
	// Negative turns sub-pixel refinement off.
	SubPixHalfWin int
	// Border keeps corners at least this many pixels from every image
	// edge. Default 0 (anywhere inside the first and last row/column,
	// as OpenCV's goodFeaturesToTrack).
	Border int
	// Mask, if not nil, restricts detection: row-major, Width·Height
	// entries, true where corners are allowed (synth.Scene.ObjectMask has
	// this layout; MaskFromImage converts an image).
	Mask []bool
}

const (
	defaultMaxCorners    = 1000
	defaultQuality       = 0.01
	defaultMinDistance   = 7.0
	defaultBlockSize     = 3
	defaultSubPixHalfWin = 5
	// subPixMaxIter and subPixEps stop cornerSubPix after 20 iterations
	// or when the corner moves less than 0.001 px in one iteration. (On a
	// photograph, opencv-doc graf1.png, many corners never meet 0.001 px
	// and run to the limit; 20 instead of 40 iterations halves the cost
	// and changed neither TestDetectSubPixel's errors nor the tracking
	// errors of TestBenchParity, measured.)
	subPixMaxIter = 20
	subPixEps     = 0.001
	// subPixSplit: from twice this many corners, sub-pixel refinement
	// runs in two parallel halves.
	subPixSplit = 64
)

// withDefaults fills in the defaults. It is idempotent: "off" values stay
// negative, so applying it twice (a caller's WithDefaults, then Run's)
// changes nothing.
func (o DetectOptions) withDefaults() DetectOptions {
	if o.MaxCorners == 0 {
		o.MaxCorners = defaultMaxCorners
	}
	if o.Quality == 0 {
		o.Quality = defaultQuality
	}
	if o.MinDistance == 0 {
		o.MinDistance = defaultMinDistance
	}
	if o.BlockSize == 0 {
		o.BlockSize = defaultBlockSize
	}
	if o.SubPixHalfWin == 0 {
		o.SubPixHalfWin = defaultSubPixHalfWin
	}
	return o
}

// Validate reports the first option that breaks its rule.
func (o DetectOptions) Validate() error {
	switch {
	case o.MaxCorners < 0:
		return fmt.Errorf("track: detect MaxCorners %d is negative; use 0 for the default %d or a positive count", o.MaxCorners, defaultMaxCorners)
	case o.Quality < 0 || o.Quality >= 1 || math.IsNaN(o.Quality):
		return fmt.Errorf("track: detect Quality %g is outside [0,1); use a fraction such as 0.01", o.Quality)
	case math.IsNaN(o.MinDistance) || math.IsInf(o.MinDistance, 0):
		return fmt.Errorf("track: detect MinDistance %g is not a finite number of pixels", o.MinDistance)
	case o.BlockSize < 0 || (o.BlockSize != 0 && (o.BlockSize < 3 || o.BlockSize%2 == 0)):
		return fmt.Errorf("track: detect BlockSize %d must be odd and at least 3 (0 = default %d)", o.BlockSize, defaultBlockSize)
	case o.Border < 0:
		return fmt.Errorf("track: detect Border %d is negative; give a margin in pixels ≥ 0", o.Border)
	}
	return nil
}

// Corner is a detected corner: its position (pixel centres at integer
// coordinates) and its Shi–Tomasi score (the smaller eigenvalue of the
// gradient covariance, for an 8-bit image scaled as OpenCV's
// cornerMinEigenVal).
type Corner struct {
	X, Y  float64
	Score float64
}

// MaskFromImage turns an image into a detection mask: true where the
// pixel's grey level is above half, row-major over the image's bounds.
func MaskFromImage(im image.Image) []bool {
	b := im.Bounds()
	m := make([]bool, 0, b.Dx()*b.Dy())
	for y := b.Min.Y; y < b.Max.Y; y++ {
		for x := b.Min.X; x < b.Max.X; x++ {
			r, g, bb, _ := im.At(x, y).RGBA()
			m = append(m, 299*r+587*g+114*bb > 1000*0x7fff)
		}
	}
	return m
}

// Detect finds Shi–Tomasi corners in an 8-bit greyscale image (CV_8UC1)
// and refines them to sub-pixel accuracy.
//
// The score is the smaller eigenvalue of the gradient covariance summed
// over a BlockSize² window (Shi & Tomasi, "Good features to track", CVPR
// 1994, eq. 7–9 for the criterion min(λ1, λ2) > λ):
//
//	M = Σ_w [gx² gxgy; gxgy gy²],  λmin = (a+c) − √((a−c)² + b²)
//
// with a = M11/2, b = M12, c = M22/2 and gx, gy 3×3 Sobel derivatives
// scaled by 1/(4·255·BlockSize): OpenCV's cornerMinEigenVal, called
// through the cgo shim (cvshim.cpp). Corners are local maxima over 3×3
// above Quality·max, taken strongest first, skipping any within
// MinDistance of one already taken (the selection of OpenCV's
// goodFeaturesToTrack, re-implemented here because gocv v0.31.0 exposes
// neither its mask nor its blockSize). Sub-pixel refinement is
// OpenCV's cornerSubPix (Förstner's gradient-orthogonality estimator).
func Detect(gray gocv.Mat, opts DetectOptions) ([]Corner, error) {
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	if gray.Type() != gocv.MatTypeCV8UC1 {
		panic(fmt.Sprintf("track: Detect needs an 8-bit greyscale Mat, got type %v", gray.Type()))
	}
	d := newDetector()
	defer d.close()
	o := opts.withDefaults()
	if o.Mask != nil && len(o.Mask) != gray.Rows()*gray.Cols() {
		return nil, fmt.Errorf("track: detect mask has %d entries for a %dx%d image; give Width·Height = %d", len(o.Mask), gray.Cols(), gray.Rows(), gray.Rows()*gray.Cols())
	}
	return d.detect(gray, o, o.Mask, nil), nil
}

// detector holds the buffers of repeated detection on frames of one size.
type detector struct {
	pts            gocv.Mat // N×1 CV_32FC2 for cornerSubPix
	crit           gocv.TermCriteria
	eig            []float32
	cand           []int32
	cellHead, next []int32
	kept           []Corner
	errbuf         [256]byte
	// both, when set, runs two functions in parallel and waits for them
	// (the tracker's refinePool.both); nil runs everything in line.
	both func(a, b func())
}

func newDetector() *detector {
	return &detector{
		pts:  gocv.NewMat(),
		crit: gocv.NewTermCriteria(gocv.Count|gocv.EPS, subPixMaxIter, subPixEps),
	}
}

func (d *detector) close() { d.pts.Close() }

// minEigen computes the Shi–Tomasi score of every pixel into d.eig with
// OpenCV's cornerMinEigenVal (3×3 Sobel, BORDER_REFLECT_101, the score
// goodFeaturesToTrack uses), through the cgo shim.
func (d *detector) minEigen(gray gocv.Mat, blockSize int) {
	w, h := gray.Cols(), gray.Rows()
	if cap(d.eig) < w*h {
		d.eig = make([]float32, w*h)
	}
	d.eig = d.eig[:w*h]
	cornerMinEigen(gray, blockSize, d.eig, d.errbuf[:])
}

// detect runs detection with options o (defaults applied). allowed, when
// not nil, is a row-major mask (true = allowed); extra, when not nil, is a
// second mask of the same layout (0 = blocked), used by the tracker to
// keep new corners away from live tracks. The result aliases d.kept.
func (d *detector) detect(gray gocv.Mat, o DetectOptions, allowed []bool, extra []uint8) []Corner {
	w, h := gray.Cols(), gray.Rows()
	d.kept = d.kept[:0]
	if w < 3 || h < 3 {
		return d.kept
	}
	d.minEigen(gray, o.BlockSize)
	ok := func(i int) bool {
		return (allowed == nil || allowed[i]) && (extra == nil || extra[i] != 0)
	}
	// Strongest score inside the mask (OpenCV: minMaxLoc with the mask).
	maxV := float32(0)
	for i, v := range d.eig {
		if v > maxV && ok(i) {
			maxV = v
		}
	}
	thr := float32(float64(maxV) * o.Quality)
	b := o.Border
	if b < 1 {
		b = 1
	}
	d.cand = d.cand[:0]
	e := d.eig
	for y := b; y < h-b; y++ {
		for x := b; x < w-b; x++ {
			i := y*w + x
			v := e[i]
			if v <= thr || v == 0 || !ok(i) {
				continue
			}
			// 3×3 local maximum (OpenCV: value equal to its dilation).
			if e[i-w-1] > v || e[i-w] > v || e[i-w+1] > v || e[i-1] > v ||
				e[i+1] > v || e[i+w-1] > v || e[i+w] > v || e[i+w+1] > v {
				continue
			}
			d.cand = append(d.cand, int32(i))
		}
	}
	// Strongest first; equal scores: higher address first (OpenCV's
	// greaterThanPtr), so the order matches goodFeaturesToTrack.
	slices.SortFunc(d.cand, func(p, q int32) int {
		a, c := e[p], e[q]
		switch {
		case a > c:
			return -1
		case a < c:
			return 1
		}
		return int(q - p)
	})
	if o.MinDistance >= 1 { // negative (no minimum) and < 1 skip the grid
		cell := int(math.Round(o.MinDistance))
		gw, gh := (w+cell-1)/cell, (h+cell-1)/cell
		if cap(d.cellHead) < gw*gh {
			d.cellHead = make([]int32, gw*gh)
		}
		d.cellHead = d.cellHead[:gw*gh]
		for i := range d.cellHead {
			d.cellHead[i] = -1
		}
		d.next = d.next[:0]
		md2 := float32(o.MinDistance * o.MinDistance)
		for _, ci := range d.cand {
			x, y := int(ci)%w, int(ci)/w
			xc, yc := x/cell, y/cell
			good := true
		search:
			for yy := max(0, yc-1); yy <= min(gh-1, yc+1); yy++ {
				for xx := max(0, xc-1); xx <= min(gw-1, xc+1); xx++ {
					for k := d.cellHead[yy*gw+xx]; k >= 0; k = d.next[k] {
						p := d.kept[k]
						dxf, dyf := float32(x)-float32(p.X), float32(y)-float32(p.Y)
						if dxf*dxf+dyf*dyf < md2 {
							good = false
							break search
						}
					}
				}
			}
			if !good {
				continue
			}
			d.next = append(d.next, d.cellHead[yc*gw+xc])
			d.cellHead[yc*gw+xc] = int32(len(d.kept))
			d.kept = append(d.kept, Corner{X: float64(x), Y: float64(y), Score: float64(e[ci])})
			if len(d.kept) == o.MaxCorners {
				break
			}
		}
	} else {
		for _, ci := range d.cand {
			d.kept = append(d.kept, Corner{X: float64(int(ci) % w), Y: float64(int(ci) / w), Score: float64(e[ci])})
			if len(d.kept) == o.MaxCorners {
				break
			}
		}
	}
	if o.SubPixHalfWin > 0 && len(d.kept) > 0 {
		d.subPix(gray, o.SubPixHalfWin)
	}
	return d.kept
}

// subPix refines d.kept in place with OpenCV's cornerSubPix. A corner the
// refinement moves out of the image keeps its integer position.
func (d *detector) subPix(gray gocv.Mat, half int) {
	n := len(d.kept)
	if d.pts.Rows() != n {
		d.pts.Close()
		d.pts = gocv.NewMatWithSize(n, 1, gocv.MatTypeCV32FC2)
	}
	p, _ := d.pts.DataPtrFloat32()
	for i, c := range d.kept {
		p[2*i], p[2*i+1] = float32(c.X), float32(c.Y)
	}
	// cornerSubPix works on each corner alone and runs on one thread:
	// many corners are split in two halves refined in parallel (d.both,
	// the tracker's worker pool).
	win, zero := image.Pt(half, half), image.Pt(-1, -1)
	if n >= 2*subPixSplit && d.both != nil {
		a, b := d.pts.RowRange(0, n/2), d.pts.RowRange(n/2, n)
		d.both(func() { gocv.CornerSubPix(gray, &a, win, zero, d.crit) },
			func() { gocv.CornerSubPix(gray, &b, win, zero, d.crit) })
		a.Close()
		b.Close()
	} else {
		gocv.CornerSubPix(gray, &d.pts, win, zero, d.crit)
	}
	p, _ = d.pts.DataPtrFloat32()
	w, h := float64(gray.Cols()-1), float64(gray.Rows()-1)
	for i := range d.kept {
		x, y := float64(p[2*i]), float64(p[2*i+1])
		if x >= 0 && y >= 0 && x <= w && y <= h && !math.IsNaN(x) && !math.IsNaN(y) {
			d.kept[i].X, d.kept[i].Y = x, y
		}
	}
}
