package export

import (
	"bytes"
	"encoding/binary"
	"math"
	"strconv"
	"strings"
	"testing"
)

// The checks in this file follow Greg Turk's description of the PLY format
// (1994): a header of lines "ply", "format <kind> 1.0", "comment …",
// "element <name> <count>", "property <type> <name>", "end_header", then
// the items of each element in order; binary items are the properties
// packed without padding in the declared byte order; in ascii each item is
// a line of values.

// splitPLY is the test's own header parser: it returns the header lines
// and the body, independent of ReadPLY.
func splitPLY(t *testing.T, b []byte) ([]string, []byte) {
	t.Helper()
	const end = "end_header\n"
	i := bytes.Index(b, []byte("\n"+end))
	if i < 0 {
		t.Fatalf("no end_header line in\n%q", b)
	}
	header := string(b[:i+1+len(end)])
	return strings.Split(strings.TrimSuffix(header, "\n"), "\n"), b[i+1+len(end):]
}

// declarations keeps the header lines that describe the data (format,
// element, property) and drops comments.
func declarations(lines []string) []string {
	var out []string
	for _, l := range lines {
		if !strings.HasPrefix(l, "comment ") {
			out = append(out, l)
		}
	}
	return out
}

func comments(lines []string) []string {
	var out []string
	for _, l := range lines {
		if c, ok := strings.CutPrefix(l, "comment "); ok {
			out = append(out, c)
		}
	}
	return out
}

func equalLines(t *testing.T, what string, got, want []string) {
	t.Helper()
	if strings.Join(got, "\n") != strings.Join(want, "\n") {
		t.Errorf("%s:\n got %q\nwant %q", what, got, want)
	}
}

func writePoints(t *testing.T, doc *Document, opts PLYOptions) []byte {
	t.Helper()
	var b bytes.Buffer
	if err := WritePointsPLY(&b, doc, opts); err != nil {
		t.Fatalf("WritePointsPLY: %v", err)
	}
	return b.Bytes()
}

func TestWritePointsPLYBinary(t *testing.T) {
	doc := goldenDocument()
	lines, body := splitPLY(t, writePoints(t, doc, PLYOptions{}))
	equalLines(t, "declarations", declarations(lines), []string{
		"ply", "format binary_little_endian 1.0", "element vertex 3",
		"property float x", "property float y", "property float z",
		"property uchar red", "property uchar green", "property uchar blue", "end_header",
	})
	cs := comments(lines)
	if len(cs) < 2 || cs[0] != "producer trackfactor 0.1.0" || cs[1] != "units mm" {
		t.Errorf("comments %q: want producer then units first", cs)
	}
	type vertex struct {
		X, Y, Z          float32
		Red, Green, Blue uint8
	}
	if len(body) != 3*15 { // 3 × (3 float32 + 3 uchar)
		t.Fatalf("body has %d bytes, want %d", len(body), 3*15)
	}
	got := make([]vertex, 3)
	if err := binary.Read(bytes.NewReader(body), binary.LittleEndian, got); err != nil {
		t.Fatal(err)
	}
	for i, p := range doc.Points {
		// Equal to float32 precision: the stored value is the float32
		// nearest to the float64 coordinate, exactly.
		want := vertex{float32(p.XYZ[0]), float32(p.XYZ[1]), float32(p.XYZ[2]), p.RGB[0], p.RGB[1], p.RGB[2]}
		if got[i] != want {
			t.Errorf("vertex %d = %+v, want %+v", i, got[i], want)
		}
	}
}

