package track

// Observation is one tracked position of a track in one frame, in pixels.
// Convention (as in the OpenCV library): origin at the top-left pixel's
// centre, x to the right, y down, pixel centres at integer coordinates.
type Observation struct {
	Frame int     // frame index, 0.. in the order of the sorted input
	X, Y  float64 // position in pixels
	// Quality is an optional per-observation score in [0,1] (for example
	// the normalised cross-correlation against the track's reference
	// appearance); 0 when unknown.
	Quality float64
}

// Track is a 2D feature followed through consecutive frames. Observations
// are sorted by frame and frames are unique within a track.
type Track struct {
	ID  int           // stable id, unique within a Set
	Obs []Observation // sorted by Frame
	RGB [3]uint8      // colour sampled at the first observation
}

// First returns the first frame the track is seen in, or -1 if empty.
func (t *Track) First() int {
	if len(t.Obs) == 0 {
		return -1
	}
	return t.Obs[0].Frame
}

// Last returns the last frame the track is seen in, or -1 if empty.
func (t *Track) Last() int {
	if len(t.Obs) == 0 {
		return -1
	}
	return t.Obs[len(t.Obs)-1].Frame
}

// At returns the observation in frame f, if any (binary search).
func (t *Track) At(f int) (Observation, bool) {
	lo, hi := 0, len(t.Obs)
	for lo < hi {
		m := (lo + hi) / 2
		if t.Obs[m].Frame < f {
			lo = m + 1
		} else {
			hi = m
		}
	}
	if lo < len(t.Obs) && t.Obs[lo].Frame == f {
		return t.Obs[lo], true
	}
	return Observation{}, false
}

// Set is the result of tracking a sequence: the tracks, the frames they
// refer to and the tracker's diagnostics.
type Set struct {
	Frames []string // frame names (file names, or "frame-000123" for video)
	Width  int      // image width in pixels
	Height int      // image height in pixels
	Tracks []Track
	Stats  Stats
}

// Drop reasons for observations and tracks. The strings are stable: they
// are written into reports and JSON.
const (
	DropLeftImage   = "left-image"     // point left the image or came within half a window of the border
	DropNotFound    = "not-found"      // LK did not converge
	DropLowEigen    = "low-eigenvalue" // the window lost its texture (minimum eigenvalue check)
	DropForwardBack = "forward-backward"
	DropAppearance  = "appearance-drift"
	DropOutlier     = "outlier"
	DropMotion      = "motion-jump" // moved unlike its prediction (Options.MotionCheckPx)
	DropStatic      = "static-background"
	DropBoundary    = "occlusion-boundary" // the patch centre belongs to the static layer of its window (RefineOptions.StaticShare)
	DropIncomplete  = "incomplete"         // not seen in every frame (complete-track models only)
	DropTooShort    = "too-short"          // fewer observations than the minimum track length
)

// Stats counts what the tracker did. Dropped maps a Drop* reason to the
// number of tracks ended for that reason.
type Stats struct {
	Detected int            // corners detected (all detection rounds)
	Ended    map[string]int // tracks ended, by reason
	// Clamped lists any option the tracker had to change to run (for
	// example pyramid levels reduced on a small image), in plain words.
	Clamped []string

	// Alive is the number of tracks of the Set still followed in the last
	// frame. Detected = Alive + the sum of Ended (every detected corner
	// either ends for one reason or survives).
	Alive int
	// Retried counts points tracked again on the full pyramid after the
	// predicted, shallower run failed.
	Retried int
	// Refined counts the points aligned against their reference patch
	// (RefineOptions), RefineIters their Gauss–Newton iterations in all:
	// RefineIters/Refined is the mean per point.
	Refined, RefineIters int
	// PredictLevels is the pyramid depth (levels above full resolution)
	// LK used with prediction for each frame pair (f−1, f), at index f−1;
	// nil with Options.NoPredict.
	PredictLevels []int
	// Live is the number of live tracks in each frame (after re-detection).
	Live []int
	// DroppedObs counts observations dropped, by reason (the Drop*
	// constants): for a track ended while tracking, the observation it
	// failed to make plus any cut from its end (Options.TrimEnd); for
	// tracks removed or cut after tracking (too short, static background,
	// outlier), every observation removed from the Set. So
	// Σ len(Obs) over Tracks + Σ DroppedObs = Detected + Σ Live[f] for
	// f < last frame (each live track either observes the next frame or
	// fails).
	DroppedObs map[string]int
	// Reject is the report of the static-background and outlier checks
	// (nil when they were off).
	Reject *RejectReport
	// Stopped is set when the source ended before its announced length
	// (a video whose frames stop decoding: a damaged or cut file) after at
	// least MinFrames frames were read: the frames before it are tracked
	// and Set.Frames holds only them. Nil when every frame was read.
	Stopped *Stopped
}

// Stopped says where a source stopped giving frames.
type Stopped struct {
	Frame     string // name of the first frame that could not be read
	Index     int    // its index in the input's own order (a Range.End that stops before it)
	Announced int    // frames the source said it had (after its Range)
	Reason    string // what the source said
}

// CompleteSubset returns the tracks seen in every frame of [0, nFrames).
func (s *Set) CompleteSubset() []Track {
	n := len(s.Frames)
	var out []Track
	for _, t := range s.Tracks {
		if len(t.Obs) == n && t.First() == 0 && t.Last() == n-1 {
			out = append(out, t)
		}
	}
	return out
}
