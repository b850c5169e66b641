package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// run writes report.html with the others; `report OUT` writes it again
// from the files alone (frames found through the JSON's input, tracks from
// tracks.csv); -o refuses to replace a file without --force.
func TestReportCommand(t *testing.T) {
	capDir := filepath.Join(t.TempDir(), "part9")
	renderCapture(t, capDir, 51)
	out := filepath.Join(t.TempDir(), "out")
	if code, _, stderr := runCLI(t, "run", "-q", "-o", out, capDir); code != 0 {
		t.Fatalf("run: exit %d: %s", code, stderr)
	}
	first, err := os.ReadFile(filepath.Join(out, "report.html"))
	if err != nil {
		t.Fatalf("run wrote no report: %v", err)
	}
	if err := os.Remove(filepath.Join(out, "report.html")); err != nil {
		t.Fatal(err)
	}
	if code, _, stderr := runCLI(t, "report", out); code != 0 {
		t.Fatalf("report: exit %d: %s", code, stderr)
	}
	again, err := os.ReadFile(filepath.Join(out, "report.html"))
	if err != nil {
		t.Fatal(err)
	}
	page := string(again)
	for _, want := range []string{"data:image/jpeg;base64,", `id="view3d"`, `data-verdict="`, "part9"} {
		if !strings.Contains(page, want) {
			t.Errorf("the rewritten report lacks %q", want)
		}
	}
	if strings.Count(page, `class="frame"`) != 3 || !strings.Contains(page, " used") {
		t.Error("the rewritten report does not show three frames with the used tracks")
	}
	if strings.Contains(string(first), "no tracks.csv") || strings.Contains(page, "no tracks.csv") {
		t.Error("a report says the tracks are missing although tracks.csv is there")
	}
	other := filepath.Join(t.TempDir(), "copy.html")
	if code, _, _ := runCLI(t, "report", "-q", "-o", other, out); code != 0 {
		t.Fatalf("report -o: exit %d", code)
	}
	if code, _, stderr := runCLI(t, "report", "-q", "-o", other, out); code != exitInput || !strings.Contains(stderr, "--force") {
		t.Errorf("report -o onto an existing file: exit %d %q, want %d naming --force", code, stderr, exitInput)
	}
	if code, _, _ := runCLI(t, "report", "-q", "--force", "-o", other, out); code != 0 {
		t.Errorf("report -o --force: exit %d", code)
	}
	if code, _, stderr := runCLI(t, "report", t.TempDir()); code != exitInput || !strings.Contains(stderr, "reconstruction.json") {
		t.Errorf("report of an empty folder: exit %d %q", code, stderr)
	}
	if leftover, _ := filepath.Glob(filepath.Join(out, ".*tmp*")); len(leftover) != 0 {
		t.Errorf("temporary files left: %v", leftover)
	}
}
