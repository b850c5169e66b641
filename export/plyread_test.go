package export

import (
	"bytes"
	"encoding/binary"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"runtime"
	"strings"
	"testing"
)

func readFilePLY(t *testing.T, name string) *PLYData {
	t.Helper()
	f, err := os.Open(filepath.Join("testdata", name))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	d, err := ReadPLY(f)
	if err != nil {
		t.Fatalf("%s: %v", name, err)
	}
	return d
}

// Values of the cube of Turk's first example (testdata/cube.ply, from
// memory of the description).
var cubeVertices = [][3]float64{{0, 0, 0}, {0, 0, 1}, {0, 1, 1}, {0, 1, 0}, {1, 0, 0}, {1, 0, 1}, {1, 1, 1}, {1, 1, 0}}

func cubeFaces() [][]float64 {
	return [][]float64{{0, 1, 2, 3}, {7, 6, 5, 4}, {0, 4, 5, 1}, {1, 5, 6, 2}, {2, 6, 7, 3}, {3, 7, 4, 0}}
}

func checkCube(t *testing.T, d *PLYData) {
	t.Helper()
	v := d.Element("vertex")
	if v == nil || v.Count != 8 || len(v.Properties) != 3 {
		t.Fatalf("vertex element %+v", v)
	}
	for i, want := range cubeVertices {
		for k, name := range []string{"x", "y", "z"} {
			if got := v.Property(name).Scalar[i]; got != want[k] {
				t.Errorf("vertex %d %s = %v, want %v", i, name, got, want[k])
			}
		}
	}
	f := d.Element("face")
	if f == nil || f.Count != 6 {
		t.Fatalf("face element %+v", f)
	}
	p := f.Property("vertex_index")
	if !p.IsList() || p.CountType != "uchar" || p.Type != "int" {
		t.Errorf("vertex_index property %+v", p)
	}
	if !reflect.DeepEqual(p.List, cubeFaces()) {
		t.Errorf("faces = %v, want %v", p.List, cubeFaces())
	}
}

func TestReadPLYTurkCube(t *testing.T) {
	d := readFilePLY(t, "cube.ply")
	if d.Format != "ascii" || d.Version != "1.0" {
		t.Errorf("format %q %q", d.Format, d.Version)
	}
	if !reflect.DeepEqual(d.Comments, []string{"made by Greg Turk", "this file is a cube"}) {
		t.Errorf("comments %q", d.Comments)
	}
	checkCube(t, d)
}

func TestReadPLYTurkColouredCube(t *testing.T) {
	d := readFilePLY(t, "cube-colour.ply")
	v := d.Element("vertex")
	if v.Property("red").Scalar[0] != 255 || v.Property("blue").Scalar[4] != 255 || v.Property("red").Scalar[4] != 0 {
		t.Errorf("vertex colours wrong: red %v blue %v", v.Property("red").Scalar, v.Property("blue").Scalar)
	}
	faces := d.Element("face").Property("vertex_index").List
	if len(faces) != 7 || !reflect.DeepEqual(faces[0], []float64{0, 1, 2}) || len(faces[6]) != 4 {
		t.Errorf("faces %v", faces)
	}
	e := d.Element("edge")
	if e.Count != 5 {
		t.Fatalf("edge count %d", e.Count)
	}
	wantV1 := []float64{0, 1, 2, 3, 2}
	wantV2 := []float64{1, 2, 3, 0, 0}
	wantRed := []float64{255, 255, 255, 255, 0}
	if !reflect.DeepEqual(e.Property("vertex1").Scalar, wantV1) || !reflect.DeepEqual(e.Property("vertex2").Scalar, wantV2) ||
		!reflect.DeepEqual(e.Property("red").Scalar, wantRed) {
		t.Errorf("edges %+v", e.Properties)
	}
}

// binaryCube encodes Turk's first cube in the given byte order, as the
// description defines binary items: properties packed in header order, no
// padding, list count first.
func binaryCube(order binary.ByteOrder, format string) []byte {
	var b bytes.Buffer
	b.WriteString("ply\nformat " + format + " 1.0\ncomment binary cube\nelement vertex 8\n" +
		"property float x\nproperty float y\nproperty float z\n" +
		"element face 6\nproperty list uchar int vertex_index\nend_header\n")
	for _, v := range cubeVertices {
		for _, x := range v {
			binary.Write(&b, order, float32(x))
		}
	}
	for _, f := range cubeFaces() {
		b.WriteByte(byte(len(f)))
		for _, i := range f {
			binary.Write(&b, order, int32(i))
		}
	}
	return b.Bytes()
}

