package factor

import (
	"bytes"
	"fmt"
	"math"
	"strings"

	"gopkg.in/yaml.v3"
)

// Intrinsics are a pinhole camera's intrinsic parameters and its lens
// distortion in the Brown–Conrady model with the coefficient order and
// conventions of the OpenCV library (k1, k2, p1, p2, k3), so that
// calibrations made with it can be used as they are.
//
// With normalised coordinates (x, y) = ((u − Cx)/Fx, (v − Cy)/Fy) of an
// ideal (undistorted) pixel (u, v) and r² = x² + y², the distorted point is
// (Brown, Photogrammetric Engineering 32(3), 1966; the OpenCV documentation
// of the camera model, "calib3d"):
//
//	x_d = x (1 + k1 r² + k2 r⁴ + k3 r⁶) + 2 p1 x y + p2 (r² + 2x²)
//	y_d = y (1 + k1 r² + k2 r⁴ + k3 r⁶) + p1 (r² + 2y²) + 2 p2 x y
//
// and the distorted pixel is (Fx x_d + Cx, Fy y_d + Cy). Pixel centres are
// at integer coordinates with the origin at the top-left pixel (the package
// convention). All distortion coefficients zero means no distortion.
type Intrinsics struct {
	Fx, Fy, Cx, Cy     float64
	K1, K2, P1, P2, K3 float64
}

// DefaultFocalFactor is the focal length, in units of the larger image
// side, that models needing a focal length use when no intrinsics are
// given: f = 1.2·max(width, height). It is a common practice for an
// unknown "normal" lens (a horizontal field of view of about 45°), not a
// measurement; give real intrinsics when they are known.
const DefaultFocalFactor = 1.2

// DefaultIntrinsics returns the intrinsics assumed for an image of the given
// size when none are known: the principal point at the image centre
// ((w−1)/2, (h−1)/2) with pixel centres at integers), square pixels, the
// focal length DefaultFocalFactor·max(w, h) and no distortion.
func DefaultIntrinsics(width, height float64) Intrinsics {
	f := DefaultFocalFactor * math.Max(width, height)
	return Intrinsics{Fx: f, Fy: f, Cx: (width - 1) / 2, Cy: (height - 1) / 2}
}

// Validate reports the first parameter that breaks its rule.
func (in Intrinsics) Validate() error {
	fin := func(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }
	switch {
	case !(in.Fx > 0) || !fin(in.Fx):
		return fmt.Errorf("focal length fx = %v must be a finite number > 0 (px)", in.Fx)
	case !(in.Fy > 0) || !fin(in.Fy):
		return fmt.Errorf("focal length fy = %v must be a finite number > 0 (px)", in.Fy)
	case !fin(in.Cx) || !fin(in.Cy):
		return fmt.Errorf("principal point (%v, %v) must be finite", in.Cx, in.Cy)
	}
	for i, v := range in.distortion() {
		if !fin(v) {
			return fmt.Errorf("distortion coefficient %s = %v must be finite", distortionNames[i], v)
		}
	}
	return nil
}

var distortionNames = [5]string{"k1", "k2", "p1", "p2", "k3"}

func (in Intrinsics) distortion() [5]float64 {
	return [5]float64{in.K1, in.K2, in.P1, in.P2, in.K3}
}

// HasDistortion reports whether any distortion coefficient is non-zero.
func (in Intrinsics) HasDistortion() bool {
	return in.distortion() != [5]float64{}
}

// Normalize returns the normalised coordinates ((u − Cx)/Fx, (v − Cy)/Fy)
// of a pixel (no distortion is applied).
func (in Intrinsics) Normalize(u, v float64) (x, y float64) {
	return (u - in.Cx) / in.Fx, (v - in.Cy) / in.Fy
}

// Pixel is the inverse of Normalize.
func (in Intrinsics) Pixel(x, y float64) (u, v float64) {
	return in.Fx*x + in.Cx, in.Fy*y + in.Cy
}

// distortNorm applies the distortion model to normalised coordinates.
func (in Intrinsics) distortNorm(x, y float64) (xd, yd float64) {
	r2 := x*x + y*y
	rad := 1 + r2*(in.K1+r2*(in.K2+r2*in.K3))
	xd = x*rad + 2*in.P1*x*y + in.P2*(r2+2*x*x)
	yd = y*rad + in.P1*(r2+2*y*y) + 2*in.P2*x*y
	return xd, yd
}

