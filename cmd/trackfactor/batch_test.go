package main

import (
	"context"
	"encoding/csv"
	"encoding/json"
	"os"
	"path/filepath"
	"reflect"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"trackfactor/track/synth"
)

// renderCapture writes a small rendered turntable sequence (10 frames of
// 320×240) into dir.
func renderCapture(t testing.TB, dir string, seed int64) {
	t.Helper()
	scene, err := synth.New(synth.Options{Seed: seed, Frames: 10, Width: 320, Height: 240, StepDeg: 1.5, NoiseSigma: 1})
	if err != nil {
		t.Fatal(err)
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	if _, err := scene.WriteFrames(context.Background(), dir, nil); err != nil {
		t.Fatal(err)
	}
}

// batchRoot makes a batch folder: good captures "alpha" and "gamma", a
// broken one "beta" (two frames only: too few) and a file that is no
// capture.
func batchRoot(t *testing.T) string {
	t.Helper()
	root := filepath.Join(t.TempDir(), "captures")
	renderCapture(t, filepath.Join(root, "alpha"), 11)
	renderCapture(t, filepath.Join(root, "gamma"), 12)
	broken := filepath.Join(root, "beta")
	os.MkdirAll(broken, 0o755)
	for _, n := range []string{"0.png", "1.png"} {
		writePNG(t, filepath.Join(broken, n), 64, 48, func(x, y int) uint8 { return uint8(x * y) })
	}
	os.WriteFile(filepath.Join(root, "notes.txt"), []byte("not a capture"), 0o644)
	return root
}

func readSummary(t *testing.T, path string) batchSummary {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	var s batchSummary
	if err := json.Unmarshal(b, &s); err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	return s
}

func rowsByName(rows []summaryRow) map[string]summaryRow {
	m := map[string]summaryRow{}
	for _, r := range rows {
		m[r.Capture] = r
	}
	return m
}

// comparable drops what may differ between two runs of the same batch:
// the time, whether the row was resumed, and the report link (relative to
// the summary's folder).
func comparable(rows []summaryRow) []summaryRow {
	out := make([]summaryRow, len(rows))
	for i, r := range rows {
		r.TimeS, r.Resumed, r.Report = 0, false, ""
		out[i] = r
	}
	return out
}

// One bad capture fails alone: the others are reconstructed, it gets a
// failure report, the summary lists all three, the index links every
// report, and the exit code says that something failed.
func TestBatchBrokenAmongGood(t *testing.T) {
	root := batchRoot(t)
	out := filepath.Join(t.TempDir(), "out")
	code, _, stderr := runCLI(t, "batch", "-q", "--jobs", "2", "-o", out, root)
	if code != exitInput {
		t.Fatalf("exit %d, want %d (a capture failed); stderr %q", code, exitInput, stderr)
	}
	if !strings.Contains(stderr, "beta") {
		t.Errorf("the error does not name the failed capture: %q", stderr)
	}
	sum := readSummary(t, filepath.Join(out, fileSummaryJSON))
	if len(sum.Rows) != 3 || sum.Captures != 3 {
		t.Fatalf("%d rows for %d captures, want 3 (notes.txt is no capture)", len(sum.Rows), sum.Captures)
	}
	rows := rowsByName(sum.Rows)
	for _, name := range []string{"alpha", "gamma"} {
		r := rows[name]
		if r.Status != statusDone || r.Points < 4 || r.Frames != 10 || r.RMSPx == nil || r.Verdict == "failed" {
			t.Errorf("%s: %+v, want a reconstruction of 10 frames", name, r)
		}
		if _, err := os.Stat(filepath.Join(out, name, "reconstruction.json")); err != nil {
			t.Errorf("%s: %v", name, err)
		}
	}
	b := rows["beta"]
	if b.Status != statusFailed || b.Verdict != "failed" || !strings.Contains(b.Error, "at least 3") {
		t.Errorf("beta: %+v, want failed with the reason", b)
	}
	fr, err := os.ReadFile(filepath.Join(out, "beta", "report.html"))
	if err != nil || !strings.Contains(string(fr), `data-verdict="failed"`) || !strings.Contains(string(fr), "at least 3") {
		t.Errorf("beta has no failure report saying why (%v)", err)
	}
	// The CSV has the same rows.
	f, err := os.Open(filepath.Join(out, fileSummaryCSV))
	if err != nil {
		t.Fatal(err)
	}
	recs, err := csv.NewReader(f).ReadAll()
	f.Close()
	if err != nil || len(recs) != 4 || recs[0][0] != "capture" || recs[1][0] != "alpha" || recs[2][0] != "beta" || recs[2][1] != "failed" {
		t.Errorf("summary.csv: %v (%v)", recs, err)
	}
	// Every report is linked from the index, and every link resolves.
	idx, err := os.ReadFile(filepath.Join(out, fileIndex))
	if err != nil {
		t.Fatal(err)
	}
	links := regexp.MustCompile(`href="([^"]+)"`).FindAllStringSubmatch(string(idx), -1)
	if len(links) != 3 {
		t.Errorf("index has %d links, want 3", len(links))
	}
	for _, l := range links {
		if _, err := os.Stat(filepath.Join(out, filepath.FromSlash(l[1]))); err != nil {
			t.Errorf("index link %s: %v", l[1], err)
		}
	}
}

// A second run skips what is done with the same settings and input, and
// redoes the failure; a changed input is done again; --force redoes all;
// other settings never replace results without --force.
func TestBatchResume(t *testing.T) {
	root := batchRoot(t)
	out := filepath.Join(t.TempDir(), "out")
	runCLI(t, "batch", "-q", "-o", out, root)
	first := rowsByName(readSummary(t, filepath.Join(out, fileSummaryJSON)).Rows)
	jsonBefore, _ := os.ReadFile(filepath.Join(out, "alpha", "reconstruction.json"))

	code, _, _ := runCLI(t, "batch", "-q", "-o", out, root)
	if code != exitInput {
		t.Errorf("second run: exit %d, want %d (beta still fails)", code, exitInput)
	}
	second := rowsByName(readSummary(t, filepath.Join(out, fileSummaryJSON)).Rows)
	for _, name := range []string{"alpha", "gamma"} {
		if !second[name].Resumed || second[name].TimeS != first[name].TimeS {
			t.Errorf("%s was not skipped: %+v", name, second[name])
		}
	}
	if second["beta"].Resumed {
		t.Error("a failed capture was skipped instead of tried again")
	}
	if after, _ := os.ReadFile(filepath.Join(out, "alpha", "reconstruction.json")); string(after) != string(jsonBefore) {
		t.Error("a skipped capture's results changed")
	}

	// A changed input file (newer modification time) makes it run again.
	frame := filepath.Join(root, "gamma", "000.png")
	later := time.Now().Add(time.Minute)
	if err := os.Chtimes(frame, later, later); err != nil {
		t.Fatal(err)
	}
	runCLI(t, "batch", "-q", "-o", out, root)
	third := rowsByName(readSummary(t, filepath.Join(out, fileSummaryJSON)).Rows)
	if !third["alpha"].Resumed || third["gamma"].Resumed {
		t.Errorf("after touching gamma: alpha resumed %v (want true), gamma resumed %v (want false)", third["alpha"].Resumed, third["gamma"].Resumed)
	}

	// Other settings: the results are not replaced without --force.
	code, _, _ = runCLI(t, "batch", "-q", "--corners", "300", "-o", out, root)
	other := rowsByName(readSummary(t, filepath.Join(out, fileSummaryJSON)).Rows)
	if code != exitInput || other["alpha"].Status != statusFailed || !strings.Contains(other["alpha"].Error, "--force") {
		t.Errorf("other settings without --force: exit %d, alpha %+v; want a refusal naming --force", code, other["alpha"])
	}
	if after, _ := os.ReadFile(filepath.Join(out, "alpha", "reconstruction.json")); string(after) != string(jsonBefore) {
		t.Error("results were replaced without --force")
	}
	runCLI(t, "batch", "-q", "--force", "--corners", "300", "-o", out, root)
	forced := rowsByName(readSummary(t, filepath.Join(out, fileSummaryJSON)).Rows)
	if forced["alpha"].Resumed || forced["alpha"].Status != statusDone {
		t.Errorf("--force: alpha %+v, want done again", forced["alpha"])
	}
}

// The union of the shards is the whole batch: N shards merged give the
// rows of the one-machine run (apart from times), whether the shards share
// an output folder or each has its own; a missing shard is refused.
func TestBatchShardsUnion(t *testing.T) {
	root := batchRoot(t)
	whole := filepath.Join(t.TempDir(), "whole")
	runCLI(t, "batch", "-q", "-o", whole, root)
	want := comparable(readSummary(t, filepath.Join(whole, fileSummaryJSON)).Rows)

	shared := filepath.Join(t.TempDir(), "shared")
	var own []string
	for k := 1; k <= 3; k++ {
		runCLI(t, "batch", "-q", "--shard", itoa(k)+"/3", "-o", shared, root)
		d := filepath.Join(t.TempDir(), "own"+itoa(k))
		runCLI(t, "batch", "-q", "--shard", itoa(k)+"/3", "-o", d, root)
		own = append(own, d)
		s := readSummary(t, filepath.Join(d, "summary-shard-"+itoa(k)+"-of-3.json"))
		if len(s.Rows) != 1 {
			t.Errorf("shard %d/3 of 3 captures ran %d", k, len(s.Rows))
		}
	}
	code, _, stderr := runCLI(t, "batch", "-q", "--merge", shared)
	if code != exitInput {
		t.Errorf("merge: exit %d, want %d (beta failed); %s", code, exitInput, stderr)
	}
	if got := comparable(readSummary(t, filepath.Join(shared, fileSummaryJSON)).Rows); !reflect.DeepEqual(got, want) {
		t.Errorf("merged shards differ from the whole run:\n got %+v\nwant %+v", got, want)
	}
	merged := filepath.Join(t.TempDir(), "merged")
	runCLI(t, "batch", "-q", "--merge", "-o", merged, own[0], own[1], own[2])
	ms := readSummary(t, filepath.Join(merged, fileSummaryJSON))
	if got := comparable(ms.Rows); !reflect.DeepEqual(got, want) {
		t.Errorf("merged own-folder shards differ from the whole run:\n got %+v\nwant %+v", got, want)
	}
	for _, r := range ms.Rows { // links point into the shards' folders
		if _, err := os.Stat(filepath.Join(merged, filepath.FromSlash(r.Report))); err != nil {
			t.Errorf("merged report link %s: %v", r.Report, err)
		}
	}
	code, _, stderr = runCLI(t, "batch", "-q", "--merge", "-o", filepath.Join(t.TempDir(), "m2"), own[0], own[2])
	if code != exitInput || !strings.Contains(stderr, "2/3") {
		t.Errorf("merge without shard 2: exit %d, stderr %q; want a refusal naming shard 2/3", code, stderr)
	}
}

func itoa(i int) string { return strconv.Itoa(i) }

// Shard selection is index mod N over the name-sorted captures.
func TestShardOf(t *testing.T) {
	var caps []capture
	for _, n := range []string{"a", "b", "c", "d", "e"} {
		caps = append(caps, capture{Name: n})
	}
	got := map[int][]string{}
	for k := 1; k <= 2; k++ {
		for _, c := range shardOf(caps, k, 2) {
			got[k] = append(got[k], c.Name)
		}
	}
	if !reflect.DeepEqual(got[1], []string{"a", "c", "e"}) || !reflect.DeepEqual(got[2], []string{"b", "d"}) {
		t.Errorf("shards %v", got)
	}
	for _, bad := range []string{"0/2", "3/2", "1", "a/b", "1/0"} {
		if _, _, err := parseShard(bad); err == nil {
			t.Errorf("--shard %s accepted", bad)
		}
	}
}
