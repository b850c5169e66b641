package pipeline

import (
	"bufio"
	"bytes"
	"fmt"
	"io"
	"os"
	"strconv"
	"strings"
	"trackfactor/factor"
	"trackfactor/factor/bundle"

	"trackfactor/track"
)

// Memory guard. A reconstruction's memory grows with the observations
// (frames × tracks when every track is complete), with the dense 2F×P
// matrix of the missing-data path and, for up to a few hundred frames,
// with the square of the frames through the dense camera systems of the
// solvers. A long sequence with many tracks can need more memory than the
// machine has; rather than let the operating system kill the run (or let
// it swap for hours), the pipeline estimates the peak and refuses, with a
// message naming --max-memory, when the estimate is above the limit.
//
// The estimate (bytes), for F frames, P tracks and N observations, is a
// sum of the stages' peaks (an upper bound: they do not all hold their
// memory at once):
//
//	BytesPerObservation·N             the tracks, the measurement matrix, the solvers' residuals and
//	                                  Jacobian blocks, the documents written
//	+ DenseBytesPerEntry·F·P          (incomplete tracks) the dense 2F×P matrix, its mask and the
//	                                  missing-data solver's weights
//	+ MissingSystemCopies·8·(8F)²     (incomplete tracks, F ≤ factor.DefaultIterativeAbove) the
//	                                  missing-data solver's normal equations on 8 camera unknowns per
//	                                  frame: one per thread, the system solved, its Cholesky factor,
//	                                  and the collector's headroom; above that threshold the camera
//	                                  step is matrix-free conjugate gradients:
//	                                  CGBytesPerObservation·N + CGBytesPerFrame·F
//	+ ReducedSystemCopies·8·(6F)²     (refinement on, F ≤ bundle.DefaultUncertaintyMaxCameras) bundle
//	                                  adjustment's reduced camera system on 6 parameters per frame and
//	                                  the covariance's dense inverse (one per thread, its factor, the
//	                                  inverse); above it neither is formed (conjugate gradients, no
//	                                  covariance): BABytesPerObservation·N + BABytesPerPoint·P +
//	                                  BABytesPerFrame·F
//
// For complete tracks N = F·P, so the first term is 8·2F·P·25: the
// measurement matrix times a factor of 25 for everything kept per
// observation. The constants come from the peak resident memory of
// `trackfactor factor` (/usr/bin/time -v, less the 90 MB the program holds
// before any work, most of it the OpenCV libraries) on synthetic turntable
// tracks, rounded up: complete tracks of 50 × 500, 50 × 2000, 200 × 500,
// 200 × 2000, 500 × 300, 1000 × 200 and 100 × 10 000 frames × tracks (the
// estimate is 1.2 to 2 times the measured peak), and tracks of the
// synthetic part turning 1° per frame, each seen in about half a turn:
// 360 frames × 3000 tracks (1.5 times). The conjugate-gradient terms are
// the solvers' own per-observation and per-camera buffers (factor/
// missing_cg.go, factor/bundle/cg.go) rounded up; a 1000-frame run of the
// rendered part (4401 tracks, 369 000 observations) peaked at 675 MB, 585 MB
// above the baseline, tracking included, and a 3000-frame run (15 268
// tracks, about 1.19 million observations) at 3.69 GiB, 3.61 GiB above
// it; with DenseBytesPerEntry raised from 50 to 64 for the second (the
// dense matrix is copied during the robust refits) the estimates are
// 630 MB and 3.77 GiB. The conjugate-gradient constants are twice the
// buffers, for the garbage collector's headroom.
// Up to 100 frames the missing-data solver runs two restarts at once with
// one more unknown per camera, up to 48 MiB more than the formula, within
// the margin the default limit leaves. TestMemoryEstimateCoversPeak checks
// the estimate against the operating system's count.
const (
	BytesPerObservation           = 400
	IncompleteBytesPerObservation = 400
	DenseBytesPerEntry            = 64
	MissingUnknownsPerFrame       = 8
	MissingSystemCopies           = 6
	ReducedSystemCopies           = 5
	CGBytesPerObservation         = 128
	CGBytesPerFrame               = 4096
	BABytesPerObservation         = 400
	BABytesPerPoint               = 120
	BABytesPerFrame               = 1024
	// DefaultMemoryFraction is the share of the memory available when the
	// run starts (MemAvailable of /proc/meminfo) that the limit is by
	// default.
	DefaultMemoryFraction = 0.8
)