// Distort maps an ideal pixel to the pixel where the lens images it.
func (in Intrinsics) Distort(u, v float64) (ud, vd float64) {
	x, y := in.Normalize(u, v)
	xd, yd := in.distortNorm(x, y)
	return in.Pixel(xd, yd)
}

// Undistort maps an observed (distorted) pixel to the ideal pixel, the
// inverse of Distort. The model has no closed-form inverse; Undistort
// starts from the fixed-point iteration the OpenCV library uses,
// x ← (x_d − δ(x))/ρ(x) (δ the tangential term, ρ the radial factor), and
// finishes with Newton steps on distort(x) = x_d with the analytic 2×2
// Jacobian until the step is below 1e-15 (normalised units), at most 50
// iterations in all. ok is false when it did not converge (a point far
// outside the calibrated field, where the model folds over); the last
// iterate is returned.
func (in Intrinsics) Undistort(ud, vd float64) (u, v float64, ok bool) {
	xd, yd := in.Normalize(ud, vd)
	if !in.HasDistortion() {
		u, v = in.Pixel(xd, yd)
		return u, v, true
	}
	x, y := xd, yd
	for it := 0; it < 5; it++ { // the fixed-point start
		r2 := x*x + y*y
		rad := 1 + r2*(in.K1+r2*(in.K2+r2*in.K3))
		dx := 2*in.P1*x*y + in.P2*(r2+2*x*x)
		dy := in.P1*(r2+2*y*y) + 2*in.P2*x*y
		if !(rad > 0) {
			break
		}
		x, y = (xd-dx)/rad, (yd-dy)/rad
	}
	for it := 0; it < 45; it++ {
		fx, fy := in.distortNorm(x, y)
		fx -= xd
		fy -= yd
		// Jacobian of distortNorm.
		r2 := x*x + y*y
		rad := 1 + r2*(in.K1+r2*(in.K2+r2*in.K3))
		drad := in.K1 + r2*(2*in.K2+3*r2*in.K3) // dρ/d(r²)
		j00 := rad + 2*x*x*drad + 2*in.P1*y + 6*in.P2*x
		j01 := 2*x*y*drad + 2*in.P1*x + 2*in.P2*y
		j10 := 2*x*y*drad + 2*in.P1*x + 2*in.P2*y
		j11 := rad + 2*y*y*drad + 6*in.P1*y + 2*in.P2*x
		det := j00*j11 - j01*j10
		if !(math.Abs(det) > 1e-12) {
			break
		}
		sx := (j11*fx - j01*fy) / det
		sy := (j00*fy - j10*fx) / det
		x -= sx
		y -= sy
		if math.Abs(sx)+math.Abs(sy) < 1e-15*(1+math.Abs(x)+math.Abs(y)) {
			ok = true
			break
		}
	}
	if !ok {
		// Converged to rounding already (the step stagnated at ~1e-16)?
		ex, ey := in.distortNorm(x, y)
		ok = math.Abs(ex-xd)+math.Abs(ey-yd) < 1e-12
	}
	u, v = in.Pixel(x, y)
	return u, v, ok
}

// Rodrigues returns the rotation matrix of a rotation vector r (axis r/|r|,
// angle |r| radians), R = exp([r]×) = I + sin θ/θ [r]× + (1 − cos θ)/θ² [r]×²
// — the rvec convention of the OpenCV library's extrinsics (X_cam = R·X + t).
func Rodrigues(r [3]float64) [3][3]float64 { return expSO3(r) }

// ParseIntrinsics reads camera intrinsics from a file's contents; name (the
// file name) is used in error messages only. Two formats are accepted:
//
// The package's own, as JSON or YAML, with the focal lengths and principal
// point in pixels and the optional distortion coefficients in OpenCV's
// order (zero, four or five numbers; missing ones are zero):
//
//	{"fx": 535.9, "fy": 535.9, "cx": 342.3, "cy": 235.6,
//	 "distortion": [-0.266, -0.0386, 0.00178, -0.000281, 0.238]}
//
// Every key other than these five is an error (a misspelt key would
// otherwise be silently ignored).
//
// The calibration YAML (or JSON) written by the OpenCV library's
// FileStorage, recognised by its "%YAML:1.0" header or a camera_matrix
// key: camera_matrix must be a 3×3 !!opencv-matrix (fx, 0, cx; 0, fy, cy;
// 0, 0, 1; a non-zero skew is rejected) and distortion_coefficients, when
// present, 4 or 5 coefficients (k1, k2, p1, p2[, k3]) or more whose extra
// (rational, thin-prism, tilt) terms are all zero. Other keys (image size,
// extrinsics, reprojection errors) are ignored.
func ParseIntrinsics(data []byte, name string) (Intrinsics, error) {
	root, isCV, err := decodeYAMLMapping(data)
	if err != nil {
		return Intrinsics{}, fmt.Errorf("factor: intrinsics file %s: %v; write JSON or YAML such as {\"fx\": 800, \"fy\": 800, \"cx\": 320, \"cy\": 240} (README, Intrinsics), or give the calibration YAML the OpenCV library writes", name, err)
	}
	var in Intrinsics
	if isCV || mappingValue(root, "camera_matrix") != nil {
		in, err = intrinsicsFromOpenCV(root)
	} else {
		in, err = intrinsicsFromOwn(root)
	}
	if err == nil {
		err = in.Validate()
	}
	if err != nil {
		return Intrinsics{}, fmt.Errorf("factor: intrinsics file %s: %v", name, err)
	}
	return in, nil
}

