package pipeline

import (
	"context"
	"image"
	"math"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"

	"gocv.io/x/gocv"
	"gonum.org/v1/gonum/mat"
	"gopkg.in/yaml.v3"

	"trackfactor/factor"
)

// opencvData is where scripts/fetch-testdata.sh unpacks Debian's
// opencv-doc examples/data (real photographs and a real calibration).
func opencvData(t *testing.T) string {
	t.Helper()
	dir := filepath.Join("..", "testdata", "ext", "opencv-doc", "examples", "data")
	if _, err := os.Stat(filepath.Join(dir, "left_intrinsics.yml")); err != nil {
		if testing.Short() {
			t.Skip("opencv-doc test data not fetched; run scripts/fetch-testdata.sh")
		}
		t.Fatalf("opencv-doc test data missing (%v); run scripts/fetch-testdata.sh", err)
	}
	return dir
}

// calibration is the part of left_intrinsics.yml (written by OpenCV's
// calibration sample with FileStorage) this test uses.
type calibration struct {
	Width, Height     int
	BoardW, BoardH    int
	Square            float64
	K                 []float64 // camera_matrix, 3×3 row-major
	Dist              []float64 // k1 k2 p1 p2 k3
	Extrinsics        []float64 // 13 × (rvec, tvec)
	AvgReprojectionPx float64
}

func readCalibration(t *testing.T, path string) calibration {
	t.Helper()
	raw, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	// FileStorage YAML: drop the "%YAML:1.0" directive and the
	// "!!opencv-matrix" tags, which plain YAML 1.2 readers do not know.
	s := regexp.MustCompile(`(?m)^%YAML:1\.0\s*$`).ReplaceAllString(string(raw), "")
	s = strings.ReplaceAll(s, "!!opencv-matrix", "")
	var doc struct {
		W, H     int     `yaml:"image_width"`
		BH       int     `yaml:"board_height"`
		BW       int     `yaml:"board_width"`
		Sq       float64 `yaml:"square_size"`
		Err      float64 `yaml:"avg_reprojection_error"`
		K, D, Ex struct {
			Data []float64 `yaml:"data"`
		}
	}
	var node map[string]yaml.Node
	if err := yaml.Unmarshal([]byte(s), &node); err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	dec := func(key string, v any) {
		n, ok := node[key]
		if !ok {
			t.Fatalf("%s: no %s", path, key)
		}
		if err := n.Decode(v); err != nil {
			t.Fatalf("%s: %s: %v", path, key, err)
		}
	}
	dec("image_width", &doc.W)
	dec("image_height", &doc.H)
	dec("board_width", &doc.BW)
	dec("board_height", &doc.BH)
	dec("square_size", &doc.Sq)
	dec("avg_reprojection_error", &doc.Err)
	dec("camera_matrix", &doc.K)
	dec("distortion_coefficients", &doc.D)
	dec("extrinsic_parameters", &doc.Ex)
	return calibration{doc.W, doc.H, doc.BW, doc.BH, doc.Sq, doc.K.Data, doc.D.Data, doc.Ex.Data, doc.Err}
}

// The views of left_intrinsics.yml: the 13 of left01…left14 in which the
// calibration found the board (left10 is not in the package).
var chessViews = []string{"left01", "left02", "left03", "left04", "left05", "left06", "left07", "left08", "left09", "left11", "left12", "left13", "left14"}

// findCorners detects the 9×6 inner corners as OpenCV's calibration sample
// does (findChessboardCorners, then cornerSubPix with an 11×11 window,
// from memory of samples/cpp/calibration.cpp).
func findCorners(t *testing.T, path string, cols, rows int) [][2]float64 {
	t.Helper()
	img := gocv.IMRead(path, gocv.IMReadGrayScale)
	defer img.Close()
	if img.Empty() {
		t.Fatalf("cannot read %s", path)
	}
	corners := gocv.NewMat()
	defer corners.Close()
	if !gocv.FindChessboardCorners(img, image.Pt(cols, rows), &corners, gocv.CalibCBAdaptiveThresh|gocv.CalibCBNormalizeImage) {
		t.Fatalf("%s: board not found", path)
	}
	gocv.CornerSubPix(img, &corners, image.Pt(11, 11), image.Pt(-1, -1),
		gocv.NewTermCriteria(gocv.Count+gocv.EPS, 30, 0.0001))
	out := make([][2]float64, corners.Rows())
	for i := range out {
		v := corners.GetVecfAt(i, 0)
		out[i] = [2]float64{float64(v[0]), float64(v[1])}
	}
	return out
}

