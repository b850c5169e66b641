package main

import (
	"encoding/json"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
)

// settingsOf reads the effective settings a run recorded in its JSON.
func settingsOf(t *testing.T, out string) map[string]any {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(out, "reconstruction.json"))
	if err != nil {
		t.Fatal(err)
	}
	var doc struct {
		Settings map[string]any `json:"settings"`
	}
	if err := json.Unmarshal(b, &doc); err != nil {
		t.Fatal(err)
	}
	return doc.Settings
}

func maxCorners(s map[string]any) float64 {
	return s["track"].(map[string]any)["detect"].(map[string]any)["max_corners"].(float64)
}

func fromList(s map[string]any, key string) []string {
	var out []string
	for _, v := range s["config"].(map[string]any)[key].([]any) {
		out = append(out, v.(string))
	}
	return out
}

// Precedence: flag > environment > config file > default, for a flag the
// config code knows nothing about (it walks the command's flags), with
// where each value came from recorded in the JSON.
func TestConfigPrecedence(t *testing.T) {
	capDir := filepath.Join(t.TempDir(), "cap")
	renderCapture(t, capDir, 21)
	dir := t.TempDir()
	yamlFile := filepath.Join(dir, "tf.yaml")
	os.WriteFile(yamlFile, []byte("corners: 400\nfb_threshold: 0.75\n"), 0o644)
	tomlFile := filepath.Join(dir, "tf.toml")
	os.WriteFile(tomlFile, []byte("corners = 400\n\n[run]\ncorners = 350\n"), 0o644)
	n := 0
	run := func(env map[string]string, args ...string) (int, string, map[string]any) {
		t.Helper()
		for k, v := range env {
			t.Setenv(k, v)
		}
		defer func() {
			for k := range env {
				os.Unsetenv(k)
			}
		}()
		n++
		out := filepath.Join(dir, "out"+itoa(n))
		code, _, stderr := runCLI(t, append(append([]string{"run", "-q", "-o", out}, args...), capDir)...)
		if code != 0 {
			return code, stderr, nil
		}
		return code, stderr, settingsOf(t, out)
	}
	_, _, s := run(nil)
	if got := maxCorners(s); got != 1000 {
		t.Errorf("default: max_corners %v, want 1000 (the documented default)", got)
	}
	if f := s["config"].(map[string]any)["file"]; f != "" {
		t.Errorf("default: config file %q recorded, want none", f)
	}

	_, _, s = run(nil, "--config", yamlFile)
	if got := maxCorners(s); got != 400 {
		t.Errorf("file: max_corners %v, want 400", got)
	}
	if s["config"].(map[string]any)["file"] != yamlFile || !reflect.DeepEqual(fromList(s, "from_file"), []string{"corners", "fb-threshold"}) {
		t.Errorf("file: config recorded as %v", s["config"])
	}
	if fb := s["track"].(map[string]any)["fb_threshold"]; fb != 0.75 {
		t.Errorf("file: fb_threshold %v, want 0.75 (key written with _)", fb)
	}

	_, _, s = run(map[string]string{"TRACKFACTOR_CORNERS": "300"}, "--config", yamlFile)
	if got := maxCorners(s); got != 300 {
		t.Errorf("env over file: max_corners %v, want 300", got)
	}
	if !reflect.DeepEqual(fromList(s, "from_env"), []string{"corners"}) || !reflect.DeepEqual(fromList(s, "from_file"), []string{"fb-threshold"}) {
		t.Errorf("env over file: recorded %v", s["config"])
	}

	_, _, s = run(map[string]string{"TRACKFACTOR_CORNERS": "300"}, "--config", yamlFile, "--corners", "200")
	if got := maxCorners(s); got != 200 {
		t.Errorf("flag over env and file: max_corners %v, want 200", got)
	}

	// TRACKFACTOR_CONFIG names the file; a section for the command wins
	// over the top level.
	_, _, s = run(map[string]string{"TRACKFACTOR_CONFIG": tomlFile})
	if got := maxCorners(s); got != 350 {
		t.Errorf("TOML with a [run] section: max_corners %v, want 350", got)
	}

	// Mistakes are usage errors that name the culprit.
	bad := filepath.Join(dir, "bad.yaml")
	os.WriteFile(bad, []byte("cornrs: 400\n"), 0o644)
	if code, stderr, _ := run(nil, "--config", bad); code != exitUsage || !strings.Contains(stderr, "cornrs") {
		t.Errorf("unknown key: exit %d, %q; want %d naming the key", code, stderr, exitUsage)
	}
	if code, stderr, _ := run(map[string]string{"TRACKFACTOR_CORNERS": "many"}); code != exitUsage || !strings.Contains(stderr, "TRACKFACTOR_CORNERS") {
		t.Errorf("bad env value: exit %d, %q; want %d naming the variable", code, stderr, exitUsage)
	}
	if code, stderr, _ := run(nil, "--config", filepath.Join(dir, "missing.yaml")); code != exitInput || !strings.Contains(stderr, "missing.yaml") {
		t.Errorf("missing config: exit %d, %q; want %d naming the file", code, stderr, exitInput)
	}
	if code, stderr, _ := run(nil, "--log-format", "xml"); code != exitUsage || !strings.Contains(stderr, "log-format") {
		t.Errorf("bad --log-format: exit %d, %q", code, stderr)
	}
}

func TestEnvName(t *testing.T) {
	for in, want := range map[string]string{"corners": "TRACKFACTOR_CORNERS", "fb-threshold": "TRACKFACTOR_FB_THRESHOLD", "log-format": "TRACKFACTOR_LOG_FORMAT"} {
		if got := envName(in); got != want {
			t.Errorf("envName(%q) = %q, want %q", in, got, want)
		}
	}
}