// EstimateMemory returns the estimated peak memory in bytes of
// reconstructing observations observations of tracks tracks over frames
// frames; dense is true for the missing-data path (incomplete tracks),
// refine when bundle adjustment runs.
func EstimateMemory(frames, tracks, observations int, dense, refine bool) int64 {
	f, p, n := float64(frames), float64(tracks), float64(observations)
	b := BytesPerObservation * n
	if dense {
		b = IncompleteBytesPerObservation*n + DenseBytesPerEntry*f*p
		if frames <= factor.DefaultIterativeAbove {
			c := MissingUnknownsPerFrame * f
			b += MissingSystemCopies * 8 * c * c
		} else {
			b += CGBytesPerObservation*n + CGBytesPerFrame*f
		}
	}
	if refine {
		if frames <= bundle.DefaultUncertaintyMaxCameras {
			c := 6 * f
			b += ReducedSystemCopies * 8 * c * c
		} else {
			b += BABytesPerObservation*n + BABytesPerPoint*p + BABytesPerFrame*f
		}
	}
	if b > 1<<62 {
		return 1 << 62
	}
	return int64(b)
}

// MemoryLimit returns the limit the guard applies: maxMemory when it is
// positive, otherwise DefaultMemoryFraction of the memory available now.
// ok is false when there is no limit (maxMemory is not positive and the
// available memory cannot be read, as on systems without /proc/meminfo).
// why says where the limit came from, for messages.
func MemoryLimit(maxMemory int64) (limit int64, why string, ok bool) {
	if maxMemory > 0 {
		return maxMemory, "set by --max-memory", true
	}
	avail, err := memAvailable()
	if err != nil {
		return 0, "", false
	}
	return int64(DefaultMemoryFraction * float64(avail)), fmt.Sprintf("%.0f %% of the %s available", 100*DefaultMemoryFraction, FormatBytes(avail)), true
}

// CheckMemory refuses, with an *InputError naming --max-memory, a
// reconstruction whose estimated peak memory is above the limit
// (cfg.MaxMemory, or a share of the available memory when it is 0).
func CheckMemory(frames, tracks, observations int, dense bool, cfg Config) error {
	limit, why, ok := MemoryLimit(cfg.MaxMemory)
	if !ok {
		return nil
	}
	need := EstimateMemory(frames, tracks, observations, dense, !cfg.Refine.Off)
	if need <= limit {
		return nil
	}
	hint := "use fewer frames (--step, --end) or fewer tracks (--corners)"
	if 2*EstimateMemory(frames, 0, 0, dense, !cfg.Refine.Off) > need {
		hint = "use fewer frames (--step, --end): up to a few hundred frames the solvers' memory grows with the square of the frames"
		if !cfg.Refine.Off {
			hint += "; turning the refinement off (--refine=false) saves " + FormatBytes(EstimateMemory(frames, 0, 0, false, true))
		}
	}
	return &InputError{fmt.Errorf("pipeline: reconstructing %d frames × %d tracks (%d observations) needs about %s of memory, more than the limit of %s (%s); raise the limit with --max-memory %s if the machine has that much, or %s",
		frames, tracks, observations, FormatBytes(need), FormatBytes(limit), why, roundUpSize(need), hint)}
}

// TrackBytesPerPixel is the tracker's memory per pixel of one frame: the
// decoded colour frame, its grey, smoothed and float copies and their
// pyramids for the frames in flight, the detection masks and the
// refinement's images (measured: a 640×480 run holds about 80 MB before
// its tracks grow, 260 B per pixel; rounded up).
const TrackBytesPerPixel = 320

// CheckFramesMemory is the guard's early form, run when the input is opened
// and before any frame is tracked: it refuses frames whose tracker buffers
// (TrackBytesPerPixel per pixel of one frame) and solvers (the terms of
// EstimateMemory that do not depend on the tracks, with the smaller,
// complete-track path) need more than the limit, so a run that cannot fit
// fails in a second rather than after the tracking. width and height are
// the frame size, 0 when unknown.
func CheckFramesMemory(frames, width, height int, cfg Config) error {
	limit, why, ok := MemoryLimit(cfg.MaxMemory)
	if !ok {
		return nil
	}
	pixels := int64(TrackBytesPerPixel) * int64(width) * int64(height)
	solvers := EstimateMemory(frames, 0, 0, false, !cfg.Refine.Off)
	need := pixels + solvers
	if need <= limit {
		return nil
	}
	if pixels > solvers {
		return &InputError{fmt.Errorf("pipeline: frames of %d×%d pixels need about %s of memory to track, more than the limit of %s (%s); raise the limit with --max-memory %s if the machine has that much, or scale the frames down",
			width, height, FormatBytes(need), FormatBytes(limit), why, roundUpSize(need))}
	}
	hint := "use fewer frames (--step, --end)"
	if !cfg.Refine.Off {
		if rest := pixels + EstimateMemory(frames, 0, 0, false, false); rest <= limit {
			hint += " or turn the refinement off (--refine=false)"
		}
	}
	return &InputError{fmt.Errorf("pipeline: %d frames need at least %s of memory for the tracker and the solvers alone, before any track is counted, more than the limit of %s (%s); raise the limit with --max-memory %s if the machine has that much, or %s",
		frames, FormatBytes(need), FormatBytes(limit), why, roundUpSize(need), hint)}
}