func TestWritePointsPLYASCIIWithSigma(t *testing.T) {
	doc := goldenDocument()
	sigma := []float64{0.5, 0.125, 3}
	lines, body := splitPLY(t, writePoints(t, doc, PLYOptions{ASCII: true, Units: "cm", Uncertainty: sigma}))
	equalLines(t, "declarations", declarations(lines), []string{
		"ply", "format ascii 1.0", "element vertex 3",
		"property float x", "property float y", "property float z",
		"property uchar red", "property uchar green", "property uchar blue", "property float sigma", "end_header",
	})
	if cs := comments(lines); len(cs) < 2 || cs[1] != "units cm" {
		t.Errorf("comments %q: opts.Units must override the document's", cs)
	}
	rows := strings.Split(strings.TrimSuffix(string(body), "\n"), "\n")
	if len(rows) != 3 {
		t.Fatalf("%d rows, want 3", len(rows))
	}
	for i, row := range rows {
		f := strings.Fields(row)
		if len(f) != 7 {
			t.Fatalf("row %d %q: want 7 values", i, row)
		}
		p := doc.Points[i]
		want := []float64{p.XYZ[0], p.XYZ[1], p.XYZ[2], float64(p.RGB[0]), float64(p.RGB[1]), float64(p.RGB[2]), sigma[i]}
		for k, tok := range f {
			if k >= 3 && k < 6 {
				v, err := strconv.ParseUint(tok, 10, 8)
				if err != nil || float64(v) != want[k] {
					t.Errorf("row %d value %d = %q, want %v", i, k, tok, want[k])
				}
				continue
			}
			v, err := strconv.ParseFloat(tok, 32)
			if err != nil || float32(v) != float32(want[k]) {
				t.Errorf("row %d value %d = %q, want float32(%v)", i, k, tok, want[k])
			}
		}
	}
}

func TestWritePointsPLYReadBack(t *testing.T) {
	doc := goldenDocument()
	for _, ascii := range []bool{false, true} {
		d, err := ReadPLY(bytes.NewReader(writePoints(t, doc, PLYOptions{ASCII: ascii})))
		if err != nil {
			t.Fatalf("ascii=%v: ReadPLY: %v", ascii, err)
		}
		v := d.Element("vertex")
		if v == nil || v.Count != len(doc.Points) {
			t.Fatalf("ascii=%v: vertex element %+v", ascii, v)
		}
		for i, p := range doc.Points {
			for k, name := range []string{"x", "y", "z"} {
				if got := v.Property(name).Scalar[i]; got != float64(float32(p.XYZ[k])) {
					t.Errorf("ascii=%v point %d %s = %v, want %v", ascii, i, name, got, float32(p.XYZ[k]))
				}
			}
			for k, name := range []string{"red", "green", "blue"} {
				if got := v.Property(name).Scalar[i]; got != float64(p.RGB[k]) {
					t.Errorf("ascii=%v point %d %s = %v, want %v", ascii, i, name, got, p.RGB[k])
				}
			}
		}
	}
}

func TestWritePointsPLYErrors(t *testing.T) {
	cases := []struct {
		name   string
		mutate func(d *Document, o *PLYOptions)
		want   string
	}{
		{"sigma length", func(d *Document, o *PLYOptions) { o.Uncertainty = []float64{1} }, "1 values for 3 points"},
		{"negative sigma", func(d *Document, o *PLYOptions) { o.Uncertainty = []float64{1, -0.5, 1} }, "uncertainty of point 1"},
		{"NaN point", func(d *Document, o *PLYOptions) { d.Points[1].XYZ[2] = math.NaN() }, "point 1 (track 3)"},
		{"beyond float32", func(d *Document, o *PLYOptions) { d.Points[0].XYZ[0] = 1e39 }, "point 0 (track 17)"},
	}
	for _, c := range cases {
		doc, opts := goldenDocument(), PLYOptions{}
		c.mutate(doc, &opts)
		var b bytes.Buffer
		err := WritePointsPLY(&b, doc, opts)
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: error %v, want one containing %q", c.name, err, c.want)
		}
		if b.Len() != 0 {
			t.Errorf("%s: %d bytes written despite the error", c.name, b.Len())
		}
	}
}

type plyEdge struct {
	V1, V2           int32
	Red, Green, Blue uint8
}

type plyVert struct {
	X, Y, Z          float32
	Red, Green, Blue uint8
}

