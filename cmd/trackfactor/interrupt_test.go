package main

import (
	"bufio"
	"bytes"
	"context"
	"errors"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"testing"

	"trackfactor/pipeline"
	"trackfactor/track/synth"
)

// leftovers lists every file under dir (temporary files included).
func leftovers(t *testing.T, dir string) []string {
	t.Helper()
	var files []string
	filepath.Walk(dir, func(p string, info os.FileInfo, err error) error {
		if err == nil && !info.IsDir() {
			files = append(files, p)
		}
		return nil
	})
	return files
}

// A run cancelled in the middle (tracking, or the solve) returns the
// cancellation, maps to exit code 130 and leaves no file at all behind.
func TestCancelMidRun(t *testing.T) {
	capDir := filepath.Join(t.TempDir(), "cap")
	renderCapture(t, capDir, 31)
	for _, stage := range []string{"track", "factorize"} {
		t.Run(stage, func(t *testing.T) {
			ctx, cancel := context.WithCancel(context.Background())
			defer cancel()
			out := filepath.Join(t.TempDir(), "out")
			seen := false
			_, err := pipeline.Run(ctx, pipeline.Config{Input: capDir, Out: out, Progress: func(s string, done, total int) {
				if strings.HasSuffix(s, stage) && done >= 1 {
					seen = true
					cancel()
				}
			}})
			if !seen {
				t.Fatalf("no progress from stage %q to cancel at", stage)
			}
			if !errors.Is(err, context.Canceled) || exitCode(err) != exitInterrupted {
				t.Fatalf("err %v (exit %d), want the cancellation (exit %d)", err, exitCode(err), exitInterrupted)
			}
			if files := leftovers(t, filepath.Dir(out)); len(files) != 0 {
				t.Errorf("files left after the cancelled run: %v", files)
			}
		})
	}
}

// cancelOn is a writer that cancels a context when a line it is given
// contains a marker.
type cancelOn struct {
	mu     sync.Mutex
	buf    bytes.Buffer
	marker string
	cancel func()
}

func (c *cancelOn) Write(p []byte) (int, error) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.buf.Write(p)
	if strings.Contains(c.buf.String(), c.marker) {
		c.cancel()
	}
	return len(p), nil
}

// A batch interrupted after its first capture keeps that capture (and its
// resume record), leaves no temporary file, writes no summary, and the
// next run resumes from there.
func TestBatchInterrupted(t *testing.T) {
	root := batchRoot(t)
	out := filepath.Join(t.TempDir(), "out")
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	ew := &cancelOn{marker: `"event":"note"`, cancel: cancel} // the first finished capture
	var so bytes.Buffer
	err := newApp(&so, ew).RunContext(ctx, []string{"trackfactor", "batch", "--jobs", "1", "--log-format", "json", "-o", out, root})
	if exitCode(err) != exitInterrupted || !strings.Contains(err.Error(), "resume") {
		t.Fatalf("err %v (exit %d), want an interruption that says how to resume", err, exitCode(err))
	}
	for _, f := range leftovers(t, out) {
		if strings.Contains(filepath.Base(f), ".tmp") {
			t.Errorf("temporary file left: %s", f)
		}
		if strings.HasPrefix(filepath.Base(f), "summary") {
			t.Errorf("summary written by an interrupted batch: %s", f)
		}
	}
	if _, err := os.Stat(filepath.Join(out, "alpha", fileDone)); err != nil {
		t.Errorf("the finished capture lost its resume record: %v", err)
	}
	if _, err := os.Stat(filepath.Join(out, "gamma")); err == nil {
		t.Error("a capture after the interruption was started")
	}
	runCLI(t, "batch", "-q", "-o", out, root)
	rows := rowsByName(readSummary(t, filepath.Join(out, fileSummaryJSON)).Rows)
	if !rows["alpha"].Resumed || rows["gamma"].Status != statusDone {
		t.Errorf("after resuming: alpha %+v, gamma %+v", rows["alpha"], rows["gamma"])
	}
}

// Ctrl-C on the real program: SIGINT while it tracks makes it stop with
// exit code 130, say so, and leave the output folder without any file.
func TestSIGINTCleansUp(t *testing.T) {
	if testing.Short() {
		t.Skip("builds and runs the program; in the full suite only")
	}
	capDir := filepath.Join(t.TempDir(), "cap")
	renderLong(t, capDir)
	out := filepath.Join(t.TempDir(), "out")
	signalWhileTracking(t, syscall.SIGINT, out, capDir)
	if files := leftovers(t, filepath.Dir(out)); len(files) != 0 {
		t.Errorf("files left after Ctrl-C: %v", files)
	}
}

// signalWhileTracking runs the real program on capDir into out, sends it
// sig once it reports tracking, and checks that it exits with code 130
// and says it was interrupted.
func signalWhileTracking(t *testing.T, sig os.Signal, out, capDir string) {
	t.Helper()
	cmd := exec.Command(buildBinary(t), "run", "-o", out, capDir)
	stderr, err := cmd.StderrPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	var rest bytes.Buffer
	sc := bufio.NewScanner(stderr)
	signalled := false
	for sc.Scan() {
		line := sc.Text()
		rest.WriteString(line + "\n")
		if !signalled && strings.HasPrefix(line, "track") {
			if err := cmd.Process.Signal(sig); err != nil {
				t.Fatal(err)
			}
			signalled = true
		}
	}
	io.Copy(&rest, stderr)
	err = cmd.Wait()
	var ee *exec.ExitError
	if !signalled {
		t.Fatalf("the program ended before tracking was reported: %v\n%s", err, rest.String())
	}
	if !errors.As(err, &ee) || ee.ExitCode() != exitInterrupted {
		t.Fatalf("exit %v, want %d\n%s", err, exitInterrupted, rest.String())
	}
	if !strings.Contains(rest.String(), "interrupted") {
		t.Errorf("stderr does not say it was interrupted:\n%s", rest.String())
	}
}

// renderLong writes a sequence long enough (30 frames of 640×480) that
// tracking is still running when the signal arrives.
func renderLong(t *testing.T, dir string) {
	t.Helper()
	scene, err := synth.New(synth.Options{Seed: 41, Frames: 30, StepDeg: 0.5, Supersample: 1})
	if err != nil {
		t.Fatal(err)
	}
	os.MkdirAll(dir, 0o755)
	if _, err := scene.WriteFrames(context.Background(), dir, nil); err != nil {
		t.Fatal(err)
	}
}
