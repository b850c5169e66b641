package pipeline

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"runtime/metrics"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"
	"unsafe"

	"gocv.io/x/gocv"

	"trackfactor/track"
	"trackfactor/track/synth"
)

// Streaming (issue 8): frames are read, tracked and released, so the
// memory of tracking does not grow with the length of the sequence beyond
// the tracks themselves. The tests track a long synthetic sequence in a
// child process (so that the operating system's peak resident memory,
// getrusage ru_maxrss, counts the OpenCV buffers too, which the Go heap
// statistics do not see) at two lengths and compare the growth with the
// growth of the track storage.

// streamTurn renders one full turn of the synthetic part, 640×480, step
// degrees apart (Supersample 1 keeps rendering quick; the texture is
// still trackable), or its first limit frames when limit is smaller, into
// dir and returns the file paths. A full turn repeats seamlessly: frame k
// of a longer sequence is frame k mod the turn's length.
func streamTurn(tb testing.TB, dir string, step float64, limit int) []string {
	tb.Helper()
	n := min(int(360/step+0.5), limit)
	sc, err := synth.New(synth.Options{Seed: 5, Frames: n, StepDeg: step, Supersample: 1, NoiseSigma: 1})
	if err != nil {
		tb.Fatal(err)
	}
	paths, err := sc.WriteFrames(context.Background(), dir, nil)
	if err != nil {
		tb.Fatal(err)
	}
	return paths
}

// streamFolder makes a folder of n frames, hard links to the frames of one
// turn in order, round and round.
func streamFolder(tb testing.TB, n int, step float64) string {
	tb.Helper()
	root := tb.TempDir()
	turn := streamTurn(tb, filepath.Join(root, "turn"), step, n)
	dir := filepath.Join(root, "seq")
	if err := os.MkdirAll(dir, 0o755); err != nil {
		tb.Fatal(err)
	}
	for k := 0; k < n; k++ {
		if err := os.Link(turn[k%len(turn)], filepath.Join(dir, fmt.Sprintf("%05d.png", k))); err != nil {
			tb.Fatal(err)
		}
	}
	return dir
}

// streamReport is what the child process measures after tracking.
type streamReport struct {
	Frames      int     `json:"frames"`
	Tracks      int     `json:"tracks"`
	Obs         int     `json:"observations"`
	TrackBytes  int64   `json:"track_bytes"` // the Set's own storage
	HeapInuse   int64   `json:"heap_inuse"`  // after a full collection
	PeakHeap    int64   `json:"peak_heap"`   // largest heap in use seen during tracking (sampled every 10 frames)
	MaxRSS      int64   `json:"max_rss"`     // filled in by the parent
	FramesPerS  float64 `json:"frames_per_s"`
	TrackSecond float64 `json:"track_s"`
}

// setBytes is the memory a track Set holds: its tracks' observation
// arrays (capacity, not length: what was allocated), the Track headers,
// the frame names and the per-frame statistics.
func setBytes(set *track.Set) int64 {
	var b int64
	b += int64(cap(set.Tracks)) * int64(unsafe.Sizeof(track.Track{}))
	for _, t := range set.Tracks {
		b += int64(cap(t.Obs)) * int64(unsafe.Sizeof(track.Observation{}))
	}
	for _, f := range set.Frames {
		b += int64(len(f)) + int64(unsafe.Sizeof(""))
	}
	b += int64(cap(set.Stats.Live)+cap(set.Stats.PredictLevels)) * int64(unsafe.Sizeof(0))
	return b
}

const streamHelperEnv = "TF_STREAM_HELPER"

// TestStreamHelper is the child process: it tracks the first N frames of
// a folder (or video) and prints a streamReport.
func TestStreamHelper(t *testing.T) {
	spec := os.Getenv(streamHelperEnv)
	if spec == "" {
		t.Skip("helper process of the streaming tests")
	}
	input, nText, ok := strings.Cut(spec, "|")
	n, err := strconv.Atoi(nText)
	if !ok || err != nil {
		t.Fatalf("bad %s=%q", streamHelperEnv, spec)
	}
	t0 := time.Now()
	var peak int64
	sample := []metrics.Sample{{Name: "/memory/classes/heap/objects:bytes"}}
	progress := func(stage string, done, total int) {
		if done%10 == 0 || done == total {
			metrics.Read(sample)
			peak = max(peak, int64(sample[0].Value.Uint64()))
		}
	}
	set, err := TrackOnly(context.Background(), Config{Input: input, Range: track.Range{End: n}, Progress: progress})
	if err != nil {
		t.Fatal(err)
	}
	secs := time.Since(t0).Seconds()
	runtime.GC()
	var ms runtime.MemStats
	runtime.ReadMemStats(&ms)
	obs := 0
	for _, tr := range set.Tracks {
		obs += len(tr.Obs)
	}
	rep := streamReport{Frames: len(set.Frames), Tracks: len(set.Tracks), Obs: obs, TrackBytes: setBytes(set),
		HeapInuse: int64(ms.HeapInuse), PeakHeap: peak, FramesPerS: float64(len(set.Frames)) / secs, TrackSecond: secs}
	b, _ := json.Marshal(rep)
	fmt.Printf("TFSTREAM %s\n", b)
	runtime.KeepAlive(set)
}