// memAvailable reads MemAvailable from /proc/meminfo (Linux ≥ 3.14).
func memAvailable() (int64, error) {
	f, err := os.Open("/proc/meminfo")
	if err != nil {
		return 0, err
	}
	defer f.Close()
	return parseMemAvailable(f)
}

// parseMemAvailable finds the "MemAvailable: N kB" line of a meminfo file.
func parseMemAvailable(r io.Reader) (int64, error) {
	sc := bufio.NewScanner(r)
	for sc.Scan() {
		line := sc.Bytes()
		if !bytes.HasPrefix(line, []byte("MemAvailable:")) {
			continue
		}
		fields := strings.Fields(string(line[len("MemAvailable:"):]))
		if len(fields) != 2 || fields[1] != "kB" {
			return 0, fmt.Errorf("pipeline: meminfo line %q is not \"MemAvailable: N kB\"", line)
		}
		kb, err := strconv.ParseInt(fields[0], 10, 64)
		if err != nil || kb < 0 {
			return 0, fmt.Errorf("pipeline: meminfo line %q has no size", line)
		}
		return kb << 10, nil
	}
	if err := sc.Err(); err != nil {
		return 0, err
	}
	return 0, fmt.Errorf("pipeline: meminfo has no MemAvailable line")
}

// FormatBytes writes a size in binary units with three significant
// digits: "812 KiB", "1.25 GiB".
func FormatBytes(b int64) string {
	units := []string{"B", "KiB", "MiB", "GiB", "TiB", "PiB", "EiB"}
	v, u := float64(b), 0
	for v >= 1024 && u < len(units)-1 {
		v /= 1024
		u++
	}
	switch {
	case u == 0:
		return fmt.Sprintf("%d B", b)
	case v >= 100:
		return fmt.Sprintf("%.0f %s", v, units[u])
	case v >= 10:
		return fmt.Sprintf("%.1f %s", v, units[u])
	}
	return fmt.Sprintf("%.2f %s", v, units[u])
}

// roundUpSize is b rounded up to a whole number of the largest binary unit
// that keeps it at least 1, in the form ParseSize reads ("15G").
func roundUpSize(b int64) string {
	for _, u := range []struct {
		s     string
		shift uint
	}{{"T", 40}, {"G", 30}, {"M", 20}, {"K", 10}} {
		if b >= 1<<u.shift {
			n := (b + 1<<u.shift - 1) >> u.shift
			return fmt.Sprintf("%d%s", n, u.s)
		}
	}
	return strconv.FormatInt(b, 10)
}

// ParseSize reads a memory size: a whole or decimal number with an
// optional binary unit K, M, G or T (also written KB, KiB, … in any case;
// all are powers of 1024), e.g. "16G", "800M", "1.5GiB", "1048576". It
// returns an error for anything else, and for negative or too large sizes.
func ParseSize(s string) (int64, error) {
	t := strings.TrimSpace(s)
	low := strings.ToLower(t)
	shift := uint(0)
	for _, u := range []struct {
		suffix string
		shift  uint
	}{{"kib", 10}, {"mib", 20}, {"gib", 30}, {"tib", 40}, {"kb", 10}, {"mb", 20}, {"gb", 30}, {"tb", 40}, {"k", 10}, {"m", 20}, {"g", 30}, {"t", 40}, {"b", 0}} {
		if strings.HasSuffix(low, u.suffix) {
			low, shift = strings.TrimSpace(strings.TrimSuffix(low, u.suffix)), u.shift
			break
		}
	}
	v, err := strconv.ParseFloat(low, 64)
	if err != nil || low == "" || strings.ContainsAny(low, "xpn_") || v < 0 || v != v {
		return 0, fmt.Errorf("%q is not a size; write e.g. 16G, 800M or 1.5GiB", s)
	}
	b := v * float64(uint64(1)<<shift)
	if b >= 1<<62 {
		return 0, fmt.Errorf("%q is too large a size", s)
	}
	return int64(b), nil
}

// countViews returns how many tracks have at least minViews observations
// and how many observations they hold: the size of the missing-data
// problem IncompleteMeasurements would build.
func countViews(set *track.Set, minViews int) (tracks, observations int) {
	for _, t := range set.Tracks {
		if len(t.Obs) >= minViews {
			tracks++
			observations += len(t.Obs)
		}
	}
	return tracks, observations
}
