package export

import (
	"bytes"
	"encoding/binary"
	"os"
	"path/filepath"
	"testing"
)

// FuzzReadPLY feeds damaged PLY files to ReadPLY. It must never panic, and
// whatever it accepts must be self-consistent: every property holds exactly
// Count values (or lists) and every value fits the declared type.
func FuzzReadPLY(f *testing.F) {
	files, err := filepath.Glob(filepath.Join("testdata", "*.ply"))
	if err != nil || len(files) == 0 {
		f.Fatalf("no seed files in testdata (%v)", err)
	}
	for _, name := range files {
		b, err := os.ReadFile(name)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b)
	}
	f.Add(binaryCube(binary.LittleEndian, "binary_little_endian"))
	f.Add(binaryCube(binary.BigEndian, "binary_big_endian"))
	var pts bytes.Buffer
	if err := WritePointsPLY(&pts, goldenDocument(), PLYOptions{Uncertainty: []float64{1, 2, 3}}); err != nil {
		f.Fatal(err)
	}
	f.Add(pts.Bytes())
	f.Fuzz(func(t *testing.T, data []byte) {
		d, err := ReadPLY(bytes.NewReader(data))
		if err != nil {
			return
		}
		for _, e := range d.Elements {
			for _, p := range e.Properties {
				typ, ok := lookupPLYType(p.Type)
				if !ok {
					t.Fatalf("accepted unknown type %q", p.Type)
				}
				if len(e.Properties) == 0 {
					continue
				}
				if p.IsList() {
					if len(p.List) != e.Count || p.Scalar != nil {
						t.Fatalf("element %s list %s: %d lists for count %d", e.Name, p.Name, len(p.List), e.Count)
					}
					for _, l := range p.List {
						for _, v := range l {
							checkFits(t, v, typ)
						}
					}
				} else {
					if len(p.Scalar) != e.Count || p.List != nil {
						t.Fatalf("element %s property %s: %d values for count %d", e.Name, p.Name, len(p.Scalar), e.Count)
					}
					for _, v := range p.Scalar {
						checkFits(t, v, typ)
					}
				}
			}
		}
	})
}

func checkFits(t *testing.T, v float64, typ plyType) {
	t.Helper()
	if typ.kind == 'f' {
		if typ.bits == 32 && v == v && float64(float32(v)) != v {
			t.Fatalf("float32 property holds %v", v)
		}
		return
	}
	lo, hi := 0.0, float64(uint64(1)<<typ.bits-1)
	if typ.kind == 'i' {
		lo, hi = -float64(uint64(1)<<(typ.bits-1)), float64(uint64(1)<<(typ.bits-1)-1)
	}
	if v != float64(int64(v)) || v < lo || v > hi {
		t.Fatalf("%s property holds %v", typ.canon, v)
	}
}