// decodeYAMLMapping parses YAML or JSON into its top-level mapping node. The
// FileStorage dialect's "%YAML:1.0" directive (not valid YAML 1.2) is
// dropped and its local "!!opencv-matrix" tags are removed before parsing.
func decodeYAMLMapping(data []byte) (*yaml.Node, bool, error) {
	data = bytes.TrimPrefix(data, []byte("\xef\xbb\xbf"))
	isCV := false
	trimmed := bytes.TrimLeft(data, " \t\r\n")
	if bytes.HasPrefix(trimmed, []byte("%YAML:")) {
		isCV = true
		if i := bytes.IndexByte(trimmed, '\n'); i >= 0 {
			trimmed = trimmed[i+1:]
		} else {
			trimmed = nil
		}
	}
	if bytes.Contains(trimmed, []byte("!!opencv-")) {
		isCV = true
		trimmed = bytes.ReplaceAll(trimmed, []byte("!!opencv-matrix"), nil)
	}
	var doc yaml.Node
	if err := yaml.Unmarshal(trimmed, &doc); err != nil {
		return nil, isCV, fmt.Errorf("not valid YAML or JSON (%v)", err)
	}
	if doc.Kind != yaml.DocumentNode || len(doc.Content) != 1 || doc.Content[0].Kind != yaml.MappingNode {
		return nil, isCV, fmt.Errorf("the top level must be a mapping of keys to values")
	}
	return doc.Content[0], isCV, nil
}

// mappingValue returns the value of key in a mapping node, or nil.
func mappingValue(m *yaml.Node, key string) *yaml.Node {
	for i := 0; i+1 < len(m.Content); i += 2 {
		if m.Content[i].Value == key {
			return m.Content[i+1]
		}
	}
	return nil
}

func nodeFloat(n *yaml.Node, field string) (float64, error) {
	var v float64
	if n.Kind != yaml.ScalarNode || n.Decode(&v) != nil {
		return 0, fmt.Errorf("field %s (line %d): want a number, got %q", field, n.Line, n.Value)
	}
	return v, nil
}

func nodeFloats(n *yaml.Node, field string) ([]float64, error) {
	if n.Kind != yaml.SequenceNode {
		return nil, fmt.Errorf("field %s (line %d): want a list of numbers", field, n.Line)
	}
	out := make([]float64, len(n.Content))
	for i, c := range n.Content {
		v, err := nodeFloat(c, fmt.Sprintf("%s[%d]", field, i))
		if err != nil {
			return nil, err
		}
		out[i] = v
	}
	return out, nil
}

func intrinsicsFromOwn(root *yaml.Node) (Intrinsics, error) {
	var in Intrinsics
	seen := map[string]bool{}
	for i := 0; i+1 < len(root.Content); i += 2 {
		key, val := root.Content[i].Value, root.Content[i+1]
		seen[key] = true
		var err error
		switch key {
		case "fx":
			in.Fx, err = nodeFloat(val, key)
		case "fy":
			in.Fy, err = nodeFloat(val, key)
		case "cx":
			in.Cx, err = nodeFloat(val, key)
		case "cy":
			in.Cy, err = nodeFloat(val, key)
		case "distortion":
			var d []float64
			if d, err = nodeFloats(val, key); err == nil {
				err = in.setDistortion(d, key)
			}
		default:
			return in, fmt.Errorf("unknown field %q (line %d); the fields are fx, fy, cx, cy and distortion", key, root.Content[i].Line)
		}
		if err != nil {
			return in, err
		}
	}
	for _, k := range []string{"fx", "fy", "cx", "cy"} {
		if !seen[k] {
			return in, fmt.Errorf("field %s is missing; fx, fy, cx and cy are required (px)", k)
		}
	}
	return in, nil
}

