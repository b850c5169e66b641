package pipeline

import (
	"bytes"
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
	"testing"

	"trackfactor/track"
	"trackfactor/track/synth"
)

func TestParseSize(t *testing.T) {
	good := []struct {
		in   string
		want int64
	}{
		{"0", 0}, {"1048576", 1 << 20}, {"16G", 16 << 30}, {"800M", 800 << 20}, {"1.5GiB", 3 << 29},
		{"2k", 2048}, {"3 MB", 3 << 20}, {"1t", 1 << 40}, {"512b", 512}, {" 4g ", 4 << 30},
	}
	for _, c := range good {
		got, err := ParseSize(c.in)
		if err != nil || got != c.want {
			t.Errorf("ParseSize(%q) = %d, %v; want %d", c.in, got, err, c.want)
		}
	}
	for _, in := range []string{"", "G", "-1G", "lots", "1e400", "NaN", "0x10", "16GG", "9999999T", "Inf"} {
		if v, err := ParseSize(in); err == nil {
			t.Errorf("ParseSize(%q) = %d, want an error", in, v)
		} else if strings.Contains(err.Error(), "\n") {
			t.Errorf("ParseSize(%q): error not one line: %q", in, err)
		}
	}
}

func TestFormatAndRoundUp(t *testing.T) {
	for _, c := range []struct {
		b          int64
		text, size string
	}{
		{512, "512 B", "512"},
		{1536, "1.50 KiB", "2K"},
		{15 << 20, "15.0 MiB", "15M"},
		{(15 << 30) + 1, "15.0 GiB", "16G"},
		{300 << 30, "300 GiB", "300G"},
	} {
		if got := FormatBytes(c.b); got != c.text {
			t.Errorf("FormatBytes(%d) = %q, want %q", c.b, got, c.text)
		}
		if got := roundUpSize(c.b); got != c.size {
			t.Errorf("roundUpSize(%d) = %q, want %q", c.b, got, c.size)
		}
		if back, err := ParseSize(roundUpSize(c.b)); err != nil || back < c.b {
			t.Errorf("roundUpSize(%d) = %q reads back as %d (%v), below the size", c.b, roundUpSize(c.b), back, err)
		}
	}
}

// The MemAvailable line of a Linux /proc/meminfo (format of
// Documentation/filesystems/proc.rst, values in kB = KiB).
func TestParseMemAvailable(t *testing.T) {
	const meminfo = "MemTotal:       24683620 kB\nMemFree:        21972992 kB\nMemAvailable:   23770504 kB\nBuffers:          144540 kB\n"
	got, err := parseMemAvailable(strings.NewReader(meminfo))
	if err != nil || got != 23770504*1024 {
		t.Errorf("got %d, %v; want %d", got, err, 23770504*1024)
	}
	for _, bad := range []string{"MemTotal: 1 kB\n", "MemAvailable: lots kB\n", "MemAvailable: 12 pages\n", ""} {
		if _, err := parseMemAvailable(strings.NewReader(bad)); err == nil {
			t.Errorf("%q: no error", bad)
		}
	}
	if _, err := os.Stat("/proc/meminfo"); err == nil {
		if avail, err := memAvailable(); err != nil || avail <= 0 {
			t.Errorf("this machine's meminfo: %d, %v", avail, err)
		}
	}
}

// The estimate's terms, from the formula of limits.go.
func TestEstimateMemory(t *testing.T) {
	const f, p = 300, 2000
	if got, want := EstimateMemory(f, p, f*p, false, false), int64(BytesPerObservation*f*p); got != want {
		t.Errorf("complete, no refinement: %d, want %d", got, want)
	}
	if got, want := EstimateMemory(f, p, f*p, false, true), int64(BytesPerObservation*f*p+ReducedSystemCopies*8*36*f*f); got != want {
		t.Errorf("complete, refined: %d, want %d", got, want)
	}
	// 300 frames: above the missing-data solver's dense limit (200).
	if got, want := EstimateMemory(f, p, f*p/4, true, false), int64(IncompleteBytesPerObservation*f*p/4+DenseBytesPerEntry*f*p+CGBytesPerObservation*f*p/4+CGBytesPerFrame*f); got != want {
		t.Errorf("incomplete, %d frames: %d, want %d", f, got, want)
	}
	const g = 150
	if got, want := EstimateMemory(g, p, g*p/4, true, false), int64(IncompleteBytesPerObservation*g*p/4+DenseBytesPerEntry*g*p+MissingSystemCopies*8*64*g*g); got != want {
		t.Errorf("incomplete, %d frames: %d, want %d", g, got, want)
	}
	if got := EstimateMemory(1<<30, 1<<30, math.MaxInt, true, true); got != 1<<62 {
		t.Errorf("huge sizes: %d, want the cap 2^62", got)
	}
}