// readCameras decodes a binary cameras.ply with the test's own reader.
func readCameras(t *testing.T, b []byte, n int) ([]string, []plyVert, []plyEdge) {
	t.Helper()
	lines, body := splitPLY(t, b)
	equalLines(t, "declarations", declarations(lines), []string{
		"ply", "format binary_little_endian 1.0",
		"element vertex " + strconv.Itoa(4*n),
		"property float x", "property float y", "property float z",
		"property uchar red", "property uchar green", "property uchar blue",
		"element edge " + strconv.Itoa(3*n),
		"property int vertex1", "property int vertex2",
		"property uchar red", "property uchar green", "property uchar blue", "end_header",
	})
	if want := 4*n*15 + 3*n*11; len(body) != want {
		t.Fatalf("body has %d bytes, want %d", len(body), want)
	}
	r := bytes.NewReader(body)
	verts := make([]plyVert, 4*n)
	edges := make([]plyEdge, 3*n)
	if err := binary.Read(r, binary.LittleEndian, verts); err != nil {
		t.Fatal(err)
	}
	if err := binary.Read(r, binary.LittleEndian, edges); err != nil {
		t.Fatal(err)
	}
	return comments(lines), verts, edges
}

// closeTo compares a float32 written value with its float64 reference; the
// tolerance is half a float32 ulp at the magnitude plus a float64 rounding
// allowance for the sums that built the reference.
func closeTo(got float32, want float64) bool {
	tol := math.Max(math.Abs(want), 1) * (0.5*0x1p-23 + 1e-12)
	return math.Abs(float64(got)-want) <= tol
}

func TestWriteCamerasPLYPerspective(t *testing.T) {
	doc := goldenDocument()
	doc.Model = "perspective"
	// Camera 1: rotation about y by 30°, t chosen so that the centre is
	// (2, -1, 5): t = −R·C.
	R := doc.Cameras[1].Rotation
	C := [3]float64{2, -1, 5}
	for i := 0; i < 3; i++ {
		doc.Cameras[1].Translation[i] = -(R[i][0]*C[0] + R[i][1]*C[1] + R[i][2]*C[2])
	}
	doc.Cameras[0].Translation = [3]float64{0, 0, 10} // R = I: centre (0,0,-10)
	var b bytes.Buffer
	if err := WriteCamerasPLY(&b, doc, CamerasPLYOptions{AxisLength: 2}); err != nil {
		t.Fatal(err)
	}
	cs, verts, edges := readCameras(t, b.Bytes(), 2)
	centres := [][3]float64{{0, 0, -10}, C}
	for i, c := range doc.Cameras {
		for j := 0; j < 4; j++ {
			want := centres[i]
			if j > 0 {
				for k := 0; k < 3; k++ {
					want[k] += 2 * c.Rotation[j-1][k]
				}
			}
			v := verts[4*i+j]
			if !closeTo(v.X, want[0]) || !closeTo(v.Y, want[1]) || !closeTo(v.Z, want[2]) {
				t.Errorf("camera %d vertex %d = (%v %v %v), want %v", i, j, v.X, v.Y, v.Z, want)
			}
		}
	}
	wantColour := [][3]uint8{{255, 0, 0}, {0, 255, 0}, {0, 0, 255}}
	for e, ed := range edges {
		cam, axis := e/3, e%3
		if ed.V1 != int32(4*cam) || ed.V2 != int32(4*cam+1+axis) {
			t.Errorf("edge %d joins %d-%d, want %d-%d", e, ed.V1, ed.V2, 4*cam, 4*cam+1+axis)
		}
		if [3]uint8{ed.Red, ed.Green, ed.Blue} != wantColour[axis] {
			t.Errorf("edge %d colour %v, want %v", e, [3]uint8{ed.Red, ed.Green, ed.Blue}, wantColour[axis])
		}
	}
	for _, c := range cs {
		if strings.Contains(c, "affine") {
			t.Errorf("perspective file mentions affine placement: %q", c)
		}
	}
}