// setDistortion takes 0, 4 or 5 coefficients, or more whose extras are 0.
func (in *Intrinsics) setDistortion(d []float64, field string) error {
	switch {
	case len(d) == 0:
	case len(d) == 4 || len(d) == 5:
	case len(d) > 5:
		for i := 5; i < len(d); i++ {
			if d[i] != 0 {
				return fmt.Errorf("field %s: coefficient %d = %g is not zero; only k1, k2, p1, p2, k3 (the 5-coefficient model) are supported — recalibrate without the rational, thin-prism or tilt terms", field, i+1, d[i])
			}
		}
	default:
		return fmt.Errorf("field %s: want 4 or 5 coefficients (k1, k2, p1, p2[, k3]), got %d", field, len(d))
	}
	var c [5]float64
	copy(c[:], d)
	in.K1, in.K2, in.P1, in.P2, in.K3 = c[0], c[1], c[2], c[3], c[4]
	return nil
}

// cvMatrix is an !!opencv-matrix of FileStorage: rows, cols, dt, data.
type cvMatrix struct {
	Rows, Cols int
	Data       []float64
}

// readCVMatrix reads key as an opencv-matrix mapping; found is false when
// the key is absent.
func readCVMatrix(root *yaml.Node, key string) (mtx cvMatrix, found bool, err error) {
	n := mappingValue(root, key)
	if n == nil {
		return mtx, false, nil
	}
	if n.Kind != yaml.MappingNode {
		return mtx, true, fmt.Errorf("field %s (line %d): want an opencv-matrix with rows, cols, dt and data", key, n.Line)
	}
	for _, f := range []string{"rows", "cols", "data"} {
		if mappingValue(n, f) == nil {
			return mtx, true, fmt.Errorf("field %s (line %d): the matrix has no %q", key, n.Line, f)
		}
	}
	if mappingValue(n, "rows").Decode(&mtx.Rows) != nil || mappingValue(n, "cols").Decode(&mtx.Cols) != nil || mtx.Rows < 0 || mtx.Cols < 0 {
		return mtx, true, fmt.Errorf("field %s (line %d): rows and cols must be integers ≥ 0", key, n.Line)
	}
	if dt := mappingValue(n, "dt"); dt != nil && !strings.ContainsAny(dt.Value, "dfiuwsc") {
		return mtx, true, fmt.Errorf("field %s: unknown element type dt = %q", key, dt.Value)
	}
	mtx.Data, err = nodeFloats(mappingValue(n, "data"), key+".data")
	if err != nil {
		return mtx, true, err
	}
	if len(mtx.Data) != mtx.Rows*mtx.Cols {
		return mtx, true, fmt.Errorf("field %s: %d×%d matrix with %d data values", key, mtx.Rows, mtx.Cols, len(mtx.Data))
	}
	return mtx, true, nil
}

func intrinsicsFromOpenCV(root *yaml.Node) (Intrinsics, error) {
	var in Intrinsics
	K, found, err := readCVMatrix(root, "camera_matrix")
	if err != nil {
		return in, err
	}
	if !found {
		return in, fmt.Errorf("field camera_matrix is missing; an OpenCV calibration file must hold the 3×3 camera_matrix")
	}
	if K.Rows != 3 || K.Cols != 3 {
		return in, fmt.Errorf("field camera_matrix: want a 3×3 matrix, got %d×%d", K.Rows, K.Cols)
	}
	k := K.Data
	if k[3] != 0 || k[6] != 0 || k[7] != 0 || math.Abs(k[8]-1) > 1e-12 {
		return in, fmt.Errorf("field camera_matrix: want [fx 0 cx; 0 fy cy; 0 0 1], got bottom rows [%g %g %g; %g %g %g]", k[3], k[4], k[5], k[6], k[7], k[8])
	}
	if k[1] != 0 {
		return in, fmt.Errorf("field camera_matrix: skew %g is not supported (want 0)", k[1])
	}
	in.Fx, in.Cx, in.Fy, in.Cy = k[0], k[2], k[4], k[5]
	D, found, err := readCVMatrix(root, "distortion_coefficients")
	if err != nil {
		return in, err
	}
	if found {
		if D.Rows != 1 && D.Cols != 1 && len(D.Data) > 0 {
			return in, fmt.Errorf("field distortion_coefficients: want a vector, got %d×%d", D.Rows, D.Cols)
		}
		if err := in.setDistortion(D.Data, "distortion_coefficients"); err != nil {
			return in, err
		}
	}
	return in, nil
}