// A limit below the estimate is refused with an *InputError (exit code 3
// in the CLI) whose one line says what is needed, the limit, and names
// --max-memory with a value that would pass; a limit above it passes.
func TestCheckMemory(t *testing.T) {
	const f, p = 100, 1000
	need := EstimateMemory(f, p, f*p, false, true)
	err := CheckMemory(f, p, f*p, false, Config{MaxMemory: need - 1})
	var ie *InputError
	if !errors.As(err, &ie) {
		t.Fatalf("got %v, want an *InputError", err)
	}
	msg := err.Error()
	for _, want := range []string{"100 frames × 1000 tracks", FormatBytes(need), "--max-memory " + roundUpSize(need), "set by --max-memory"} {
		if !strings.Contains(msg, want) {
			t.Errorf("message %q lacks %q", msg, want)
		}
	}
	if strings.Contains(msg, "\n") {
		t.Errorf("message is not one line: %q", msg)
	}
	if err := CheckMemory(f, p, f*p, false, Config{MaxMemory: need}); err != nil {
		t.Errorf("at the limit: %v", err)
	}
	// Up to 500 frames the square term dominates a sequence with few tracks:
	// the hint says so.
	err = CheckMemory(400, 10, 4000, false, Config{MaxMemory: 1 << 20})
	if err == nil || !strings.Contains(err.Error(), "square of the frames") || !strings.Contains(err.Error(), "--refine=false") {
		t.Errorf("long sequence: %v", err)
	}
	// Without a limit given, the default is a share of what is available.
	if limit, why, ok := MemoryLimit(0); ok && (limit <= 0 || !strings.Contains(why, "available")) {
		t.Errorf("default limit %d (%s)", limit, why)
	}
}

// Reconstruct refuses before any work when the limit is too low, on the
// complete-track path and on the missing-data path, and goes ahead with
// the default limit.
func TestReconstructMemoryGuard(t *testing.T) {
	for _, incomplete := range []bool{false, true} {
		set := syntheticTracks(40, 200, incomplete, 7)
		_, err := Reconstruct(context.Background(), set, Config{MaxMemory: 1 << 20})
		var ie *InputError
		if !errors.As(err, &ie) || !strings.Contains(err.Error(), "--max-memory") {
			t.Errorf("incomplete=%v, 1 MiB limit: got %v, want the memory refusal", incomplete, err)
		}
		if _, err := Reconstruct(context.Background(), set, Config{}); err != nil {
			t.Errorf("incomplete=%v, default limit: %v", incomplete, err)
		}
	}
}

// The early guard: frames whose tracker buffers and solvers alone exceed
// the limit are refused when the input is opened, before the first frame
// is tracked (no tracking progress is reported), with the one-line message
// naming --max-memory; a limit just above that lets the tracking run.
func TestRunRefusesFramesBeforeTracking(t *testing.T) {
	_, dir := renderScene(t, synth.Options{Frames: 6, Width: 160, Height: 120, StepDeg: 2, Seed: 4})
	early := EstimateMemory(6, 0, 0, false, true) + TrackBytesPerPixel*160*120
	for _, c := range []struct {
		limit   int64
		tracked bool
	}{{early - 1, false}, {early + 1, true}} {
		tracked := false
		_, err := Run(context.Background(), Config{Input: dir, MaxMemory: c.limit, Progress: func(stage string, done, total int) {
			tracked = tracked || stage == "track"
		}})
		if tracked != c.tracked {
			t.Errorf("limit %d (early estimate %d): tracking ran %v, want %v; %v", c.limit, early, tracked, c.tracked, err)
		}
		if c.tracked {
			continue
		}
		var ie *InputError
		if !errors.As(err, &ie) || !strings.Contains(err.Error(), "--max-memory") || strings.Contains(err.Error(), "\n") {
			t.Errorf("limit %d: got %v, want the one-line memory refusal", c.limit, err)
		}
	}
}

