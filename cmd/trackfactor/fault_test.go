package main

// Fault cases (issue 8): damaged frames, a frame without texture, a video
// whose tail is damaged, an output folder that cannot be written or fills
// up, SIGTERM, and a frame folder that changes while it is read. Each
// failure must give a clear one-line error, a non-zero exit code, no
// partial result file and leave every other file of the output folder and
// the input exactly as they were.

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"image"
	"image/jpeg"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"syscall"
	"testing"

	"gocv.io/x/gocv"

	"trackfactor/export"
	"trackfactor/pipeline"
	"trackfactor/track/synth"
)

// faultFrames is the length of the fault-test captures: long enough that a
// damaged frame in the middle leaves at least three good frames on either
// side.
const faultFrames = 12

// faultScene is the rendered capture the fault tests damage: 12 frames of
// 320×240, 1.5° apart (the batch tests' capture, two frames longer).
func faultScene(t *testing.T) *synth.Scene {
	t.Helper()
	sc, err := synth.New(synth.Options{Seed: 21, Frames: faultFrames, Width: 320, Height: 240, StepDeg: 1.5, NoiseSigma: 1})
	if err != nil {
		t.Fatal(err)
	}
	return sc
}

// faultCapture writes the fault scene as PNG files into dir and returns
// the file names in frame order.
func faultCapture(t *testing.T, dir string) []string {
	t.Helper()
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	names, err := faultScene(t).WriteFrames(context.Background(), dir, nil)
	if err != nil {
		t.Fatal(err)
	}
	for i, n := range names {
		names[i] = filepath.Base(n)
	}
	return names
}

// outWithBystander makes an output folder that already holds a file that is
// not ours; failed runs must leave it (and everything else) alone.
func outWithBystander(t *testing.T) string {
	t.Helper()
	out := filepath.Join(t.TempDir(), "out")
	if err := os.MkdirAll(out, 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(out, "notes.txt"), []byte("measured by hand: 25.40 mm\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	return out
}

// failure is what a failed run must look like.
type failure struct {
	code     int      // the exit code expected
	mentions []string // what the message must name (a file, a frame, a flag)
}

// checkFailure checks the exit code, that stderr is exactly one line that
// mentions what it must, that the output folder holds exactly what it held
// before (outBefore; nil: the folder must not exist) and that the input is
// unchanged.
func checkFailure(t *testing.T, want failure, code int, stderr, out string, outBefore map[string]string, in string, inBefore map[string]string) {
	t.Helper()
	if code != want.code {
		t.Errorf("exit %d, want %d; stderr %q", code, want.code, stderr)
	}
	if code == exitInternal {
		t.Errorf("the fault is reported as an internal error: %q", stderr)
	}
	msg := strings.TrimSpace(stderr)
	if msg == "" || strings.Contains(msg, "\n") {
		t.Errorf("stderr is not one line: %q", stderr)
	}
	if strings.Contains(msg, "panic") || strings.Contains(msg, "goroutine ") {
		t.Errorf("the program crashed: %q", stderr)
	}
	for _, m := range want.mentions {
		if !strings.Contains(msg, m) {
			t.Errorf("the error %q does not mention %q", msg, m)
		}
	}
	if outBefore == nil {
		if _, err := os.Lstat(out); err == nil {
			t.Errorf("the failed run left the output folder %s: %v", out, leftovers(t, out))
		}
	} else if got := snapshot(t, out); !sameSnapshot(outBefore, got) {
		t.Errorf("the output folder changed: before %v, after %v", keys(outBefore), keys(got))
	}
	if in != "" && !sameSnapshot(inBefore, snapshot(t, in)) {
		t.Error("the input changed")
	}
}

func keys(m map[string]string) []string {
	var k []string
	for n := range m {
		k = append(k, filepath.Base(n))
	}
	return k
}

// A damaged frame in the middle of a folder (truncated PNG, PNG cut after
// its header, truncated JPEG, zero-byte file) stops the run with exit code
// 3 and an error naming the file, before anything is written. A truncated
// PNG keeps a valid header, so it passes the size check when the folder is
// opened and is found only when it is decoded, in the middle of tracking.
func TestFaultDamagedFrame(t *testing.T) {
	root := t.TempDir()
	good := filepath.Join(root, "good")
	names := faultCapture(t, good)
	mid := faultFrames / 2
	cases := []struct {
		name   string
		jpeg   bool
		damage func(path string, data []byte) []byte
	}{
		{"png-truncated", false, func(_ string, b []byte) []byte { return b[:len(b)/2] }},
		{"png-header-only", false, func(_ string, b []byte) []byte { return b[:33] }}, // signature + IHDR
		{"zero-bytes", false, func(_ string, b []byte) []byte { return nil }},
		{"jpeg-zero-bytes", true, func(_ string, b []byte) []byte { return nil }},
		{"jpeg-truncated", true, func(_ string, b []byte) []byte { return b[:len(b)/2] }},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			dir := filepath.Join(root, c.name)
			files := copyFrames(t, good, names, dir, c.jpeg)
			victim := filepath.Join(dir, files[mid])
			b, err := os.ReadFile(victim)
			if err != nil {
				t.Fatal(err)
			}
			if err := os.WriteFile(victim, c.damage(victim, b), 0o644); err != nil {
				t.Fatal(err)
			}
			inBefore := snapshot(t, dir)
			out := outWithBystander(t)
			outBefore := snapshot(t, out)
			code, _, stderr := runCLI(t, "run", "-q", "-o", out, dir)
			t.Logf("exit %d: %s", code, strings.TrimSpace(stderr))
			checkFailure(t, failure{code: exitInput, mentions: []string{files[mid]}}, code, stderr, out, outBefore, dir, inBefore)
		})
	}
}

