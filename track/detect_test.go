package track

import (
	"image"
	"math"
	"testing"

	"gocv.io/x/gocv"
)

// TestDetectMatchesOpenCV checks the re-implemented corner selection
// against OpenCV's own goodFeaturesToTrack (gocv.GoodFeaturesToTrack, the
// reference library) on a real photograph (opencv-doc graf1.png), with the
// defaults both share (blockSize 3, no mask) and sub-pixel refinement off.
func TestDetectMatchesOpenCV(t *testing.T) {
	gray := readGray(t, extData(t, "graf1.png"))
	defer gray.Close()
	for _, tc := range []struct {
		max     int
		quality float64
		minDist float64
	}{{1000, 0.01, 7}, {300, 0.05, 15}, {2000, 0.001, 3}} {
		ref := gocv.NewMat()
		gocv.GoodFeaturesToTrack(gray, &ref, tc.max, tc.quality, tc.minDist)
		rp, _ := ref.DataPtrFloat32()
		got, err := Detect(gray, DetectOptions{MaxCorners: tc.max, Quality: tc.quality, MinDistance: tc.minDist, SubPixHalfWin: -1})
		if err != nil {
			t.Fatal(err)
		}
		n := len(rp) / 2
		// Scores differ from OpenCV's by float rounding only (the box filter
		// normalises, cornerMinEigenVal does not); near-ties may swap order,
		// which can change a corner or two and, through MinDistance, its
		// neighbours. Tolerance: 99% of OpenCV's corners found at the same
		// integer pixel, and the same count ±1%.
		set := map[[2]int]bool{}
		for _, c := range got {
			set[[2]int{int(c.X), int(c.Y)}] = true
		}
		same := 0
		for i := 0; i < n; i++ {
			if set[[2]int{int(math.Round(float64(rp[2*i]))), int(math.Round(float64(rp[2*i+1])))}] {
				same++
			}
		}
		ref.Close()
		t.Logf("max %d q %g d %g: OpenCV %d corners, ours %d, %d at the same pixel", tc.max, tc.quality, tc.minDist, n, len(got), same)
		if n < 100 {
			t.Fatalf("OpenCV found only %d corners on graf1.png; test image unsuitable", n)
		}
		if float64(same) < 0.99*float64(n) || math.Abs(float64(len(got)-n)) > 0.01*float64(n) {
			t.Errorf("ours differ from goodFeaturesToTrack: %d of %d same, %d vs %d corners", same, n, len(got), n)
		}
	}
}

// TestDetectMaskBorderDistance: corners only where the mask allows, at
// least Border px from the edges, and never closer than MinDistance.
func TestDetectMaskBorderDistance(t *testing.T) {
	gray := readGray(t, extData(t, "graf1.png"))
	defer gray.Close()
	w, h := gray.Cols(), gray.Rows()
	mask := make([]bool, w*h)
	for y := 0; y < h; y++ {
		for x := 0; x < w/2; x++ {
			mask[y*w+x] = true
		}
	}
	// Sub-pixel refinement off: MinDistance is enforced on the detected
	// pixels (as in goodFeaturesToTrack); refinement may then move a
	// corner by up to its half window.
	got, err := Detect(gray, DetectOptions{Mask: mask, Border: 20, MinDistance: 12, MaxCorners: 400, SubPixHalfWin: -1})
	if err != nil {
		t.Fatal(err)
	}
	if len(got) < 200 {
		t.Fatalf("only %d corners in the left half", len(got))
	}
	for i, c := range got {
		if c.X >= float64(w/2) || c.X < 20 || c.Y < 20 || c.X >= float64(w-20) || c.Y >= float64(h-20) {
			t.Errorf("corner (%.2f, %.2f) outside the mask or the border", c.X, c.Y)
		}
		for _, d := range got[:i] {
			if math.Hypot(c.X-d.X, c.Y-d.Y) < 12 {
				t.Errorf("corners (%.1f,%.1f) and (%.1f,%.1f) closer than MinDistance", c.X, c.Y, d.X, d.Y)
			}
		}
	}
	if _, err := Detect(gray, DetectOptions{Mask: mask[:10]}); err == nil {
		t.Errorf("a mask of the wrong size was accepted")
	}
}

// TestDetectSubPixel renders ideal chessboard X-junctions at known
// sub-pixel positions (each pixel the area average of the pattern, 32×32
// samples, then a Gaussian PSF of σ = 1 px, symmetric about the junction)
// and checks the refined corner lies within 0.1 px of the truth and closer
// than the nearest pixel centre. A blurred saddle satisfies cornerSubPix's
// orthogonality condition at the junction; what is left is the bias of
// its gradient sampling through bilinear resampling, measured here at up
// to 0.06 px (0.1 px without the blur), so 0.1 px is the bound. Invented
// pattern.
func TestDetectSubPixel(t *testing.T) {
	for _, c0 := range [][2]float64{{30.3, 25.7}, {31.5, 24.0}, {29.82, 26.41}} {
		const w, h, ss = 64, 52, 32
		m := gocv.NewMatWithSize(h, w, gocv.MatTypeCV8UC1)
		for y := 0; y < h; y++ {
			for x := 0; x < w; x++ {
				n := 0
				for j := 0; j < ss; j++ {
					for i := 0; i < ss; i++ {
						// pixel (x,y) covers [x−0.5, x+0.5)
						px := float64(x) - 0.5 + (float64(i)+0.5)/ss
						py := float64(y) - 0.5 + (float64(j)+0.5)/ss
						if (px < c0[0]) != (py < c0[1]) {
							n++
						}
					}
				}
				m.SetUCharAt(y, x, uint8(40+170*n/(ss*ss)))
			}
		}
		gocv.GaussianBlur(m, &m, image.Pt(0, 0), 1, 1, gocv.BorderReflect101)
		got, err := Detect(m, DetectOptions{MaxCorners: 1})
		m.Close()
		if err != nil || len(got) != 1 {
			t.Fatalf("corner at %v: %v %v", c0, got, err)
		}
		e := math.Hypot(got[0].X-c0[0], got[0].Y-c0[1])
		t.Logf("true (%.2f, %.2f) found (%.3f, %.3f), error %.4f px", c0[0], c0[1], got[0].X, got[0].Y, e)
		ei := math.Hypot(math.Round(c0[0])-c0[0], math.Round(c0[1])-c0[1])
		if e > 0.1 || (ei > 0.1 && e >= ei) {
			t.Errorf("sub-pixel error %.4f px (limit 0.1; nearest pixel centre %.4f px)", e, ei)
		}
	}
}