// trackInChild tracks the first n frames of input in a child process.
func trackInChild(tb testing.TB, input string, n int) streamReport {
	tb.Helper()
	cmd := exec.Command(os.Args[0], "-test.run=^TestStreamHelper$", "-test.count=1", "-test.v")
	cmd.Env = append(os.Environ(), streamHelperEnv+"="+input+"|"+strconv.Itoa(n), "GOMAXPROCS=2")
	out, err := cmd.CombinedOutput()
	if err != nil {
		tb.Fatalf("tracking %d frames in a child: %v\n%s", n, err, out)
	}
	var rep streamReport
	found := false
	sc := bufio.NewScanner(strings.NewReader(string(out)))
	for sc.Scan() {
		if line, ok := strings.CutPrefix(sc.Text(), "TFSTREAM "); ok {
			if err := json.Unmarshal([]byte(line), &rep); err != nil {
				tb.Fatal(err)
			}
			found = true
		}
	}
	if !found {
		tb.Fatalf("no report from the child:\n%s", out)
	}
	ru, ok := cmd.ProcessState.SysUsage().(*syscall.Rusage)
	if !ok {
		tb.Skip("no resource usage on this system")
	}
	rep.MaxRSS = ru.Maxrss << 10 // kilobytes on Linux
	return rep
}

// Tracking 300 frames instead of 100 of the same 640×480 turntable
// sequence (one turn of 180 frames, 2° apart, repeated) may grow the Go
// heap in use after tracking by no more than the growth of the track
// storage plus 8 MiB (allocator size classes and runtime structures), and
// the peak resident memory by no more than three times the growth of the
// track storage plus 64 MiB: observation slices grow by doubling and the
// old arrays stay until the collector runs (GOGC=100 lets the heap reach
// twice the live data), hence 3×; 64 MiB covers the collector's timing.
// Keeping every decoded frame would add about 2.6 MB per frame (colour,
// grey, smoothed float image, pyramids), 500 MB for the 200 extra frames,
// far above either bound.
func TestTrackingMemoryFlat(t *testing.T) {
	if testing.Short() {
		t.Skip("renders and tracks 300 frames of 640×480; in the full suite only")
	}
	dir := streamFolder(t, 300, 2)
	short := trackInChild(t, dir, 100)
	long := trackInChild(t, dir, 300)
	mib := func(b int64) float64 { return float64(b) / (1 << 20) }
	for _, r := range []streamReport{short, long} {
		t.Logf("%d frames: %d tracks, %d observations, track storage %.1f MiB, heap in use %.1f MiB after (%.1f MiB at most during tracking), peak resident %.1f MiB, %.1f frames/s",
			r.Frames, r.Tracks, r.Obs, mib(r.TrackBytes), mib(r.HeapInuse), mib(r.PeakHeap), mib(r.MaxRSS), r.FramesPerS)
	}
	if short.Frames != 100 || long.Frames != 300 {
		t.Fatalf("tracked %d and %d frames, want 100 and 300", short.Frames, long.Frames)
	}
	dTracks := long.TrackBytes - short.TrackBytes
	if d := long.HeapInuse - short.HeapInuse; d > dTracks+8<<20 {
		t.Errorf("heap in use grew by %.1f MiB from 100 to 300 frames, more than the track storage's %.1f MiB + 8 MiB", mib(d), mib(dTracks))
	}
	if d := long.MaxRSS - short.MaxRSS; d > 3*dTracks+64<<20 {
		t.Errorf("peak resident memory grew by %.1f MiB from 100 to 300 frames, more than 3 × the track storage's %.1f MiB + 64 MiB", mib(d), mib(dTracks))
	}
}

// writeStreamVideo writes an MJPG .avi of n frames of 640×480, one turn of
// 360 frames 1° apart, repeated.
func writeStreamVideo(b *testing.B, path string, n int) {
	b.Helper()
	turn := streamTurn(b, filepath.Join(b.TempDir(), "turn"), 1, n)
	vw, err := gocv.VideoWriterFile(path, "MJPG", 25, 640, 480, true)
	if err != nil || !vw.IsOpened() {
		b.Skipf("this OpenCV build cannot write MJPG .avi files (%v)", err)
	}
	defer vw.Close()
	frames := make([]gocv.Mat, len(turn))
	for i, p := range turn {
		frames[i] = gocv.IMRead(p, gocv.IMReadColor)
		defer frames[i].Close()
	}
	for k := 0; k < n; k++ {
		if err := vw.Write(frames[k%len(frames)]); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkTrackLongVideo tracks a 3000-frame 640×480 synthetic video (a
// turn of 360 frames, 1° apart, repeated; MJPG) to 300, 1000 and 3000
// frames in child processes and reports frames/s, the peak resident memory
// and the track storage. With streaming, the peak grows with the track
// storage only (linear in frames × live tracks, about 32 bytes per
// observation), not with the frames decoded. Writing the video takes a few
// minutes: it runs only with TF_BENCH_LARGE=1.
func BenchmarkTrackLongVideo(b *testing.B) {
	if os.Getenv("TF_BENCH_LARGE") != "1" {
		b.Skip("renders and tracks a 3000-frame video; set TF_BENCH_LARGE=1")
	}
	path := filepath.Join(b.TempDir(), "turns.avi")
	writeStreamVideo(b, path, 3000)
	for _, n := range []int{300, 1000, 3000} {
		b.Run(fmt.Sprintf("frames=%d", n), func(b *testing.B) {
			var r streamReport
			for i := 0; i < b.N; i++ {
				r = trackInChild(b, path, n)
			}
			b.ReportMetric(r.FramesPerS, "frames/s")
			b.ReportMetric(float64(r.MaxRSS)/(1<<20), "peak-MiB")
			b.ReportMetric(float64(r.TrackBytes)/(1<<20), "tracks-MiB")
			b.ReportMetric(float64(r.HeapInuse)/(1<<20), "heap-MiB")
			b.ReportMetric(float64(r.Obs), "observations")
		})
	}
}
