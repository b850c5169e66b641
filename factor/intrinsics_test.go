package factor

import (
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

type opencvVectors struct {
	K       [3][3]float64
	Dist    []float64
	Project struct {
		Rvec, Tvec   [3]float64
		Points       [][3]float64
		Pixels       [][2]float64
		PixelsNodist [][2]float64 `json:"pixels_nodist"`
	}
	Undistort struct {
		Distorted, Undistorted [][2]float64
	}
	Rodrigues struct {
		Rvecs [][3]float64
		R     [][3][3]float64
	}
}

// loadVectors reads testdata/opencv_vectors.json, made by
// testdata/make_opencv_vectors.py with python3-opencv 4.6 (Debian 12).
func loadVectors(t *testing.T) (opencvVectors, Intrinsics) {
	t.Helper()
	data, err := os.ReadFile(filepath.Join("testdata", "opencv_vectors.json"))
	if err != nil {
		t.Fatal(err)
	}
	var v opencvVectors
	if err := json.Unmarshal(data, &v); err != nil {
		t.Fatal(err)
	}
	in := Intrinsics{Fx: v.K[0][0], Fy: v.K[1][1], Cx: v.K[0][2], Cy: v.K[1][2]}
	if err := in.setDistortion(v.Dist, "dist"); err != nil {
		t.Fatal(err)
	}
	return v, in
}

// Projection through Rodrigues(rvec), tvec, K and the distortion must
// reproduce cv2.projectPoints (reference vectors). Tolerance 1e-9 px: both
// evaluate the same closed-form model in double precision.
func TestDistortMatchesOpenCV(t *testing.T) {
	v, in := loadVectors(t)
	R := Rodrigues(v.Project.Rvec)
	worst := 0.0
	for i, X := range v.Project.Points {
		xc := [3]float64{dot3(R[0], X) + v.Project.Tvec[0], dot3(R[1], X) + v.Project.Tvec[1], dot3(R[2], X) + v.Project.Tvec[2]}
		u, w := in.Pixel(xc[0]/xc[2], xc[1]/xc[2])
		if e := math.Hypot(u-v.Project.PixelsNodist[i][0], w-v.Project.PixelsNodist[i][1]); e > 1e-9 {
			t.Errorf("point %d without distortion: (%g, %g), OpenCV %v", i, u, w, v.Project.PixelsNodist[i])
		}
		ud, wd := in.Distort(u, w)
		e := math.Hypot(ud-v.Project.Pixels[i][0], wd-v.Project.Pixels[i][1])
		worst = math.Max(worst, e)
		if e > 1e-9 {
			t.Errorf("point %d: distorted (%g, %g), OpenCV %v", i, ud, wd, v.Project.Pixels[i])
		}
	}
	t.Logf("largest difference from cv2.projectPoints: %.2g px", worst)
}

// Undistort must agree with cv2.undistortPointsIter run to convergence
// (criterion 1000 iterations / 1e-15) within 1e-6 px — OpenCV's fixed-point
// iteration stops on the change of its iterate, ours on the Newton step —
// and invert Distort to 1e-9 px (our own round trip).
func TestUndistortMatchesOpenCV(t *testing.T) {
	v, in := loadVectors(t)
	worst := 0.0
	for i, p := range v.Undistort.Distorted {
		u, w, ok := in.Undistort(p[0], p[1])
		if !ok {
			t.Errorf("point %d %v: Undistort did not converge", i, p)
			continue
		}
		e := math.Hypot(u-v.Undistort.Undistorted[i][0], w-v.Undistort.Undistorted[i][1])
		worst = math.Max(worst, e)
		if e > 1e-6 {
			t.Errorf("point %d %v: undistorted (%.9g, %.9g), OpenCV %v", i, p, u, w, v.Undistort.Undistorted[i])
		}
		bu, bw := in.Distort(u, w)
		if e := math.Hypot(bu-p[0], bw-p[1]); e > 1e-9 {
			t.Errorf("point %d: Distort(Undistort(p)) is %.3g px off", i, e)
		}
	}
	t.Logf("largest difference from cv2.undistortPointsIter: %.2g px", worst)
}

// Rodrigues must match cv2.Rodrigues to 1e-12 (both closed form).
func TestRodriguesMatchesOpenCV(t *testing.T) {
	v, _ := loadVectors(t)
	for i, r := range v.Rodrigues.Rvecs {
		R := Rodrigues(r)
		for a := 0; a < 3; a++ {
			for b := 0; b < 3; b++ {
				if e := math.Abs(R[a][b] - v.Rodrigues.R[i][a][b]); e > 1e-12 {
					t.Fatalf("rvec %v: R[%d][%d] = %.15g, OpenCV %.15g", r, a, b, R[a][b], v.Rodrigues.R[i][a][b])
				}
			}
		}
	}
}

// opencvDocFile returns the path of a file of opencv-doc's examples/data,
// fetched by scripts/fetch-testdata.sh, or skips the test.
func opencvDocFile(t *testing.T, name string) string {
	t.Helper()
	p := filepath.Join("..", "testdata", "ext", "opencv-doc", "examples", "data", name)
	if _, err := os.Stat(p); err != nil {
		t.Skipf("%s not found; run scripts/fetch-testdata.sh to fetch Debian's opencv-doc examples", name)
	}
	return p
}

// The calibration file left_intrinsics.yml of Debian's opencv-doc package
// (written by the OpenCV library's FileStorage, %YAML:1.0 with
// !!opencv-matrix tags) parses to the numbers it holds, copied from the
// file: fx = fy = 535.91573396163199, cx = 342.28315473308373,
// cy = 235.57082909788173, distortion (−0.26637…, −0.03858…, 0.00178…,
// −0.00028…, 0.23839…). Exact: the decimal strings round-trip.
func TestParseOpenCVCalibration(t *testing.T) {
	data, err := os.ReadFile(opencvDocFile(t, "left_intrinsics.yml"))
	if err != nil {
		t.Fatal(err)
	}
	in, err := ParseIntrinsics(data, "left_intrinsics.yml")
	if err != nil {
		t.Fatal(err)
	}
	want := Intrinsics{Fx: 5.3591573396163199e+02, Fy: 5.3591573396163199e+02, Cx: 3.4228315473308373e+02, Cy: 2.3557082909788173e+02,
		K1: -2.6637260909660682e-01, K2: -3.8588898922304653e-02, P1: 1.7831947042852964e-03, P2: -2.8122100441115472e-04, K3: 2.3839153080878486e-01}
	if in != want {
		t.Errorf("got %+v\nwant %+v", in, want)
	}
}

// Our own format in JSON and YAML, and the error messages that name the
// field (a table of inputs and the text the error must contain).
func TestParseIntrinsicsOwnFormat(t *testing.T) {
	want := Intrinsics{Fx: 800, Fy: 810, Cx: 320, Cy: 240, K1: -0.1, K2: 0.01, P1: 0.001, P2: -0.002, K3: 0}
	for _, src := range []string{
		`{"fx": 800, "fy": 810, "cx": 320, "cy": 240, "distortion": [-0.1, 0.01, 0.001, -0.002]}`,
		"fx: 800\nfy: 810\ncx: 320\ncy: 240\ndistortion: [-0.1, 0.01, 0.001, -0.002, 0]\n",
	} {
		in, err := ParseIntrinsics([]byte(src), "cam.json")
		if err != nil {
			t.Fatalf("%s: %v", src, err)
		}
		if in != want {
			t.Errorf("%s: got %+v", src, in)
		}
	}
	in, err := ParseIntrinsics([]byte(`{"fx": 800, "fy": 800, "cx": 320, "cy": 240}`), "nodist.json")
	if err != nil || in.HasDistortion() {
		t.Errorf("no distortion: %+v, %v", in, err)
	}
	cvHeader := "%YAML:1.0\n---\n"
	bad := []struct{ src, msg string }{
		{`{"fx": 800, "fy": 800, "cx": 320}`, "field cy is missing"},
		{`{"fx": 800, "fy": 800, "cx": 320, "cy": 240, "f": 3}`, `unknown field "f"`},
		{`{"fx": 800, "fy": 800, "cx": 320, "cy": 240, "distortion": [1, 2]}`, "want 4 or 5 coefficients"},
		{`{"fx": "wide", "fy": 800, "cx": 320, "cy": 240}`, "field fx"},
		{`{"fx": -800, "fy": 800, "cx": 320, "cy": 240}`, "focal length fx"},
		{`[1, 2]`, "top level must be a mapping"},
		{`{"fx": 800,`, "not valid YAML or JSON"},
		{`{"fx": 800, "fy": 800, "cx": 320, "cy": 240, "distortion": [0, 0, 0, 0, 0, 0.5, 0, 0]}`, "only k1, k2, p1, p2, k3"},
		{cvHeader + "camera_matrix: !!opencv-matrix\n   rows: 3\n   cols: 1\n   dt: d\n   data: [ 1., 2., 3. ]\n", "want a 3×3 matrix"},
		{cvHeader + "camera_matrix: !!opencv-matrix\n   rows: 3\n   cols: 3\n   dt: d\n   data: [ 500., 1., 320., 0., 500., 240., 0., 0., 1. ]\n", "skew"},
		{cvHeader + "camera_matrix: !!opencv-matrix\n   rows: 3\n   cols: 3\n   dt: d\n   data: [ 500., 0., 320., 0., 500., 240., 0., 0. ]\n", "3×3 matrix with 8 data values"},
		{cvHeader + "image_width: 640\n", "field camera_matrix is missing"},
	}
	for _, c := range bad {
		_, err := ParseIntrinsics([]byte(c.src), "bad.yml")
		if err == nil || !strings.Contains(err.Error(), c.msg) || !strings.HasPrefix(err.Error(), "factor: intrinsics file bad.yml: ") {
			t.Errorf("%q: got error %v, want one containing %q", c.src, err, c.msg)
		}
		if err != nil && strings.Contains(err.Error(), "\n") {
			t.Errorf("%q: error is not one line: %q", c.src, err)
		}
	}
}