// Frames whose headers claim a huge size (a few bytes of PNG can say
// 60000 × 60000 pixels, a "decompression bomb") are refused from their
// headers alone, before any is decoded, with a message naming the size;
// three such files, since all frames must share one size.
func TestRunRefusesHugeFrames(t *testing.T) {
	dir := t.TempDir()
	// PNG signature and an IHDR chunk (ISO/IEC 15948 §11.2.2) for a
	// 60000 × 60000 8-bit RGB image, with its CRC; no image data.
	ihdr := []byte{'I', 'H', 'D', 'R', 0, 0, 0xEA, 0x60, 0, 0, 0xEA, 0x60, 8, 2, 0, 0, 0}
	var b bytes.Buffer
	b.Write([]byte{0x89, 'P', 'N', 'G', '\r', '\n', 0x1A, '\n', 0, 0, 0, 13})
	b.Write(ihdr)
	binary.Write(&b, binary.BigEndian, crc32.ChecksumIEEE(ihdr))
	for _, n := range []string{"a.png", "b.png", "c.png"} {
		if err := os.WriteFile(filepath.Join(dir, n), b.Bytes(), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	tracked := false
	_, err := Run(context.Background(), Config{Input: dir, Progress: func(stage string, done, total int) {
		tracked = tracked || stage == "track"
	}})
	var ie *InputError
	if !errors.As(err, &ie) || !strings.Contains(err.Error(), "60000×60000") || !strings.Contains(err.Error(), "--max-memory") {
		t.Errorf("got %v, want the refusal naming the frame size", err)
	}
	if tracked {
		t.Error("tracking started on frames that cannot fit")
	}
}

// syntheticTracks makes the tracks of points in a ball on a turntable seen
// by an orthographic camera 20° above it, turning 0.5° per frame (a full
// turn in 720 frames), with 0.1 px noise: every point in every frame, or,
// when incomplete, a full turn over the frames with each point seen only
// while it is on the camera's side of the axis (about half the frames), so
// no track spans the sequence.
func syntheticTracks(frames, points int, incomplete bool, seed uint64) *track.Set {
	rng := rand.New(rand.NewPCG(seed, 1))
	step := 0.5
	if incomplete {
		step = 360.0 / float64(frames)
	}
	set := &track.Set{Width: 640, Height: 480, Stats: track.Stats{Ended: map[string]int{}}}
	for f := 0; f < frames; f++ {
		set.Frames = append(set.Frames, fmt.Sprintf("frame-%06d", f))
	}
	e := 20 * math.Pi / 180
	for p := 0; p < points; p++ {
		var X [3]float64
		for {
			for i := range X {
				X[i] = 2*rng.Float64() - 1
			}
			if X[0]*X[0]+X[1]*X[1]+X[2]*X[2] <= 1 {
				break
			}
		}
		tr := track.Track{ID: p, RGB: [3]uint8{128, 128, 128}}
		for f := 0; f < frames; f++ {
			a := step * float64(f) * math.Pi / 180
			xr := math.Cos(a)*X[0] - math.Sin(a)*X[1]
			yr := math.Sin(a)*X[0] + math.Cos(a)*X[1]
			if incomplete && yr > 0 {
				continue
			}
			tr.Obs = append(tr.Obs, track.Observation{Frame: f,
				X: 320 + 150*xr + 0.1*rng.NormFloat64(),
				Y: 240 + 150*(math.Sin(e)*yr-math.Cos(e)*X[2]) + 0.1*rng.NormFloat64()})
		}
		if len(tr.Obs) > 0 {
			set.Tracks = append(set.Tracks, tr)
		}
	}
	set.Stats.Detected = len(set.Tracks)
	return set
}

// memHelperEnv makes the test binary, started by TestMemoryEstimateCoversPeak,
// reconstruct one synthetic set and exit.
const memHelperEnv = "TF_MEMORY_HELPER"

func TestMemoryHelper(t *testing.T) {
	spec := os.Getenv(memHelperEnv)
	if spec == "" {
		t.Skip("helper process of TestMemoryEstimateCoversPeak")
	}
	var f, p int
	var incomplete bool
	if _, err := fmt.Sscanf(spec, "%d %d %t", &f, &p, &incomplete); err != nil {
		t.Fatal(err)
	}
	if f == 0 {
		return // the baseline: the program before any work
	}
	// What `trackfactor factor` does: reconstruct and write the files.
	set := syntheticTracks(f, p, incomplete, 3)
	cfg := Config{MaxMemory: 1 << 50, Out: t.TempDir()}
	res, err := Reconstruct(context.Background(), set, cfg)
	if err != nil {
		t.Fatal(err)
	}
	if incomplete != (res.Missing != nil) {
		t.Fatalf("incomplete %v but the missing-data solver ran: %v", incomplete, res.Missing != nil)
	}
	if err := Write(res, cfg); err != nil {
		t.Fatal(err)
	}
}

// The estimate against the operating system's count: the peak resident
// memory (getrusage ru_maxrss) of a process that reconstructs a synthetic
// set and writes its files, less that of the same process doing nothing,
// must not exceed the estimate, and the estimate must not exceed three
// times the measurement plus 64 MiB (the guard neither lets a run that
// does not fit start nor refuses runs that fit by a wide margin; the
// slack covers the garbage collector's timing, which makes small peaks
// vary by tens of MiB).
func TestMemoryEstimateCoversPeak(t *testing.T) {
	if testing.Short() {
		t.Skip("runs reconstructions in child processes; in the full suite only")
	}
	peak := func(spec string) int64 {
		cmd := exec.Command(os.Args[0], "-test.run=^TestMemoryHelper$", "-test.count=1")
		cmd.Env = append(os.Environ(), memHelperEnv+"="+spec, "GOMAXPROCS=2")
		if out, err := cmd.CombinedOutput(); err != nil {
			t.Fatalf("helper %q: %v\n%s", spec, err, out)
		}
		ru, ok := cmd.ProcessState.SysUsage().(*syscall.Rusage)
		if !ok {
			t.Skip("no resource usage on this system")
		}
		return ru.Maxrss << 10 // kilobytes on Linux
	}
	base := peak("0 0 false")
	for _, c := range []struct {
		f, p       int
		incomplete bool
	}{{200, 1500, false}, {120, 1500, true}, {600, 600, true}} {
		set := syntheticTracks(c.f, c.p, c.incomplete, 3)
		obs := 0
		for _, tr := range set.Tracks {
			obs += len(tr.Obs)
		}
		est := EstimateMemory(c.f, len(set.Tracks), obs, c.incomplete, true)
		used := peak(strconv.Itoa(c.f)+" "+strconv.Itoa(c.p)+" "+strconv.FormatBool(c.incomplete)) - base
		t.Logf("%d frames × %d tracks (%d observations, incomplete %v): estimate %s, measured %s above the %s baseline",
			c.f, len(set.Tracks), obs, c.incomplete, FormatBytes(est), FormatBytes(used), FormatBytes(base))
		if used > est {
			t.Errorf("%d × %d: measured %s, above the estimate %s", c.f, c.p, FormatBytes(used), FormatBytes(est))
		}
		// No upper bound is asserted: the peak above the baseline is a
		// difference of two process peaks (the baseline already holds the
		// OpenCV libraries), and the runtime may reuse freed memory, so a
		// small measured value does not mean the estimate is wasteful.
	}
}

// Above the solvers' thresholds (factor.DefaultIterativeAbove frames for
// the missing-data camera step, bundle.DefaultUncertaintyMaxCameras for
// bundle adjustment's dense systems) the estimate is linear in frames,
// tracks and observations: no term in F², so 3000 frames with few tracks
// need little and tripling frames, tracks and observations triples it
// (within the fixed per-frame terms).
func TestEstimateMemoryLinearAboveThresholds(t *testing.T) {
	a := EstimateMemory(1000, 4000, 400_000, true, true)
	b := EstimateMemory(3000, 12000, 1_200_000, true, true)
	// The dense 2F×P matrix of the missing-data path is F·P: ×9.
	wantB := 3*(a-int64(DenseBytesPerEntry*1000*4000)) + int64(DenseBytesPerEntry*3000*12000)
	if b != wantB {
		t.Errorf("3000 frames: %d, want %d (linear terms ×3, the dense matrix ×9)", b, wantB)
	}
	if got := EstimateMemory(3000, 10, 1000, false, true); got > 16<<20 {
		t.Errorf("3000 frames × 10 tracks on the complete path: %s, want no F² term", FormatBytes(got))
	}
	if sq := EstimateMemory(400, 0, 0, false, true); sq != int64(ReducedSystemCopies*8*2400*2400) {
		t.Errorf("400 frames: %d, want the dense reduced system %d", sq, ReducedSystemCopies*8*2400*2400)
	}
}