// copyFrames copies the PNG frames into dir, re-encoded as JPEG (quality
// 95) when asJPEG, and returns the new file names.
func copyFrames(t *testing.T, from string, names []string, dir string, asJPEG bool) []string {
	t.Helper()
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	var out []string
	for _, n := range names {
		b, err := os.ReadFile(filepath.Join(from, n))
		if err != nil {
			t.Fatal(err)
		}
		if asJPEG {
			im, _, err := image.Decode(bytes.NewReader(b))
			if err != nil {
				t.Fatal(err)
			}
			var buf bytes.Buffer
			if err := jpeg.Encode(&buf, im, &jpeg.Options{Quality: 95}); err != nil {
				t.Fatal(err)
			}
			b = buf.Bytes()
			n = strings.TrimSuffix(n, filepath.Ext(n)) + ".jpg"
		}
		if err := os.WriteFile(filepath.Join(dir, n), b, 0o644); err != nil {
			t.Fatal(err)
		}
		out = append(out, n)
	}
	return out
}

// The real program on a truncated PNG: the whole of stderr is our one line
// (nothing printed by the image libraries underneath).
func TestFaultDamagedFrameStderr(t *testing.T) {
	if testing.Short() {
		t.Skip("builds and runs the program; in the full suite only")
	}
	bin := buildBinary(t)
	root := t.TempDir()
	good := filepath.Join(root, "good")
	names := faultCapture(t, good)
	dir := filepath.Join(root, "cut")
	files := copyFrames(t, good, names, dir, false)
	victim := filepath.Join(dir, files[faultFrames/2])
	b, _ := os.ReadFile(victim)
	os.WriteFile(victim, b[:len(b)/2], 0o644)
	out := filepath.Join(root, "out")
	cmd := exec.Command(bin, "run", "-q", "-o", out, dir)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	err := cmd.Run()
	var ee *exec.ExitError
	if !errors.As(err, &ee) || ee.ExitCode() != exitInput {
		t.Fatalf("exit %v, want %d; stderr %q", err, exitInput, stderr.String())
	}
	if lines := strings.Split(strings.TrimSpace(stderr.String()), "\n"); len(lines) != 1 {
		t.Errorf("stderr has %d lines, want our one error line: %q", len(lines), stderr.String())
	}
	if !strings.Contains(stderr.String(), files[faultFrames/2]) {
		t.Errorf("stderr does not name the damaged file: %q", stderr.String())
	}
}

