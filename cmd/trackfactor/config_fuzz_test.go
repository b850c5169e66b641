package main

import (
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"trackfactor/pipeline"
)

// configSeeds are config files in the forms the loader reads (YAML, TOML,
// command sections, lists, every scalar type) and near misses (unknown
// keys, a nested config, a section that is not a table, bad values).
var configSeeds = []struct {
	ext, text string
}{
	{".yaml", "corners: 500\nfb-threshold: 0.8\nquality: 1e-2\nno-refine: true\n"},
	{".yml", "corners: 400\ntrack:\n  min_length: 5\n  roi: 10,10,200,100\nrun:\n  model: paraperspective\n"},
	{".toml", "corners = 400\nfb_threshold = 0.75\n\n[track]\nlevels = 2\nwindow = 15\n"},
	{".toml", "[run]\ncorners = 350\n[batch]\njobs = 2\n"},
	{".cfg", "corners = 300\n"},
	{".cfg", "corners: 300\n"},
	{".yaml", ""},
	{".yaml", "---\n...\n"},
	{".yaml", "corners: [1, 2]\n"},
	{".yaml", "corners: {a: 1}\n"},
	{".yaml", "corners: ~\n"},
	{".yaml", "corners: 12abc\n"},
	{".yaml", "start: -1\nstep: 0\n"},
	{".yaml", "config: other.yaml\n"},
	{".yaml", "track: 5\n"},
	{".yaml", "track:\n  model: orthographic\n"},
	{".yaml", "cornerz: 500\n"},
	{".yaml", "log-format: xml\n"},
	{".yaml", "- corners\n- 500\n"},
	{".yaml", "a: &x [*x]\n"},
	{".toml", "corners = 1979-05-27T07:32:00Z\n"},
	{".toml", "corners = [1, 2]\n[track\n"},
	{".toml", "\"\" = 1\n"},
}

var configExts = []string{".yaml", ".yml", ".toml", ".cfg"}

// FuzzConfigFile feeds damaged config files to the loader and then to the
// whole command line (`trackfactor track --config FILE -o … MISSING`, so
// that no command ever reaches real work). Neither may panic; the loader's
// errors are one line naming the file and are bad input (exit code 3);
// the command exits with 2 (a bad value in the file) or 3 (bad input: the
// file, or the missing frames when the file is fine) — never success,
// never an internal error — with a one-line message that names the file
// when the file is at fault, and the same message every time.
func FuzzConfigFile(f *testing.F) {
	for _, s := range configSeeds {
		f.Add([]byte(s.text), uint8(indexOf(configExts, s.ext)))
	}
	dir := f.TempDir()
	missing := filepath.Join(dir, "no-such-frames")
	out := filepath.Join(dir, "tracks.csv")
	f.Fuzz(func(t *testing.T, data []byte, ext uint8) {
		path := filepath.Join(dir, "tf"+configExts[int(ext)%len(configExts)])
		if err := os.WriteFile(path, data, 0o644); err != nil {
			t.Fatal(err)
		}
		_, lerr := loadConfig(path)
		if lerr != nil {
			var ie *pipeline.InputError
			if !errors.As(lerr, &ie) {
				t.Fatalf("loader error is not bad input: %T %v", lerr, lerr)
			}
			if msg := lerr.Error(); strings.ContainsAny(msg, "\n\r") || !strings.Contains(msg, path) {
				t.Fatalf("loader error is not one line naming the file: %q", msg)
			}
		}
		var first string
		for i := 0; i < 4; i++ { // 4 runs: a file with 8 bad keys shows a map-order dependence with probability 1 − 8⁻³
			code, _, stderr := runCLI(t, "track", "-q", "--config", path, "-o", out, missing)
			msg := strings.TrimSpace(stderr)
			if code != exitUsage && code != exitInput {
				t.Fatalf("exit %d, want %d or %d; stderr %q", code, exitUsage, exitInput, stderr)
			}
			if msg == "" || strings.ContainsAny(msg, "\n\r") {
				t.Fatalf("stderr is not one line: %q", stderr)
			}
			if lerr != nil && !strings.Contains(msg, path) {
				t.Fatalf("the config file is bad but the message does not name it: %q", msg)
			}
			if i == 0 {
				first = msg
			} else if msg != first {
				t.Fatalf("the same file gives different messages:\n%s\n%s", first, msg)
			}
		}
		if _, err := os.Stat(out); err == nil {
			t.Fatalf("a failed command wrote %s", out)
		}
	})
}

func indexOf(list []string, s string) int {
	for i, v := range list {
		if v == s {
			return i
		}
	}
	panic("indexOf: " + s + " not in list")
}