func TestReadPLYBinaryCube(t *testing.T) {
	for _, c := range []struct {
		order  binary.ByteOrder
		format string
	}{{binary.LittleEndian, "binary_little_endian"}, {binary.BigEndian, "binary_big_endian"}} {
		d, err := ReadPLY(bytes.NewReader(binaryCube(c.order, c.format)))
		if err != nil {
			t.Fatalf("%s: %v", c.format, err)
		}
		if d.Format != c.format {
			t.Errorf("format %q, want %q", d.Format, c.format)
		}
		checkCube(t, d)
	}
}

// Every scalar type of the description, by both its original and its sized
// name (common practice), at the ends of its range.
func TestReadPLYAllTypes(t *testing.T) {
	type col struct {
		typ  string
		v    any
		want float64
	}
	cols := []col{
		{"char", int8(-128), -128}, {"uchar", uint8(255), 255},
		{"short", int16(-32768), -32768}, {"ushort", uint16(65535), 65535},
		{"int", int32(math.MinInt32), math.MinInt32}, {"uint", uint32(math.MaxUint32), math.MaxUint32},
		{"float", float32(-0.1), float64(float32(-0.1))}, {"double", 0.1, 0.1},
		{"int8", int8(127), 127}, {"uint8", uint8(0), 0},
		{"int16", int16(32767), 32767}, {"uint16", uint16(1), 1},
		{"int32", int32(math.MaxInt32), math.MaxInt32}, {"uint32", uint32(7), 7},
		{"float32", float32(math.MaxFloat32), math.MaxFloat32}, {"float64", -math.MaxFloat64, -math.MaxFloat64},
	}
	for _, order := range []binary.ByteOrder{binary.LittleEndian, binary.BigEndian} {
		format := "binary_little_endian"
		if order == binary.BigEndian {
			format = "binary_big_endian"
		}
		var b bytes.Buffer
		b.WriteString("ply\nformat " + format + " 1.0\nelement thing 1\n")
		for i, c := range cols {
			b.WriteString("property " + c.typ + " p" + string(rune('a'+i)) + "\n")
		}
		b.WriteString("end_header\n")
		for _, c := range cols {
			binary.Write(&b, order, c.v)
		}
		d, err := ReadPLY(&b)
		if err != nil {
			t.Fatalf("%s: %v", format, err)
		}
		for i, c := range cols {
			p := d.Element("thing").Properties[i]
			if p.Type != c.typ || p.Scalar[0] != c.want {
				t.Errorf("%s %s = %v, want %v", format, c.typ, p.Scalar[0], c.want)
			}
		}
	}
}

func TestReadPLYASCIIDetails(t *testing.T) {
	// CRLF line ends, comment and obj_info lines, blank lines between
	// items and at the end are accepted.
	src := "ply\r\nformat ascii 1.0\r\ncomment  two spaces\r\nobj_info scanned\r\nelement point 2\r\nproperty double v\r\n" +
		"property list ushort char l\r\nend_header\r\n1.5 0\r\n\r\n-2e-3 2 -1 5\r\n\r\n"
	d, err := ReadPLY(strings.NewReader(src))
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(d.Comments, []string{" two spaces"}) || !reflect.DeepEqual(d.ObjInfo, []string{"scanned"}) {
		t.Errorf("comments %q obj_info %q", d.Comments, d.ObjInfo)
	}
	e := d.Element("point")
	if !reflect.DeepEqual(e.Property("v").Scalar, []float64{1.5, -2e-3}) || !reflect.DeepEqual(e.Property("l").List, [][]float64{{}, {-1, 5}}) {
		t.Errorf("values %+v", e.Properties)
	}
}