// A frame with no texture at all (all black) in the middle of a good
// sequence. Every track ends there (nothing can be followed through it),
// so the sequence falls apart into the frames before and after it. The
// tool must not crash; what it does (documented here and in the report):
// it reconstructs the larger connected part of the sequence, exits 0,
// leaves the black frame out of the cameras and says in a warning which
// frames it could not reconstruct.
func TestFaultBlackFrame(t *testing.T) {
	root := t.TempDir()
	dir := filepath.Join(root, "cap")
	names := faultCapture(t, dir)
	black := faultFrames / 2
	writePNG(t, filepath.Join(dir, names[black]), 320, 240, func(x, y int) uint8 { return 0 })
	inBefore := snapshot(t, dir)
	out := filepath.Join(root, "out")
	code, stdout, stderr := runCLI(t, "run", "-o", out, dir)
	t.Logf("exit %d\n%s%s", code, stdout, stderr)
	if code != exitOK {
		// Failing is acceptable too, but then clearly and cleanly.
		checkFailure(t, failure{code: code}, code, stderr, out, nil, dir, inBefore)
		if code != exitInput && code != exitUnsolvable {
			t.Errorf("exit %d, want success, %d or %d", code, exitInput, exitUnsolvable)
		}
		return
	}
	if !sameSnapshot(inBefore, snapshot(t, dir)) {
		t.Error("the input changed")
	}
	data, err := os.ReadFile(filepath.Join(out, export.FileReconstruction))
	if err != nil {
		t.Fatal(err)
	}
	doc, err := export.ReadJSON(bytes.NewReader(data))
	if err != nil {
		t.Fatalf("the JSON written does not read back: %v", err)
	}
	frames := map[int]bool{}
	for _, c := range doc.Cameras {
		frames[c.Frame] = true
	}
	if frames[black] {
		t.Errorf("the black frame %d has a camera", black)
	}
	if len(frames) < 3 {
		t.Errorf("%d cameras; the frames on one side of the black one make at least 3", len(frames))
	}
	// Some warning must say which frames were left out, the black one
	// among them.
	said := false
	for _, w := range doc.Diagnostics.Warnings {
		if mentionsFrame(w.Message, black) {
			said = true
			t.Logf("warning [%s] %s", w.Code, w.Message)
		}
	}
	if !said {
		t.Errorf("no warning names frame %d among the frames left out: %+v", black, doc.Diagnostics.Warnings)
	}
}

// mentionsFrame reports whether a message names frame f alone or inside a
// range "a–b".
func mentionsFrame(msg string, f int) bool {
	for _, m := range regexp.MustCompile(`(\d+)(?:–(\d+))?`).FindAllStringSubmatch(msg, -1) {
		var a, b int
		fmt.Sscan(m[1], &a)
		b = a
		if m[2] != "" {
			fmt.Sscan(m[2], &b)
		}
		if a <= f && f <= b && (m[2] != "" || a == f) {
			return true
		}
	}
	return false
}

// writeVideo writes the fault scene as an MJPG .avi (OpenCV's VideoWriter).
func writeVideo(t *testing.T, path string) {
	t.Helper()
	sc := faultScene(t)
	w, h := 320, 240
	vw, err := gocv.VideoWriterFile(path, "MJPG", 10, w, h, true)
	if err != nil {
		t.Fatalf("VideoWriter: %v", err)
	}
	if !vw.IsOpened() {
		t.Skip("this OpenCV build cannot write MJPG .avi files")
	}
	for f := 0; f < faultFrames; f++ {
		im, err := sc.Render(context.Background(), f)
		if err != nil {
			t.Fatal(err)
		}
		m, err := gocv.ImageToMatRGB(im) // BGR order, despite the name
		if err != nil {
			t.Fatal(err)
		}
		err = vw.Write(m)
		m.Close()
		if err != nil {
			t.Fatal(err)
		}
	}
	if err := vw.Close(); err != nil {
		t.Fatal(err)
	}
}

