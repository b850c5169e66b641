package main

import (
	"bytes"
	"image"
	"image/color"
	"image/png"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// runCLI runs the command in-process and returns exit code, stdout, stderr.
func runCLI(t *testing.T, args ...string) (int, string, string) {
	t.Helper()
	var out, errb bytes.Buffer
	code := run(append([]string{"trackfactor"}, args...), &out, &errb)
	return code, out.String(), errb.String()
}

func writePNG(t *testing.T, path string, w, h int, fill func(x, y int) uint8) {
	t.Helper()
	im := image.NewGray(image.Rect(0, 0, w, h))
	for y := 0; y < h; y++ {
		for x := 0; x < w; x++ {
			im.SetGray(x, y, color.Gray{fill(x, y)})
		}
	}
	f, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	if err := png.Encode(f, im); err != nil {
		t.Fatal(err)
	}
}

func flat(x, y int) uint8 { return 90 }

// snapshot lists a folder's files with their contents, to show that a
// failed run changed nothing.
func snapshot(t *testing.T, dir string) map[string]string {
	t.Helper()
	m := map[string]string{}
	filepath.Walk(dir, func(p string, info os.FileInfo, err error) error {
		if err == nil && !info.IsDir() {
			b, _ := os.ReadFile(p)
			m[p] = string(b)
		}
		return nil
	})
	return m
}

func sameSnapshot(a, b map[string]string) bool {
	if len(a) != len(b) {
		return false
	}
	for k, v := range a {
		if b[k] != v {
			return false
		}
	}
	return true
}

// Each bad input of issue 2 gets a one-line error naming what is wrong, a
// non-zero exit code, no output files and an unchanged input.
func TestBadInput(t *testing.T) {
	root := t.TempDir()
	mk := func(name string, files map[string]func(string)) string {
		d := filepath.Join(root, name)
		os.MkdirAll(d, 0o755)
		for n, f := range files {
			f(filepath.Join(d, n))
		}
		return d
	}
	png := func(w, h int) func(string) {
		return func(p string) { writePNG(t, p, w, h, flat) }
	}
	cases := []struct {
		name  string
		input string
		code  int
		want  []string
	}{
		{"missing path", filepath.Join(root, "nope"), exitInput, []string{"nope"}},
		{"empty folder", mk("empty", nil), exitInput, []string{"empty"}},
		{"corrupt image", mk("corrupt", map[string]func(string){
			"0.png": png(64, 48), "1.png": func(p string) { os.WriteFile(p, []byte("\x89PNG\r\n\x1a\nbroken"), 0o644) }, "2.png": png(64, 48),
		}), exitInput, []string{"1.png"}},
		{"different sizes", mk("sizes", map[string]func(string){
			"0.png": png(64, 48), "1.png": png(64, 48), "2.png": png(80, 48),
		}), exitInput, []string{"2.png"}},
		{"two frames", mk("two", map[string]func(string){"0.png": png(64, 48), "1.png": png(64, 48)}), exitInput, []string{"3"}},
		{"no texture", mk("flat", map[string]func(string){
			"0.png": png(64, 48), "1.png": png(64, 48), "2.png": png(64, 48), "3.png": png(64, 48),
		}), exitInput, []string{"track"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			before := snapshot(t, root)
			out := filepath.Join(t.TempDir(), "out")
			code, _, stderr := runCLI(t, "run", "-q", "-o", out, c.input)
			if code != c.code {
				t.Errorf("exit %d, want %d; stderr %q", code, c.code, stderr)
			}
			if strings.Count(strings.TrimSpace(stderr), "\n") != 0 {
				t.Errorf("error is not one line: %q", stderr)
			}
			for _, w := range c.want {
				if !strings.Contains(stderr, w) {
					t.Errorf("error %q does not mention %q", stderr, w)
				}
			}
			if entries, _ := os.ReadDir(out); len(entries) != 0 {
				t.Errorf("output folder holds %d entries after a failed run", len(entries))
			}
			if !sameSnapshot(before, snapshot(t, root)) {
				t.Error("the input changed")
			}
		})
	}
}

func TestUsageErrors(t *testing.T) {
	dir := t.TempDir()
	cases := [][]string{
		{"run", dir},                       // no -o
		{"run", "-o", dir, dir, "--force"}, // flag after the argument
		{"run", "--model", "fisheye", "-o", filepath.Join(dir, "o"), dir},
		{"run", "--no-such-flag", dir},
		{"run", "--step", "0", "-o", filepath.Join(dir, "o"), dir},
	}
	for _, args := range cases {
		code, _, stderr := runCLI(t, args...)
		if code != exitUsage {
			t.Errorf("%v: exit %d, want %d; stderr %q", args, code, exitUsage, stderr)
		}
		if strings.TrimSpace(stderr) == "" {
			t.Errorf("%v: no message", args)
		}
	}
}

// Every command's --help explains every flag with its default.
func TestHelpListsDefaults(t *testing.T) {
	for _, cmd := range []string{"run", "demo", "track", "factor", "validate"} {
		code, out, _ := runCLI(t, cmd, "--help")
		if code != 0 {
			t.Errorf("%s --help: exit %d", cmd, code)
		}
		if cmd == "run" {
			for _, want := range []string{"--corners value", "(default: 1000)", "--fb-threshold", "(default: 0.5)", "--model", "orthographic", "--force"} {
				if !strings.Contains(out, want) {
					t.Errorf("run --help lacks %q", want)
				}
			}
		}
	}
}
