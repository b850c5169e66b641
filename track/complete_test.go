package track

import (
	"bytes"
	"image/jpeg"
	"image/png"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// Every PNG and JPEG photograph of Debian's opencv-doc package
// (examples/data; real files from many encoders, some with EXIF
// thumbnails, progressive JPEGs among them) passes checkComplete whole,
// and fails it when cut short at any of several points. The reference is
// Go's standard image/png and image/jpeg decoders, which are strict about
// truncation: at every cut where they fail, checkComplete must fail too,
// and on every whole file both succeed. A flipped byte inside a PNG is
// caught by the chunk checksum (PNG specification, ISO/IEC 15948, §5.3).
func TestCheckCompleteRealFiles(t *testing.T) {
	dir := filepath.Dir(extData(t, "graf1.png"))
	entries, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	checked := 0
	for _, e := range entries {
		name := e.Name()
		ext := strings.ToLower(filepath.Ext(name))
		if ext != ".png" && ext != ".jpg" && ext != ".jpeg" {
			continue
		}
		b, err := os.ReadFile(filepath.Join(dir, name))
		if err != nil {
			t.Fatal(err)
		}
		decode := func(b []byte) error {
			if ext == ".png" {
				_, err := png.Decode(bytes.NewReader(b))
				return err
			}
			_, err := jpeg.Decode(bytes.NewReader(b))
			return err
		}
		if decode(b) != nil {
			continue // a variant Go's decoders do not read (e.g. 16-bit or CMYK): no reference
		}
		checked++
		if err := checkComplete(b); err != nil {
			t.Errorf("%s (whole, %d bytes): %v", name, len(b), err)
			continue
		}
		for _, cut := range []int{len(b) / 4, len(b) / 2, len(b) * 3 / 4, len(b) - 20, len(b) - 2, len(b) - 1} {
			if cut <= 0 || decode(b[:cut]) == nil {
				continue // the reference accepts this cut (e.g. only trailing bytes lost)
			}
			if checkComplete(b[:cut]) == nil {
				t.Errorf("%s cut to %d of %d bytes: accepted; the reference decoder refuses it", name, cut, len(b))
			}
		}
		if ext == ".png" {
			bad := bytes.Clone(b)
			bad[len(bad)/2] ^= 0x40
			if checkComplete(bad) == nil {
				t.Errorf("%s with a flipped byte at %d: accepted", name, len(bad)/2)
			}
		}
	}
	if checked < 40 {
		t.Errorf("only %d files checked; the opencv-doc data should give more than 40", checked)
	}
	t.Logf("%d PNG and JPEG files checked", checked)
}

// Formats other than PNG and JPEG, and data that is neither, are left to
// the decoder; empty input too.
func TestCheckCompleteOtherData(t *testing.T) {
	for _, b := range [][]byte{nil, []byte("BM\x00\x00"), []byte("II*\x00"), []byte("not an image")} {
		if err := checkComplete(b); err != nil {
			t.Errorf("%q: %v", b, err)
		}
	}
	for _, b := range [][]byte{pngSignature, {0xFF, 0xD8}, {0xFF, 0xD8, 0xFF}} {
		if checkComplete(b) == nil {
			t.Errorf("%q: a header alone accepted", b)
		}
	}
}

// FuzzCheckComplete: checkComplete never panics or loops on any input and,
// where it accepts a PNG or JPEG, Go's strict decoders do not fail with an
// unexpected end of the data.
func FuzzCheckComplete(f *testing.F) {
	f.Add([]byte{0xFF, 0xD8, 0xFF, 0xD9})
	f.Add(append(bytes.Clone(pngSignature), 0, 0, 0, 0, 'I', 'E', 'N', 'D', 0xAE, 0x42, 0x60, 0x82))
	f.Add([]byte{0xFF, 0xD8, 0xFF, 0xDA, 0x00, 0x02, 0xFF, 0x00, 0xFF, 0xD0, 0xFF, 0xD9})
	f.Fuzz(func(t *testing.T, b []byte) {
		if checkComplete(b) != nil {
			return
		}
		if bytes.HasPrefix(b, pngSignature) {
			if _, err := png.Decode(bytes.NewReader(b)); err != nil && strings.Contains(err.Error(), "unexpected EOF") {
				t.Errorf("accepted a PNG that ends early: %v", err)
			}
		}
	})
}