// (a) Projecting the board's corner grid (25 mm squares) through the
// file's camera matrix, distortion and 13 extrinsics reproduces the
// corners found in the photographs with an RMS close to the file's own
// avg_reprojection_error (0.3926 px): a check of our projection,
// distortion and rotation-vector conventions against the OpenCV library's
// calibration of a real camera. The calibration's figure is the RMS of the
// per-corner distance (√(Σ‖x − x̂‖²/N), OpenCV's calibration sample); we
// accept ±10 % since our corner detection need not match the sample's
// flags exactly.
//
// (b) Factorizing the corner tracks of those views is reported as a
// planar scene (a chessboard is flat: rank W̃ = 2, Tomasi–Kanade 1992).
func TestChessboardRealCamera(t *testing.T) {
	dir := opencvData(t)
	cal := readCalibration(t, filepath.Join(dir, "left_intrinsics.yml"))
	if len(cal.Extrinsics) != 6*len(chessViews) {
		t.Fatalf("%d extrinsic values, want %d", len(cal.Extrinsics), 6*len(chessViews))
	}
	in := factor.Intrinsics{Fx: cal.K[0], Fy: cal.K[4], Cx: cal.K[2], Cy: cal.K[5],
		K1: cal.Dist[0], K2: cal.Dist[1], P1: cal.Dist[2], P2: cal.Dist[3], K3: cal.Dist[4]}
	// Board corner (i, j) is at (j·s, i·s, 0), row i of board_height,
	// column j of board_width (the calibration sample's calcChessboardCorners).
	var board [][3]float64
	for i := 0; i < cal.BoardH; i++ {
		for j := 0; j < cal.BoardW; j++ {
			board = append(board, [3]float64{float64(j) * cal.Square, float64(i) * cal.Square, 0})
		}
	}
	var ss float64
	var n int
	W := mat.NewDense(2*len(chessViews), len(board), nil)
	for v, name := range chessViews {
		found := findCorners(t, filepath.Join(dir, name+".jpg"), cal.BoardW, cal.BoardH)
		e := cal.Extrinsics[6*v : 6*v+6]
		R := factor.Rodrigues([3]float64{e[0], e[1], e[2]})
		proj := make([][2]float64, len(board))
		for k, X := range board {
			var c [3]float64
			for a := 0; a < 3; a++ {
				c[a] = R[a][0]*X[0] + R[a][1]*X[1] + R[a][2]*X[2] + e[3+a]
			}
			u, w := in.Pixel(c[0]/c[2], c[1]/c[2])
			proj[k][0], proj[k][1] = in.Distort(u, w)
		}
		// The detector may order the corners from either end of the board;
		// take the order that matches (the calibration used the same).
		fwd, rev := 0.0, 0.0
		for k := range board {
			fwd += sqd(found[k], proj[k])
			rev += sqd(found[len(found)-1-k], proj[k])
		}
		if rev < fwd {
			for a, b := 0, len(found)-1; a < b; a, b = a+1, b-1 {
				found[a], found[b] = found[b], found[a]
			}
			fwd = rev
		}
		ss += fwd
		n += len(board)
		for k := range board {
			W.Set(2*v, k, found[k][0])
			W.Set(2*v+1, k, found[k][1])
		}
	}
	rms := math.Sqrt(ss / float64(n))
	t.Logf("reprojection RMS %.4f px over %d corners; the calibration file says %.4f px", rms, n, cal.AvgReprojectionPx)
	if math.Abs(rms/cal.AvgReprojectionPx-1) > 0.10 {
		t.Errorf("reprojection RMS %.4f px, calibration's %.4f px (±10 %%)", rms, cal.AvgReprojectionPx)
	}

	rec, err := factor.Factorize(context.Background(), &factor.Measurements{W: W}, factor.Options{})
	if err != nil {
		t.Fatalf("factorizing the chessboard views: %v", err)
	}
	planar := false
	for _, w := range rec.Diagnostics.Warnings {
		planar = planar || w.Code == factor.WarnPlanar
	}
	if !planar {
		t.Errorf("chessboard not reported planar; singular values %v", rec.Diagnostics.SingularValues)
	}
}

func sqd(a, b [2]float64) float64 { return (a[0]-b[0])*(a[0]-b[0]) + (a[1]-b[1])*(a[1]-b[1]) }