// A video whose tail is damaged (the file cut at 70 % of its length, so the
// last frames and the index are gone). Either the tool uses the frames that
// decode and says where decoding stopped (exit 0, a note naming the last
// frame read), or it fails with an error naming the frame where reading
// stopped and how to choose frames before it (exit 3); in both cases
// nothing half-written is left.
func TestFaultVideoCorruptTail(t *testing.T) {
	root := t.TempDir()
	path := filepath.Join(root, "clip.avi")
	writeVideo(t, path)
	st, err := os.Stat(path)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.Truncate(path, st.Size()*7/10); err != nil {
		t.Fatal(err)
	}
	inBefore := snapshot(t, root)
	out := outWithBystander(t)
	outBefore := snapshot(t, out)
	code, stdout, stderr := runCLI(t, "run", "-q", "-o", out, path)
	t.Logf("exit %d\n%s%s", code, stdout, stderr)
	if code == exitOK {
		// Used what decodes: a warning in the JSON (or a line on stderr)
		// must say where it stopped.
		data, _ := os.ReadFile(filepath.Join(out, export.FileReconstruction))
		if !regexp.MustCompile(`(?i)(stopped|truncated|could not be read|damaged|corrupt)[^\n"]*frame[- ]0*\d+`).Match(append([]byte(stderr), data...)) {
			t.Errorf("the run succeeded without saying where the video stopped decoding")
		}
		if !sameSnapshot(inBefore, snapshot(t, root)) {
			t.Error("the input changed")
		}
		return
	}
	checkFailure(t, failure{code: exitInput, mentions: []string{"frame"}}, code, stderr, out, outBefore, root, inBefore)
	if !regexp.MustCompile(`frame[- ]0*\d+`).MatchString(stderr) {
		t.Errorf("the error does not say at which frame reading stopped: %q", stderr)
	}
	if !strings.Contains(stderr, "--end") {
		t.Errorf("the error does not say how to use the frames that decode (--end): %q", stderr)
	}
}

// An output folder that cannot be written: read-only (0555; root ignores
// the permission, so then the test says so and skips that case), and a
// path whose parent is a regular file (mkdir fails for everyone). Both are
// refused before any work, with exit code 3 and the folder named.
func TestFaultOutputNotWritable(t *testing.T) {
	root := t.TempDir()
	dir := filepath.Join(root, "cap")
	faultCapture(t, dir)
	inBefore := snapshot(t, dir)
	t.Run("read-only", func(t *testing.T) {
		out := outWithBystander(t)
		if err := os.Chmod(out, 0o555); err != nil {
			t.Fatal(err)
		}
		defer os.Chmod(out, 0o755)
		if f, err := os.CreateTemp(out, "probe"); err == nil {
			f.Close()
			os.Remove(f.Name())
			t.Skip("cannot simulate a read-only folder: this user (root?) may write into a 0555 folder; the parent-is-a-file and full-disk cases cover the failure path")
		}
		outBefore := snapshot(t, out)
		code, _, stderr := runCLI(t, "run", "-q", "-o", out, dir)
		t.Logf("exit %d: %s", code, strings.TrimSpace(stderr))
		checkFailure(t, failure{code: exitInput, mentions: []string{out}}, code, stderr, out, outBefore, dir, inBefore)
	})
	t.Run("parent-is-a-file", func(t *testing.T) {
		parent := filepath.Join(t.TempDir(), "results")
		if err := os.WriteFile(parent, []byte("a file, not a folder\n"), 0o644); err != nil {
			t.Fatal(err)
		}
		out := filepath.Join(parent, "part42")
		code, _, stderr := runCLI(t, "run", "-q", "-o", out, dir)
		t.Logf("exit %d: %s", code, strings.TrimSpace(stderr))
		checkFailure(t, failure{code: exitInput, mentions: []string{out}}, code, stderr, out, nil, dir, inBefore)
		if b, _ := os.ReadFile(parent); string(b) != "a file, not a folder\n" {
			t.Error("the file in the way was changed")
		}
	})
}

