package factor

import (
	"fmt"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

// intrinsicsSeeds are hand-written calibration files in every form
// ParseIntrinsics reads: our JSON and YAML, and the OpenCV library's
// FileStorage YAML (the layout of opencv-doc's left_intrinsics.yml, with
// its %YAML:1.0 header and !!opencv-matrix tags) — plus near misses that
// exercise the error paths.
var intrinsicsSeeds = []string{
	`{"fx": 800, "fy": 810, "cx": 320, "cy": 240, "distortion": [-0.1, 0.01, 0.001, -0.002]}`,
	"fx: 800\nfy: 810\ncx: 320\ncy: 240\ndistortion: [-0.1, 0.01, 0.001, -0.002, 0]\n",
	`{"fx": 1e3, "fy": 1e3, "cx": -0.5, "cy": 0}`,
	"%YAML:1.0\n---\nimage_width: 640\nimage_height: 480\ncamera_matrix: !!opencv-matrix\n   rows: 3\n   cols: 3\n   dt: d\n" +
		"   data: [ 5.3591573396163199e+02, 0., 3.4228315473308373e+02, 0.,\n       5.3591573396163199e+02, 2.3557082909788173e+02, 0., 0., 1. ]\n" +
		"distortion_coefficients: !!opencv-matrix\n   rows: 5\n   cols: 1\n   dt: d\n" +
		"   data: [ -2.6637260909660682e-01, -3.8588898922304653e-02,\n       1.7831947042852964e-03, -2.8122100441115472e-04,\n       2.3839153080878486e-01 ]\n" +
		"avg_reprojection_error: 3.9228131347218681e-01\n",
	"%YAML:1.0\ncamera_matrix: !!opencv-matrix\n   rows: 3\n   cols: 3\n   dt: f\n   data: [ 500., 0., 320., 0., 500., 240., 0., 0., 1. ]\n" +
		"distortion_coefficients: !!opencv-matrix\n   rows: 1\n   cols: 8\n   dt: d\n   data: [ 0.1, 0.01, 0., 0., 0., 0., 0., 0. ]\n",
	`{"camera_matrix": {"rows": 3, "cols": 3, "data": [500, 0, 320, 0, 500, 240, 0, 0, 1]}}`,
	"%YAML:1.0\ncamera_matrix: !!opencv-matrix\n   rows: 3\n   cols: 3\n   dt: d\n   data: [ 500., 1., 320., 0., 500., 240., 0., 0., 1. ]\n",
	"%YAML:1.0\ncamera_matrix: !!opencv-matrix\n   rows: 4294967296\n   cols: 4294967296\n   dt: d\n   data: []\n",
	"fx: &f 800\nfy: *f\ncx: 320\ncy: 240\n",
	`{"fx": 800, "fy": 800, "cx": 320, "cy": 240, "distortion": [0, 0, 0, 0, 0, 0.5, 0, 0]}`,
	`{"fx": .nan, "fy": 800, "cx": 320, "cy": 240}`,
	"fx: 800\nfy: 800\ncx: 320\ncy: 240\nfx: -1\n",
	"\xef\xbb\xbf{\"fx\": 800, \"fy\": 800, \"cx\": 320, \"cy\": 240}",
	"",
	"%YAML:1.0",
	"[1, 2]",
}

// FuzzParseIntrinsics feeds damaged calibration files to ParseIntrinsics.
// It must never panic; every error is one line that names the file; what
// it accepts passes Validate and reads back to the same numbers, bit for
// bit, when written again in each of the three forms (strconv's shortest
// round-trip formatting, so no digit is lost).
//
// Seeds: the forms above, and the calibration files of Debian's opencv-doc
// package when scripts/fetch-testdata.sh has fetched them.
func FuzzParseIntrinsics(f *testing.F) {
	for _, s := range intrinsicsSeeds {
		f.Add([]byte(s))
	}
	for _, name := range []string{"left_intrinsics.yml", "intrinsics.yml", "calibration.yml"} {
		if b, err := os.ReadFile(filepath.Join("..", "testdata", "ext", "opencv-doc", "examples", "data", name)); err == nil {
			f.Add(b)
		}
	}
	const name = "calib.yml"
	// The first six seeds are good files: the round trip below is reached.
	for i, s := range intrinsicsSeeds[:6] {
		if _, err := ParseIntrinsics([]byte(s), name); err != nil {
			f.Fatalf("seed %d is refused: %v", i, err)
		}
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		in, err := ParseIntrinsics(data, name)
		if err != nil {
			msg := err.Error()
			if strings.ContainsAny(msg, "\n\r") {
				t.Fatalf("error is not one line: %q", msg)
			}
			if !strings.HasPrefix(msg, "factor: intrinsics file "+name+": ") {
				t.Fatalf("error does not name the file: %q", msg)
			}
			return
		}
		if err := in.Validate(); err != nil {
			t.Fatalf("accepted intrinsics fail Validate: %v (%+v)", err, in)
		}
		for form, text := range intrinsicsForms(in) {
			back, err := ParseIntrinsics([]byte(text), name)
			if err != nil {
				t.Fatalf("%s form of accepted %+v does not read back: %v\n%s", form, in, err, text)
			}
			if back != in {
				t.Fatalf("%s form reads back as %+v, want %+v\n%s", form, back, in, text)
			}
		}
	})
}

// intrinsicsForms writes in as our JSON, our YAML and an OpenCV FileStorage
// YAML.
func intrinsicsForms(in Intrinsics) map[string]string {
	g := func(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }
	d := fmt.Sprintf("[%s, %s, %s, %s, %s]", g(in.K1), g(in.K2), g(in.P1), g(in.P2), g(in.K3))
	return map[string]string{
		"JSON": fmt.Sprintf(`{"fx": %s, "fy": %s, "cx": %s, "cy": %s, "distortion": %s}`, g(in.Fx), g(in.Fy), g(in.Cx), g(in.Cy), d),
		"YAML": fmt.Sprintf("fx: %s\nfy: %s\ncx: %s\ncy: %s\ndistortion: %s\n", g(in.Fx), g(in.Fy), g(in.Cx), g(in.Cy), d),
		"OpenCV": fmt.Sprintf("%%YAML:1.0\n---\ncamera_matrix: !!opencv-matrix\n   rows: 3\n   cols: 3\n   dt: d\n   data: [ %s, 0., %s, 0., %s, %s, 0., 0., 1. ]\n"+
			"distortion_coefficients: !!opencv-matrix\n   rows: 1\n   cols: 5\n   dt: d\n   data: %s\n", g(in.Fx), g(in.Cx), g(in.Fy), g(in.Cy), d),
	}
}
