package track

import (
	"bytes"
	"context"
	"fmt"
	"image"
	"image/color"
	"image/png"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"testing"
	"time"

	"gocv.io/x/gocv"
)

func writePNG(t *testing.T, path string, w, h int, seed int64) {
	t.Helper()
	var buf bytes.Buffer
	if err := png.Encode(&buf, noiseImage(w, h, seed)); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(path, buf.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}
}

// snapshot records every file's bytes and modification time in dir.
func snapshot(t *testing.T, dir string) map[string]string {
	t.Helper()
	out := map[string]string{}
	entries, _ := os.ReadDir(dir)
	for _, e := range entries {
		p := filepath.Join(dir, e.Name())
		b, _ := os.ReadFile(p)
		fi, _ := os.Stat(p)
		out[e.Name()] = string(b) + "|" + fi.ModTime().Format(time.RFC3339Nano)
	}
	return out
}

func TestNaturalLess(t *testing.T) {
	names := []string{"10.png", "2.png", "1.png", "frame010.png", "frame9.png", "a.png", "frame009b.png", "02.png"}
	sort.Slice(names, func(i, j int) bool { return naturalLess(names[i], names[j]) })
	want := "1.png 02.png 2.png 10.png a.png frame9.png frame009b.png frame010.png"
	if got := strings.Join(names, " "); got != want {
		t.Errorf("natural order %q, want %q", got, want)
	}
}

func TestRange(t *testing.T) {
	for _, tc := range []struct {
		r    Range
		n    int
		want string
		err  string
	}{
		{Range{}, 5, "[0 1 2 3 4]", ""},
		{Range{Start: 1, End: 4}, 5, "[1 2 3]", ""},
		{Range{Step: 2}, 5, "[0 2 4]", ""},
		{Range{Start: 1, End: 99, Step: 3}, 8, "[1 4 7]", ""},
		{Range{Start: 5}, 5, "", "range start 5 is at or past the end"},
		{Range{Step: -1}, 5, "", "none may be negative"},
	} {
		idx, err := tc.r.indices(tc.n)
		if tc.err != "" {
			if err == nil || !strings.Contains(err.Error(), tc.err) {
				t.Errorf("%+v: error %v, want %q", tc.r, err, tc.err)
			}
			continue
		}
		if err != nil || fmt.Sprint(idx) != tc.want {
			t.Errorf("%+v on %d: %v %v, want %s", tc.r, tc.n, idx, err, tc.want)
		}
	}
}

// TestOpenFolder checks sorting, extension matching, the formats OpenCV
// writes (PNG, JPEG, TIFF, BMP headers read by our size check must agree
// with OpenCV's decoder) and that reading leaves the files unchanged.
func TestOpenFolder(t *testing.T) {
	dir := t.TempDir()
	// Frames 0..4 in different formats and case; names sort naturally.
	img := gocv.NewMatWithSize(30, 40, gocv.MatTypeCV8UC3)
	defer img.Close()
	names := []string{"f1.png", "f2.JPG", "f3.tif", "f10.BMP", "f11.tiff", "f12.jpeg"}
	for i, n := range names {
		img.SetTo(gocv.NewScalar(float64(10*i), 100, 200, 0))
		if !gocv.IMWrite(filepath.Join(dir, n), img) {
			t.Fatalf("IMWrite %s failed", n)
		}
	}
	os.WriteFile(filepath.Join(dir, "notes.txt"), []byte("not a frame"), 0o644)
	os.WriteFile(filepath.Join(dir, ".hidden.png"), []byte("junk"), 0o644)
	os.Mkdir(filepath.Join(dir, "sub.png"), 0o755)
	before := snapshot(t, dir)
	src, err := OpenFolder(dir, Range{})
	if err != nil {
		t.Fatal(err)
	}
	defer src.Close()
	if src.Len() != len(names) {
		t.Fatalf("%d frames, want %d", src.Len(), len(names))
	}
	for i, n := range names {
		if src.Name(i) != n {
			t.Errorf("frame %d is %s, want %s", i, src.Name(i), n)
		}
	}
	if w, h := src.Size(); w != 40 || h != 30 {
		t.Errorf("size %dx%d, want 40x30", w, h)
	}
	m := gocv.NewMat()
	defer m.Close()
	for i := 0; i < src.Len(); i++ {
		if err := src.Read(context.Background(), i, &m); err != nil {
			t.Fatal(err)
		}
		if m.Cols() != 40 || m.Rows() != 30 || m.Type() != gocv.MatTypeCV8UC3 {
			t.Errorf("frame %d decoded as %dx%d type %v", i, m.Cols(), m.Rows(), m.Type())
		}
		// Blue channel (BGR order) was 10·i; JPEG may change it slightly.
		if b := int(m.GetVecbAt(5, 5)[0]); b < 10*i-3 || b > 10*i+3 {
			t.Errorf("frame %d blue %d, want about %d (frame order or channel order wrong)", i, b, 10*i)
		}
	}
	sub, err := OpenFolder(dir, Range{Start: 1, Step: 2})
	if err != nil {
		t.Fatal(err)
	}
	if sub.Len() != 3 || sub.Name(0) != "f2.JPG" || sub.Name(2) != "f12.jpeg" {
		t.Errorf("range 1::2 gave %d frames starting %s", sub.Len(), sub.Name(0))
	}
	after := snapshot(t, dir)
	for k, v := range before {
		if after[k] != v {
			t.Errorf("%s changed while reading", k)
		}
	}
	if len(after) != len(before) {
		t.Errorf("files added or removed while reading: %d -> %d", len(before), len(after))
	}
}