// Damaged and hostile files must give an error (never a panic) that says
// what is wrong.
func TestReadPLYErrors(t *testing.T) {
	head := "ply\nformat ascii 1.0\nelement vertex 2\nproperty float x\nproperty uchar c\nend_header\n"
	binHead := "ply\nformat binary_little_endian 1.0\nelement vertex 2\nproperty float x\nend_header\n"
	cases := []struct {
		name, src, want string
	}{
		{"empty", "", `does not start with the line "ply"`},
		{"not ply", "PLY\n", `does not start with the line "ply"`},
		{"no end_header", "ply\nformat ascii 1.0\n", "without end_header"},
		{"bad format", "ply\nformat binary 1.0\nend_header\n", `unknown format "binary"`},
		{"bad version", "ply\nformat ascii 2.0\nend_header\n", `version "2.0"`},
		{"two formats", "ply\nformat ascii 1.0\nformat ascii 1.0\nend_header\n", "second format line"},
		{"no format", "ply\nend_header\n", "no format line"},
		{"element first", "ply\nelement vertex 1\nformat ascii 1.0\nend_header\n", "element before the format line"},
		{"negative count", "ply\nformat ascii 1.0\nelement vertex -1\nend_header\n", `count "-1"`},
		{"huge count", "ply\nformat ascii 1.0\nelement vertex 99999999999\nend_header\n", `count "99999999999"`},
		{"property first", "ply\nformat ascii 1.0\nproperty float x\nend_header\n", "property before any element"},
		{"unknown type", "ply\nformat ascii 1.0\nelement v 1\nproperty real x\nend_header\n", `unknown type "real"`},
		{"float list count", "ply\nformat ascii 1.0\nelement f 1\nproperty list float int i\nend_header\n", "not an integer type"},
		{"duplicate property", "ply\nformat ascii 1.0\nelement v 1\nproperty float x\nproperty int x\nend_header\n", `two properties named "x"`},
		{"duplicate element", "ply\nformat ascii 1.0\nelement v 1\nelement v 1\nend_header\n", `element "v" declared twice`},
		{"unknown keyword", "ply\nformat ascii 1.0\nelemnt v 1\nend_header\n", `unknown keyword "elemnt"`},
		{"empty header line", "ply\nformat ascii 1.0\n\nend_header\n", "header line 3 is empty"},
		{"long header line", "ply\ncomment " + strings.Repeat("x", plyMaxHeaderLine) + "\n", "longer than"},
		{"ascii truncated", head + "1 2\n", "data end before element vertex item 1"},
		{"ascii short line", head + "1\n2 3\n", "missing value for c"},
		{"ascii long line", head + "1 2 3\n2 3\n", "1 values more than the header declares"},
		{"ascii uchar range", head + "1 256\n2 3\n", `"256" is not a uint8`},
		{"ascii int as float", "ply\nformat ascii 1.0\nelement v 1\nproperty int i\nend_header\n1.5\n", `"1.5" is not an int32`},
		{"ascii float32 range", "ply\nformat ascii 1.0\nelement v 1\nproperty float f\nend_header\n1e39\n", `"1e39" is not a float32`},
		{"ascii hex float", "ply\nformat ascii 1.0\nelement v 1\nproperty float f\nend_header\n0x1p3\n", "not a decimal number"},
		{"ascii trailing data", head + "1 2\n3 4\n5 6\n", "continue after the last element"},
		{"ascii list too long", "ply\nformat ascii 1.0\nelement f 1\nproperty list uchar int i\nend_header\n3 1 2\n", "has length 3 but the line holds 2"},
		{"ascii negative list count", "ply\nformat ascii 1.0\nelement f 1\nproperty list char int i\nend_header\n-1\n", "has length -1"},
		{"binary truncated", binHead + "\x00\x00\x80\x3f\x00\x00", "data ends in element vertex item 1 property x"},
		{"binary trailing", binHead + "\x00\x00\x80\x3f\x00\x00\x80\x3f\x00", "continue after the last element"},
		{"binary huge list", "ply\nformat binary_little_endian 1.0\nelement f 1\nproperty list uint int i\nend_header\n\xff\xff\xff\xff\x01\x00\x00\x00", "data ends in element f item 0"},
		{"binary negative list count", "ply\nformat binary_big_endian 1.0\nelement f 1\nproperty list int uchar i\nend_header\n\xff\xff\xff\xff", "lengths cannot be negative"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			d, err := ReadPLY(strings.NewReader(c.src))
			if err == nil {
				t.Fatalf("accepted: %+v", d)
			}
			msg := err.Error()
			if !strings.Contains(msg, c.want) || !strings.HasPrefix(msg, "export: PLY ") || strings.Contains(msg, "\n") {
				t.Errorf("error %q: want one line containing %q", msg, c.want)
			}
		})
	}
}

// A header that announces many items the data do not hold must not make
// the reader allocate for them, and items without properties cost nothing.
func TestReadPLYHostileCountsStayCheap(t *testing.T) {
	src := "ply\nformat binary_little_endian 1.0\nelement v 2147483647\nproperty double x\n" +
		"property list uint double l\nend_header\n" + strings.Repeat("\x00", 8) + "\xff\xff\xff\xff"
	var before, after runtime.MemStats
	runtime.ReadMemStats(&before)
	if _, err := ReadPLY(strings.NewReader(src)); err == nil {
		t.Fatal("truncated file accepted")
	}
	runtime.ReadMemStats(&after)
	// Bound: 1 MiB. A preallocation proportional to the announced counts
	// would be 16 GiB (2³¹ doubles) or 32 GiB (2³² list values).
	if grown := after.TotalAlloc - before.TotalAlloc; grown > 1<<20 {
		t.Errorf("reading a 100-byte file allocated %d bytes", grown)
	}
	d, err := ReadPLY(strings.NewReader("ply\nformat ascii 1.0\nelement empty 2147483647\nend_header\n"))
	if err != nil {
		t.Fatal(err)
	}
	if e := d.Element("empty"); e.Count != math.MaxInt32 || len(e.Properties) != 0 {
		t.Errorf("element %+v", e)
	}
}