// An output disk that fills up while the results are written, simulated by
// a 96 KiB tmpfs (mounting needs root; without it the case is skipped with
// a message): the run fails with a message saying the disk is full, leaves
// no result or temporary file and does not touch the file already there.
func TestFaultOutputDiskFull(t *testing.T) {
	if os.Geteuid() != 0 {
		t.Skip("cannot simulate a full disk: mounting a small tmpfs needs root (TestFaultOutputFileTooLarge covers the write-failure path)")
	}
	root := t.TempDir()
	dir := filepath.Join(root, "cap")
	faultCapture(t, dir)
	inBefore := snapshot(t, dir)
	mnt := filepath.Join(root, "small")
	os.MkdirAll(mnt, 0o755)
	if b, err := exec.Command("mount", "-t", "tmpfs", "-o", "size=96k", "tmpfs", mnt).CombinedOutput(); err != nil {
		t.Skipf("cannot simulate a full disk: mount -t tmpfs failed (%v: %s)", err, bytes.TrimSpace(b))
	}
	t.Cleanup(func() {
		if b, err := exec.Command("umount", mnt).CombinedOutput(); err != nil {
			t.Errorf("umount %s: %v %s", mnt, err, b)
		}
	})
	out := filepath.Join(mnt, "out")
	os.MkdirAll(out, 0o755)
	os.WriteFile(filepath.Join(out, "notes.txt"), []byte("measured by hand: 25.40 mm\n"), 0o644)
	outBefore := snapshot(t, out)
	code, _, stderr := runCLI(t, "run", "-q", "-o", out, dir)
	t.Logf("exit %d: %s", code, strings.TrimSpace(stderr))
	checkFailure(t, failure{code: exitInput, mentions: []string{"no space left on device"}}, code, stderr, out, outBefore, dir, inBefore)
}

// The same write failure without privileges: the real program under a
// file-size limit (ulimit -f 64: no file may grow past 64 KiB; the Go
// runtime ignores SIGXFSZ, so writes fail with EFBIG). The run fails,
// names the file it could not write, and leaves nothing behind.
func TestFaultOutputFileTooLarge(t *testing.T) {
	if testing.Short() {
		t.Skip("builds and runs the program; in the full suite only")
	}
	bash, err := exec.LookPath("bash")
	if err != nil {
		t.Skip("cannot simulate a file-size limit: no bash for ulimit")
	}
	bin := buildBinary(t)
	root := t.TempDir()
	dir := filepath.Join(root, "cap")
	faultCapture(t, dir)
	inBefore := snapshot(t, dir)
	out := outWithBystander(t)
	outBefore := snapshot(t, out)
	cmd := exec.Command(bash, "-c", `ulimit -f 64 && exec "$0" "$@"`, bin, "run", "-q", "-o", out, dir)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	err = cmd.Run()
	code := 0
	var ee *exec.ExitError
	if errors.As(err, &ee) {
		code = ee.ExitCode()
	} else if err != nil {
		t.Fatal(err)
	}
	t.Logf("exit %d: %s", code, strings.TrimSpace(stderr.String()))
	checkFailure(t, failure{code: exitInput, mentions: []string{"file too large"}}, code, stderr.String(), out, outBefore, dir, inBefore)
}

// SIGTERM (what a scheduler or `kill` sends) while the real program tracks:
// exit code 130, a message saying it was interrupted, nothing left in the
// output folder but what was there before.
func TestFaultSIGTERM(t *testing.T) {
	if testing.Short() {
		t.Skip("builds and runs the program; in the full suite only")
	}
	capDir := filepath.Join(t.TempDir(), "cap")
	renderLong(t, capDir)
	out := outWithBystander(t)
	outBefore := snapshot(t, out)
	signalWhileTracking(t, syscall.SIGTERM, out, capDir)
	if got := snapshot(t, out); !sameSnapshot(outBefore, got) {
		t.Errorf("the output folder changed after SIGTERM: %v", keys(got))
	}
}