func TestWriteCamerasPLYAffineDefaults(t *testing.T) {
	doc := goldenDocument()
	doc.Points = []Point{
		{Track: 1, XYZ: [3]float64{0, 0, 0}, Views: 2},
		{Track: 2, XYZ: [3]float64{3, 4, 0}, Views: 2},
		{Track: 3, XYZ: [3]float64{3, 4, 12}, Views: 2},
	}
	// Bounding box 3 × 4 × 12: diagonal 13 (a Pythagorean quadruple);
	// centroid (2, 8/3, 4). Defaults: axis 1.3, distance 19.5.
	centroid := [3]float64{2, 8.0 / 3, 4}
	var b bytes.Buffer
	if err := WriteCamerasPLY(&b, doc, CamerasPLYOptions{}); err != nil {
		t.Fatal(err)
	}
	cs, verts, _ := readCameras(t, b.Bytes(), 2)
	for i, c := range doc.Cameras {
		var centre [3]float64
		for k := 0; k < 3; k++ {
			centre[k] = centroid[k] - 19.5*c.Rotation[2][k]
		}
		for j := 0; j < 4; j++ {
			want := centre
			if j > 0 {
				for k := 0; k < 3; k++ {
					want[k] += 1.3 * c.Rotation[j-1][k]
				}
			}
			v := verts[4*i+j]
			if !closeTo(v.X, want[0]) || !closeTo(v.Y, want[1]) || !closeTo(v.Z, want[2]) {
				t.Errorf("camera %d vertex %d = (%v %v %v), want %v", i, j, v.X, v.Y, v.Z, want)
			}
		}
	}
	joined := strings.Join(cs, "\n")
	for _, want := range []string{"units mm", "axis length 1.3 mm", "affine cameras have no centre", "minus 19.5 mm along its viewing direction"} {
		if !strings.Contains(joined, want) {
			t.Errorf("comments lack %q:\n%s", want, joined)
		}
	}
}

func TestWriteCamerasPLYASCIIReadBack(t *testing.T) {
	doc := goldenDocument()
	var b bytes.Buffer
	if err := WriteCamerasPLY(&b, doc, CamerasPLYOptions{ASCII: true, AxisLength: 1, AffineDistance: 5}); err != nil {
		t.Fatal(err)
	}
	d, err := ReadPLY(&b)
	if err != nil {
		t.Fatal(err)
	}
	if d.Format != "ascii" || d.Element("vertex").Count != 8 || d.Element("edge").Count != 6 {
		t.Fatalf("read %+v", d)
	}
	if got := d.Element("edge").Property("vertex2").Scalar; got[5] != 7 {
		t.Errorf("last edge ends at vertex %v, want 7", got[5])
	}
}

func TestWriteCamerasPLYErrors(t *testing.T) {
	doc := goldenDocument()
	doc.Model = "pinhole"
	if err := WriteCamerasPLY(&bytes.Buffer{}, doc, CamerasPLYOptions{}); err == nil || !strings.Contains(err.Error(), `"pinhole"`) {
		t.Errorf("unknown model: %v", err)
	}
	doc = goldenDocument()
	if err := WriteCamerasPLY(&bytes.Buffer{}, doc, CamerasPLYOptions{AxisLength: -1}); err == nil {
		t.Error("negative axis length accepted")
	}
	doc.Cameras[0].Rotation[0][0] = math.Inf(1)
	if err := WriteCamerasPLY(&bytes.Buffer{}, doc, CamerasPLYOptions{}); err == nil || !strings.Contains(err.Error(), "camera 0 (frame 0)") {
		t.Errorf("infinite rotation: %v", err)
	}
}

func BenchmarkWritePointsPLY(b *testing.B) {
	doc := goldenDocument()
	doc.Points = make([]Point, 100000)
	for i := range doc.Points {
		doc.Points[i] = Point{Track: i, XYZ: [3]float64{float64(i), 1, 2}, Views: 3}
	}
	var buf bytes.Buffer
	for b.Loop() {
		buf.Reset()
		if err := WritePointsPLY(&buf, doc, PLYOptions{}); err != nil {
			b.Fatal(err)
		}
	}
}