// TestSourceErrors checks that each bad input gives its one-line error
// naming what is wrong and what to do, and leaves the files unchanged.
func TestSourceErrors(t *testing.T) {
	root := t.TempDir()
	mk := func(name string, files map[string]func(p string)) string {
		d := filepath.Join(root, name)
		os.Mkdir(d, 0o755)
		for f, fn := range files {
			fn(filepath.Join(d, f))
		}
		return d
	}
	png := func(w, h int) func(string) { return func(p string) { writePNG(t, p, w, h, 1) } }
	junk := func(p string) { os.WriteFile(p, []byte("this is not an image"), 0o644) }
	empty := mk("empty", nil)
	noimg := mk("noimg", map[string]func(string){"a.txt": junk, "b.csv": junk})
	corrupt := mk("corrupt", map[string]func(string){"0.png": png(32, 24), "1.png": junk, "2.png": png(32, 24)})
	sizes := mk("sizes", map[string]func(string){"0.png": png(32, 24), "1.png": png(32, 24), "2.png": png(33, 24)})
	two := mk("two", map[string]func(string){"0.png": png(32, 24), "1.png": png(32, 24)})
	ok3 := mk("ok3", map[string]func(string){"0.png": png(32, 24), "1.png": png(32, 24), "2.png": png(32, 24)})
	fakevideo := filepath.Join(root, "clip.avi")
	junk(fakevideo)
	single := filepath.Join(ok3, "0.png")
	before := map[string]map[string]string{}
	for _, d := range []string{noimg, corrupt, sizes, two, ok3} {
		before[d] = snapshot(t, d)
	}

	cases := []struct {
		name  string
		open  func() (Source, error)
		frags []string
	}{
		{"missing path", func() (Source, error) { return Open(filepath.Join(root, "nope"), Range{}) }, []string{"does not exist", "give a folder of images or a video file"}},
		{"missing folder", func() (Source, error) { return OpenFolder(filepath.Join(root, "nope"), Range{}) }, []string{"folder", "does not exist"}},
		{"missing video", func() (Source, error) { return OpenVideo(filepath.Join(root, "nope.avi"), Range{}) }, []string{"video", "does not exist"}},
		{"empty folder", func() (Source, error) { return Open(empty, Range{}) }, []string{"is empty", "PNG, JPEG, TIFF or BMP"}},
		{"no images", func() (Source, error) { return Open(noimg, Range{}) }, []string{"has no images (2 other entries)", ".png"}},
		{"corrupt image", func() (Source, error) { return Open(corrupt, Range{}) }, []string{"image 1.png is corrupt or not an image", "replace or remove it"}},
		{"different sizes", func() (Source, error) { return Open(sizes, Range{}) }, []string{"frame 2.png is 33x24 but 0.png is 32x24", "one size"}},
		{"two frames", func() (Source, error) { return Open(two, Range{}) }, []string{"gives 2 frames", "at least 3"}},
		{"range leaves two", func() (Source, error) { return Open(ok3, Range{Start: 1}) }, []string{"gives 2 frames (range 1::1 of 3 images)"}},
		{"range past end", func() (Source, error) { return Open(ok3, Range{Start: 7}) }, []string{"range start 7"}},
		{"single image", func() (Source, error) { return Open(single, Range{}) }, []string{"is a single image", "folder"}},
		{"not a video", func() (Source, error) { return Open(fakevideo, Range{}) }, []string{"could not be opened as a video", "extract its frames"}},
		{"two in memory", func() (Source, error) {
			return FromImages([]image.Image{image.NewGray(image.Rect(0, 0, 4, 4)), image.NewGray(image.Rect(0, 0, 4, 4))}, nil)
		}, []string{"2 in-memory frames", "at least 3"}},
		{"memory sizes", func() (Source, error) {
			g := func(w int) image.Image { return image.NewGray(image.Rect(0, 0, w, 4)) }
			return FromImages([]image.Image{g(4), g(4), g(5)}, []string{"a", "b", "c"})
		}, []string{"frame c is 5x4 but a is 4x4"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			src, err := tc.open()
			if err == nil {
				src.Close()
				t.Fatalf("no error, want %q", tc.frags)
			}
			msg := err.Error()
			if !strings.HasPrefix(msg, "track: ") || strings.Contains(msg, "\n") {
				t.Errorf("error %q is not a one-line track: error", msg)
			}
			for _, f := range tc.frags {
				if !strings.Contains(msg, f) {
					t.Errorf("error %q lacks %q", msg, f)
				}
			}
		})
	}
	// A file whose header is fine but whose data is cut off fails at Read,
	// naming the file.
	trunc := mk("trunc", map[string]func(string){"0.png": png(64, 48), "1.png": png(64, 48), "2.png": png(64, 48)})
	p := filepath.Join(trunc, "1.png")
	b, _ := os.ReadFile(p)
	os.WriteFile(p, b[:len(b)/3], 0o644)
	src, err := Open(trunc, Range{})
	if err != nil {
		t.Fatalf("truncated file rejected before decoding: %v", err)
	}
	m := gocv.NewMat()
	defer m.Close()
	if err := src.Read(context.Background(), 1, &m); err == nil || !strings.Contains(err.Error(), "frame 1.png could not be decoded") {
		t.Errorf("truncated frame: error %v", err)
	}
	for d, snap := range before {
		after := snapshot(t, d)
		for k, v := range snap {
			if after[k] != v {
				t.Errorf("%s/%s changed", filepath.Base(d), k)
			}
		}
	}
}

// TestFromImages checks channel order and sub-image handling of the
// in-memory source.
func TestFromImages(t *testing.T) {
	big := image.NewRGBA(image.Rect(0, 0, 10, 10))
	big.Set(3, 4, color.RGBA{200, 100, 50, 255})
	sub := big.SubImage(image.Rect(2, 2, 8, 8))
	src, err := FromImages([]image.Image{sub, sub, sub}, nil)
	if err != nil {
		t.Fatal(err)
	}
	m := gocv.NewMat()
	defer m.Close()
	if err := src.Read(context.Background(), 0, &m); err != nil {
		t.Fatal(err)
	}
	v := m.GetVecbAt(2, 1) // (x=3,y=4) in the sub-image's parent
	if m.Cols() != 6 || v[0] != 50 || v[1] != 100 || v[2] != 200 {
		t.Errorf("pixel BGR %v in a %d-wide Mat, want [50 100 200] in 6", v, m.Cols())
	}
	if src.Name(2) != "frame-000002" {
		t.Errorf("name %q", src.Name(2))
	}
}