// A frame folder that changes after it was listed: a frame removed,
// replaced by an image of another size, or overwritten by garbage while
// the run is tracking the frames before it. The run stops with exit code
// 3 and an error naming the file; nothing is written.
func TestFaultFolderChanges(t *testing.T) {
	root := t.TempDir()
	good := filepath.Join(root, "good")
	names := faultCapture(t, good)
	last := names[len(names)-1] // read last, long after the listing
	cases := []struct {
		name   string
		change func(path string)
		says   string
	}{
		{"removed", func(p string) { os.Remove(p) }, "can no longer be read"},
		{"other-size", func(p string) { writePNG(t, p, 160, 120, flat) }, "160x120"},
		{"garbage", func(p string) { os.WriteFile(p, []byte("not an image any more"), 0o644) }, "could not be decoded"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			dir := filepath.Join(root, c.name)
			copyFrames(t, good, names, dir, false)
			out := outWithBystander(t)
			outBefore := snapshot(t, out)
			changed := false
			_, err := pipeline.Run(context.Background(), pipeline.Config{Input: dir, Out: out, Progress: func(stage string, done, total int) {
				if stage == "track" && done == 2 && !changed {
					changed = true
					c.change(filepath.Join(dir, last))
				}
			}})
			if !changed {
				t.Fatal("no tracking progress to change the folder at")
			}
			if err == nil {
				t.Fatal("the run succeeded on a folder that changed under it")
			}
			t.Logf("exit %d: %v", exitCode(err), err)
			msg := err.Error()
			checkFailure(t, failure{code: exitInput, mentions: []string{last, c.says}}, exitCode(err), msg+"\n", out, outBefore, "", nil)
		})
	}
}

// A reconstruction estimated to need more memory than allowed is refused
// with exit code 3 and a message naming --max-memory, before anything is
// written; a size that is not one is a usage error naming the flag. The
// default limit (a share of the available memory) lets the small capture
// through.
func TestFaultMemoryLimit(t *testing.T) {
	root := t.TempDir()
	dir := filepath.Join(root, "cap")
	faultCapture(t, dir)
	inBefore := snapshot(t, dir)
	out := outWithBystander(t)
	outBefore := snapshot(t, out)
	code, _, stderr := runCLI(t, "run", "-q", "--max-memory", "64K", "-o", out, dir)
	t.Logf("exit %d: %s", code, strings.TrimSpace(stderr))
	checkFailure(t, failure{code: exitInput, mentions: []string{"--max-memory", "64.0 KiB"}}, code, stderr, out, outBefore, dir, inBefore)

	code, _, stderr = runCLI(t, "run", "-q", "--max-memory", "lots", "-o", out, dir)
	checkFailure(t, failure{code: exitUsage, mentions: []string{"--max-memory", "lots"}}, code, stderr, out, outBefore, dir, inBefore)

	if code, _, stderr := runCLI(t, "run", "-q", "-o", filepath.Join(root, "fits"), dir); code != exitOK {
		t.Errorf("default limit: exit %d, %s", code, stderr)
	}
}

// Tracks that never share enough points between two frames (here four
// tracks, where the missing-data solver needs five in common to start):
// no reconstruction is possible from the data, which is exit code 4 with
// one line, not an internal error.
func TestFaultDisconnectedTracks(t *testing.T) {
	dir := t.TempDir()
	csv := filepath.Join(dir, "tracks.csv")
	var b strings.Builder
	b.WriteString("track,frame,x,y\n")
	for tr := 0; tr < 4; tr++ {
		for _, f := range []int{0, 2, 3} {
			fmt.Fprintf(&b, "%d,%d,%d,%d\n", tr, f, 10+tr*40+f, 20+tr*30-f)
		}
	}
	if err := os.WriteFile(csv, []byte(b.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	inBefore := snapshot(t, dir)
	out := filepath.Join(dir, "out")
	code, _, stderr := runCLI(t, "factor", "-q", "-o", out, csv)
	t.Logf("exit %d: %s", code, strings.TrimSpace(stderr))
	checkFailure(t, failure{code: exitUnsolvable, mentions: []string{"tracks"}}, code, stderr, out, nil, dir, inBefore)
}
