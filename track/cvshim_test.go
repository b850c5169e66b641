package track

import (
	"image"
	"math"
	"testing"

	"gocv.io/x/gocv"
)

// TestShimMatchesOpenCV: LK on pyramids built once (the cgo shim around
// buildOpticalFlowPyramid and calcOpticalFlowPyrLK) must give what gocv's
// calcOpticalFlowPyrLK on plain Mats gives (OpenCV then builds both
// pyramids and their derivatives itself, with the same default borders),
// for every maxLevel 0..3, with and without initial flow, forward and
// backward. Real photograph: opencv-doc graf1.png shifted by (1.3, −0.6) px
// (bilinear warpAffine). OpenCV computes each point alone, so the results
// must agree to float rounding: tolerance 1e-4 px in position and 1e-6 in
// the minimum eigenvalue, status identical. The level count the shim
// reports must equal pyramidLevels, the rule the tracker clamps with.
func TestShimMatchesOpenCV(t *testing.T) {
	img := gocv.IMRead(extData(t, "graf1.png"), gocv.IMReadColor)
	defer img.Close()
	seq := warpSequence(t, img, 2, func(k int) [6]float64 {
		return [6]float64{1, 0, 1.3 * float64(k), 0, 1, -0.6 * float64(k)}
	}, gocv.InterpolationLinear)
	defer seq.Close()
	g0, g1 := gocv.NewMat(), gocv.NewMat()
	defer g0.Close()
	defer g1.Close()
	gocv.CvtColor(seq.mats[0], &g0, gocv.ColorBGRToGray)
	gocv.CvtColor(seq.mats[1], &g1, gocv.ColorBGRToGray)
	corners, err := Detect(g0, DetectOptions{MaxCorners: 500})
	if err != nil {
		t.Fatal(err)
	}
	n := len(corners)
	if n < 400 {
		t.Fatalf("only %d corners on graf1.png", n)
	}
	const win = 21
	p0, p1 := newLKPyramid(), newLKPyramid()
	defer p0.close()
	defer p1.close()
	if got, want := p0.build(g0, win, 3), pyramidLevels(g0.Cols(), g0.Rows(), win, 3); got != want {
		t.Fatalf("shim built %d levels, pyramidLevels says %d", got, want)
	}
	p1.build(g1, win, 3)
	// Small frames: OpenCV stops early, and so must pyramidLevels.
	small := gocv.NewMat()
	gocv.Resize(g0, &small, image.Pt(100, 80), 0, 0, gocv.InterpolationArea)
	ps := newLKPyramid()
	if got, want := ps.build(small, win, 5), pyramidLevels(100, 80, win, 5); got != want {
		t.Errorf("100x80 frame: shim built %d levels, pyramidLevels says %d", got, want)
	}
	ps.close()
	small.Close()

	pts := make([]float32, 2*n)
	for i, c := range corners {
		pts[2*i], pts[2*i+1] = float32(c.X), float32(c.Y)
	}
	in := gocv.NewMatWithSize(n, 1, gocv.MatTypeCV32FC2)
	defer in.Close()
	ip, _ := in.DataPtrFloat32()
	copy(ip, pts)
	crit := gocv.NewTermCriteria(gocv.Count|gocv.EPS, 30, 0.01)
	for _, dir := range []string{"forward", "backward"} {
		pa, pb, ma, mb := p0, p1, g0, g1
		if dir == "backward" {
			pa, pb, ma, mb = p1, p0, g1, g0
		}
		for level := 0; level <= 3; level++ {
			for _, initial := range []bool{false, true} {
				next := make([]float32, 2*n)
				st := make([]uint8, n)
				eg := make([]float32, n)
				out := gocv.NewMatWithSize(n, 1, gocv.MatTypeCV32FC2)
				flags := gocv.OptflowLkGetMinEigenvals
				if initial {
					// Start 0.8 px off the truth in both frames' runs.
					op, _ := out.DataPtrFloat32()
					for i := 0; i < n; i++ {
						next[2*i], next[2*i+1] = pts[2*i]+0.5, pts[2*i+1]+0.8
						op[2*i], op[2*i+1] = next[2*i], next[2*i+1]
					}
					flags |= gocv.OptflowUseInitialFlow
				}
				sm, em := gocv.NewMat(), gocv.NewMat()
				gocv.CalcOpticalFlowPyrLKWithParams(ma, mb, in, out, &sm, &em, image.Pt(win, win), level, crit, flags, 1e-4)
				lkPyr(pa, pb, pts, next, st, eg, lkParams{win: win, maxLevel: level, maxIter: 30, eps: 0.01, minEig: 1e-4, initial: initial})
				op, _ := out.DataPtrFloat32()
				sp, _ := sm.DataPtrUint8()
				ep, _ := em.DataPtrFloat32()
				var worst, worstE float64
				diffSt, found := 0, 0
				for i := 0; i < n; i++ {
					if st[i] != sp[i] {
						diffSt++
					}
					if sp[i] == 1 {
						found++
						worst = math.Max(worst, math.Hypot(float64(next[2*i]-op[2*i]), float64(next[2*i+1]-op[2*i+1])))
					}
					worstE = math.Max(worstE, math.Abs(float64(eg[i]-ep[i])))
				}
				out.Close()
				sm.Close()
				em.Close()
				if found < n/2 || diffSt > 0 || worst > 1e-4 || worstE > 1e-6 {
					t.Errorf("%s level %d initial %v: %d found, %d status differ, worst position difference %.2g px, eigenvalue %.2g",
						dir, level, initial, found, diffSt, worst, worstE)
				}
			}
		}
	}
}
