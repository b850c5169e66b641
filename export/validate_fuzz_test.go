package export

import (
	"bytes"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// jsonSeeds returns the reconstruction files of testdata (the golden
// document, and two written by the program: a complete-track run and a
// full turn through the missing-data solver, see testdata/README.md) and
// hand-made near misses.
func jsonSeeds(f *testing.F) [][]byte {
	files, err := filepath.Glob(filepath.Join("testdata", "reconstruction.*.json"))
	if err != nil || len(files) < 3 {
		f.Fatalf("want the three reconstruction files of testdata, found %v (%v)", files, err)
	}
	var seeds [][]byte
	for _, name := range files {
		b, err := os.ReadFile(name)
		if err != nil {
			f.Fatal(err)
		}
		seeds = append(seeds, b)
	}
	minimal := `{"schema": "` + SchemaID + `", "producer": {"version": "1", "command": "x"}, "input": {"source": "s", "frames": [], "width": 1, "height": 1},` +
		` "settings": {}, "model": "orthographic", "units": "px", "cameras": [], "points": [],` +
		` "diagnostics": {"singular_values": [], "rms_px": 0, "expected_rms_px": 0, "mirror_ambiguous": false, "warnings": []}}`
	for _, s := range []string{
		minimal,
		strings.Replace(minimal, SchemaID, schemaPrefix+"99", 1),
		strings.Replace(minimal, `"units": "px"`, `"units": 7`, 1),
		strings.Replace(minimal, `"settings": {}`, `"settings": {"a": [1e400, -0, 1.0e0, "\u00e9"]}`, 1),
		minimal + " {}",
		minimal[:len(minimal)/2],
		`{"schema": null}`,
		`[]`,
		``,
	} {
		seeds = append(seeds, []byte(s))
	}
	return seeds
}

// checkOneLine fails when an error message is not one line starting with
// the package prefix.
func checkOneLine(t *testing.T, err error) {
	t.Helper()
	msg := err.Error()
	if strings.ContainsAny(msg, "\n\r") || !strings.HasPrefix(msg, "export: ") {
		t.Fatalf("error is not one export: line: %q", msg)
	}
}

// FuzzValidate feeds damaged reconstruction files to the schema validator.
// It must never panic, every error is one line, and the error is the same
// on every call (the first problem reported must not depend on the order
// the validator visits keywords in). FuzzReadJSON checks that it agrees
// with ReadJSON.
func FuzzValidate(f *testing.F) {
	for _, s := range jsonSeeds(f) {
		f.Add(s)
	}
	v, err := NewValidator()
	if err != nil {
		f.Fatal(err)
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		verr := v.Validate(data)
		if verr == nil {
			return
		}
		checkOneLine(t, verr)
		for i := 0; i < 3; i++ {
			if again := v.Validate(data); again == nil || again.Error() != verr.Error() {
				t.Fatalf("the validator's verdict changed between calls: %v, then %v", verr, again)
			}
		}
	})
}

// FuzzReadJSON feeds damaged reconstruction files to ReadJSON. It must
// never panic and every error is one line; what it accepts is valid for
// the validator, and is written back
// by WriteJSON into a file that is valid and is a fixed point: reading and
// writing it again gives the same bytes.
func FuzzReadJSON(f *testing.F) {
	seeds := jsonSeeds(f)
	for _, s := range seeds {
		f.Add(s)
	}
	// The files of testdata and the minimal document (the first four
	// seeds) must be accepted, or the round trip below is never reached.
	for i, s := range seeds[:4] {
		if _, err := ReadJSON(bytes.NewReader(s)); err != nil {
			f.Fatalf("seed %d is refused: %v", i, err)
		}
	}
	v, err := NewValidator()
	if err != nil {
		f.Fatal(err)
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		doc, err := ReadJSON(bytes.NewReader(data))
		if err != nil {
			checkOneLine(t, err)
			return
		}
		if err := v.Validate(data); err != nil {
			t.Fatalf("ReadJSON accepts a file the validator refuses: %v", err)
		}
		var once bytes.Buffer
		if err := WriteJSON(&once, doc); err != nil {
			t.Fatalf("an accepted document cannot be written back: %v", err)
		}
		if err := v.Validate(once.Bytes()); err != nil {
			t.Fatalf("the document written back is not valid: %v\n%s", err, once.Bytes())
		}
		doc2, err := ReadJSON(bytes.NewReader(once.Bytes()))
		if err != nil {
			t.Fatalf("the document written back does not read: %v\n%s", err, once.Bytes())
		}
		var twice bytes.Buffer
		if err := WriteJSON(&twice, doc2); err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(once.Bytes(), twice.Bytes()) {
			t.Fatalf("write–read–write is not a fixed point:\n%s\n---\n%s", once.Bytes(), twice.Bytes())
		}
	})
}
