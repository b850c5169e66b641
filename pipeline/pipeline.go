// Package pipeline wires the stages of trackfactor together: frames →
// tracks → measurement matrix → factorization → files. It holds no
// algorithm of its own beyond choosing which tracks a model can use; the
// command-line tool is a thin layer over it, and programs can call it
// directly.
package pipeline

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"image"
	_ "image/jpeg" // mask images
	_ "image/png"
	"io"
	"os"
	"path/filepath"
	"reflect"
	"sort"
	"strings"
	"time"
	"unicode"

	"trackfactor/export"
	"trackfactor/factor"
	"trackfactor/track"
)

// Config is everything a run needs. The zero value of each stage's options
// gives that stage's documented defaults.
type Config struct {
	Input  string      // folder of images or video file
	Range  track.Range // frames to use
	Track  track.Options
	Factor factor.Options
	Robust factor.RejectOptions
	// Missing configures the missing-data solver, used when tracks are
	// incomplete and the model allows it.
	Missing factor.MissingOptions
	// Refine configures bundle adjustment, the turntable fit and the
	// metric scale after the factorization.
	Refine RefineConfig
	// Loop configures loop closure on long sequences (track.CloseLoops).
	Loop track.LoopOptions
	// MaskFile is an image of the frame size; corners are detected only
	// where it is bright. ROI, when its width and height are not zero, is
	// a rectangle X, Y, W, H (px) outside which no corners are detected.
	// Both may be given; a corner must then pass both.
	MaskFile string
	ROI      [4]int

	// Timing records the wall-clock time of every stage in the JSON and
	// the report. Off by default, so the same input and settings give
	// byte-identical files.
	Timing bool

	// MaxMemory is the most memory, in bytes, the reconstruction may be
	// estimated to need (CheckMemory); 0 means DefaultMemoryFraction of
	// the memory available when it starts. Not recorded in the settings:
	// it changes no result.
	MaxMemory int64

	Out      string // output folder
	Force    bool   // replace earlier results in Out
	PLYASCII bool   // write PLY as ASCII instead of binary little-endian
	// PLYSigma adds a per-vertex "sigma" property to points.ply: each
	// point's position standard deviation from the refinement (in the
	// result's units), −1 where none was determined.
	PLYSigma bool

	Producer export.Producer
	// Settings are extra entries for the "settings" object of the JSON
	// (the CLI adds what it knows; the stages' options are always added).
	Settings map[string]any
	// Progress receives (stage, done, total); nil for none.
	Progress func(stage string, done, total int)
}

// InputError is bad input: a missing or unreadable path, too few frames,
// too few usable tracks. The message says what is wrong and what to do.
type InputError struct{ Err error }

func (e *InputError) Error() string { return e.Err.Error() }
func (e *InputError) Unwrap() error { return e.Err }

func errTooFewTracks(set *track.Set) error {
	return fmt.Errorf("pipeline: fewer than %d usable tracks are seen together in %d or more frames (%d tracks in %d frames); track more corners (--corners), lower --quality, or use frames closer together", factor.MinPoints, factor.MinFrames, len(set.Tracks), len(set.Frames))
}

// Result is what a run produced, with the diagnostics of every stage.
type Result struct {
	Set    *track.Set
	Window Window // the complete block of frames × tracks that was used
	Rec    *factor.Reconstruction
	// Rejected lists the tracks left out because their residual stood out.
	Rejected []int
	// Missing is the missing-data solver's report, nil when the complete
	// block was used.
	Missing *factor.MissingReport
	// Refinement reports bundle adjustment, the turntable fit and the
	// scale; nil when the factorization failed before it.
	Refinement *Refinement
	// Loop is the loop-closure report, nil when it did not run.
	Loop   *track.LoopReport
	Doc    *export.Document
	Files  []string           // files written, relative to Config.Out
	Timing map[string]float64 // seconds by stage
}

// Run tracks the input, reconstructs and writes the results.
func Run(ctx context.Context, cfg Config) (*Result, error) {
	// Refuse an occupied output folder before spending any time.
	if cfg.Out != "" && !cfg.Force {
		if err := CheckOut(cfg.Out); err != nil {
			return nil, err
		}
	}
	t0 := time.Now()
	set, loop, err := trackAndClose(ctx, cfg)
	if err != nil {
		return nil, err
	}
	trackTime := time.Since(t0).Seconds()
	res, err := Reconstruct(ctx, set, cfg)
	if err != nil {
		return nil, err
	}
	res.Loop = loop
	if loop != nil {
		res.Doc.Diagnostics.Loop = rawJSONTimed(map[string]any{
			"frame_pairs": loop.FramePairs, "matches": loop.Matches, "verified": loop.Verified,
			"merged": loop.Merged, "merged_pairs": loop.MergedPairs, "rejected": loop.Rejected,
		}, cfg.Timing)
	}
	res.Timing["track"] = trackTime
	if err := ctx.Err(); err != nil {
		return nil, err // interrupted: write nothing
	}
	if cfg.Out != "" {
		if err := Write(res, cfg); err != nil {
			return nil, err
		}
	}
	return res, nil
}

// TrackOnly opens the input and tracks it.
func TrackOnly(ctx context.Context, cfg Config) (*track.Set, error) {
	set, _, err := trackAndClose(ctx, cfg)
	return set, err
}

// MinLoopFrames is the fewest frames for which loop closure is tried: a
// point can only come back into view after a large part of a turn, which
// takes many frames (a turn in 10° steps is 36).
const MinLoopFrames = 36

// trackAndClose tracks the input and, on long sequences, links tracks of
// points that come back into view to their earlier selves (loop closure).
func trackAndClose(ctx context.Context, cfg Config) (*track.Set, *track.LoopReport, error) {
	set, src, err := trackOpen(ctx, cfg)
	if err != nil {
		return nil, nil, err
	}
	defer src.Close()
	if cfg.Loop.Off || len(set.Frames) < MinLoopFrames {
		return set, nil, nil
	}
	rep, err := track.CloseLoops(ctx, src, set, cfg.Loop)
	if err != nil {
		return nil, nil, classify(err)
	}
	return set, rep, nil
}

// trackOpen opens and tracks the input; the caller closes the source.
func trackOpen(ctx context.Context, cfg Config) (*track.Set, track.Source, error) {
	src, err := track.Open(cfg.Input, cfg.Range)
	if err != nil {
		return nil, nil, &InputError{err}
	}
	w, h := src.Size()
	if err := CheckFramesMemory(src.Len(), w, h, cfg); err != nil {
		src.Close()
		return nil, nil, err
	}
	opts := cfg.Track
	mask, err := buildMask(cfg.MaskFile, cfg.ROI, w, h)
	if err != nil {
		src.Close()
		return nil, nil, err
	}
	if mask != nil {
		opts.Detect.Mask = mask
	}
	set, err := track.Run(ctx, src, opts, func(done, total int) {
		if cfg.Progress != nil {
			cfg.Progress("track", done, total)
		}
	})
	if err != nil {
		src.Close()
		var se *track.SourceEndedError
		if errors.As(err, &se) && ctx.Err() == nil {
			return nil, nil, &InputError{fmt.Errorf("%w; fewer than %d frames decode before it (pick frames that do with --start and --end)", err, track.MinFrames)}
		}
		return nil, nil, classify(err)
	}
	return set, src, nil
}

// buildMask combines a mask image and a rectangle into a detection mask
// (nil when neither is given).
func buildMask(file string, roi [4]int, w, h int) ([]bool, error) {
	if file == "" && (roi[2] == 0 || roi[3] == 0) {
		return nil, nil
	}
	mask := make([]bool, w*h)
	for i := range mask {
		mask[i] = true
	}
	if file != "" {
		f, err := os.Open(file)
		if err != nil {
			return nil, &InputError{fmt.Errorf("mask: %w; give an image file of the frame size", err)}
		}
		defer f.Close()
		im, _, err := image.Decode(f)
		if err != nil {
			return nil, &InputError{fmt.Errorf("mask %s: cannot decode (%v); give a PNG, JPEG or BMP of the frame size", file, err)}
		}
		if b := im.Bounds(); b.Dx() != w || b.Dy() != h {
			return nil, &InputError{fmt.Errorf("mask %s is %d×%d px but the frames are %d×%d; give a mask of the frame size", file, b.Dx(), b.Dy(), w, h)}
		}
		mask = track.MaskFromImage(im)
	}
	if roi[2] > 0 && roi[3] > 0 {
		x0, y0, x1, y1 := roi[0], roi[1], roi[0]+roi[2], roi[1]+roi[3]
		if x0 >= w || y0 >= h {
			return nil, &InputError{fmt.Errorf("roi %d,%d,%d,%d lies outside the %d×%d px frames; give X,Y inside the image", roi[0], roi[1], roi[2], roi[3], w, h)}
		}
		for y := 0; y < h; y++ {
			for x := 0; x < w; x++ {
				if x < x0 || x >= x1 || y < y0 || y >= y1 {
					mask[y*w+x] = false
				}
			}
		}
	}
	return mask, nil
}

// WriteTrackFile writes a track set as CSV (track,frame,x,y[,quality]) to
// path through a temporary file, refusing to replace an existing file
// unless force.
func WriteTrackFile(path string, set *track.Set, withQuality, force bool) error {
	if !force {
		if _, err := os.Stat(path); err == nil {
			return &InputError{fmt.Errorf("%s already exists; use --force to replace it", path)}
		}
	}
	var buf bytes.Buffer
	if err := track.WriteCSV(&buf, set, withQuality); err != nil {
		return err
	}
	if err := export.WriteFileAtomic(path, buf.Bytes(), 0o644); err != nil {
		return outputError(path, err)
	}
	return nil
}

// FromTrackFile reads a track CSV and reconstructs from it; width and
// height, when not zero, are the image size to check coordinates against.
func FromTrackFile(ctx context.Context, cfg Config, width, height int) (*Result, error) {
	if cfg.Out != "" && !cfg.Force {
		if err := CheckOut(cfg.Out); err != nil {
			return nil, err
		}
	}
	f, err := os.Open(cfg.Input)
	if err != nil {
		return nil, &InputError{fmt.Errorf("track file: %w", err)}
	}
	defer f.Close()
	set, err := track.ReadCSV(f, track.ReadCSVOptions{Width: width, Height: height})
	if err != nil {
		return nil, &InputError{fmt.Errorf("%s: %w", cfg.Input, err)}
	}
	res, err := Reconstruct(ctx, set, cfg)
	if err != nil {
		return nil, err
	}
	if cfg.Out != "" {
		if err := Write(res, cfg); err != nil {
			return nil, err
		}
	}
	return res, nil
}

func classify(err error) error {
	var ie *InputError
	if errors.As(err, &ie) || errors.Is(err, context.Canceled) || errors.Is(err, context.DeadlineExceeded) {
		return err
	}
	// The tracker fails on bad frames (a corrupt or odd-sized file found
	// while reading) and on invalid options; both are the caller's input.
	return &InputError{err}
}

// Reconstruct factorizes a track set: it chooses the largest complete block
// of frames × tracks, builds the measurement matrix and runs the model.
func Reconstruct(ctx context.Context, set *track.Set, cfg Config) (*Result, error) {
	cfg = fixThreads(cfg)
	res := &Result{Set: set, Timing: map[string]float64{}}
	t0 := time.Now()
	if cfg.Factor.Progress == nil {
		cfg.Factor.Progress = cfg.Progress // long solves report too
	}
	if cfg.Factor.ImageWidth == 0 && cfg.Factor.ImageHeight == 0 {
		cfg.Factor.ImageWidth, cfg.Factor.ImageHeight = set.Width, set.Height
	}
	w, ok := LargestCompleteWindow(set, factor.MinFrames, factor.MinPoints)
	model := cfg.Factor.WithDefaults().Model
	if useIncomplete(set, w, ok, model) {
		if err := reconstructIncomplete(ctx, set, cfg, res); err != nil {
			return nil, err
		}
		res.Timing["factor"] = time.Since(t0).Seconds()
		if err := refine(ctx, res, cfg); err != nil {
			return nil, err
		}
		res.Doc = buildDocument(res, cfg)
		return res, nil
	}
	if !ok {
		return nil, &InputError{errTooFewTracks(set)}
	}
	res.Window = w
	if err := CheckMemory(w.Frames(), len(w.Tracks), w.Frames()*len(w.Tracks), false, cfg); err != nil {
		return nil, err
	}
	m := CompleteMeasurements(w)
	rec, rob, err := factor.FactorizeRejecting(ctx, m, cfg.Factor, cfg.Robust)
	if err != nil {
		return nil, err
	}
	res.Rejected = rob.Rejected
	if len(rob.Rejected) > 0 {
		// The window keeps only the tracks the reconstruction used.
		drop := map[int]bool{}
		for _, id := range rob.Rejected {
			drop[id] = true
		}
		kept := w.Tracks[:0:0]
		for _, t := range w.Tracks {
			if !drop[t.ID] {
				kept = append(kept, t)
			}
		}
		res.Window.Tracks = kept
	}
	res.Timing["factor"] = time.Since(t0).Seconds()
	if w.Frames() < len(set.Frames) || len(w.Tracks) < len(set.Tracks) {
		rec.Diagnostics.Warn(factor.WarnIncompleteDropped, fmt.Sprintf(
			"the %s model needs complete tracks: it used the %d tracks seen in every one of frames %d–%d (%d of %d frames); %d tracks that start or end inside the sequence were left out",
			rec.Model, len(w.Tracks), w.First, w.Last, w.Frames(), len(set.Frames), len(set.Tracks)-len(w.Tracks)))
	}
	res.Rec = rec
	if err := refine(ctx, res, cfg); err != nil {
		return nil, err
	}
	res.Doc = buildDocument(res, cfg)
	return res, nil
}

// Warning codes of the tracking stage.
const (
	WarnInputStopped  = "input-stopped"
	WarnOptionChanged = "tracking-option-changed"
)

// warnTracking turns what the tracker had to change or cut into warnings.
func warnTracking(res *Result) {
	st := res.Set.Stats
	if s := st.Stopped; s != nil {
		res.Rec.Diagnostics.Warn(WarnInputStopped, fmt.Sprintf("the video stopped decoding at %s (damaged or cut short): %d of the %d frames asked for were used; pass --end %d to choose that range explicitly", s.Frame, len(res.Set.Frames), s.Announced, s.Index))
	}
	for _, c := range st.Clamped {
		res.Rec.Diagnostics.Warn(WarnOptionChanged, c)
	}
}

func buildDocument(res *Result, cfg Config) *export.Document {
	warnTracking(res)
	colours := make(map[int][3]uint8, len(res.Window.Tracks))
	for _, t := range res.Window.Tracks {
		colours[t.ID] = t.RGB
	}
	in := export.Input{Source: cfg.Input, Frames: res.Set.Frames, Width: res.Set.Width, Height: res.Set.Height}
	doc := export.NewDocument(res.Rec, colours, in, Settings(cfg), cfg.Producer, "px")
	dropped := map[string]int{}
	for k, v := range res.Set.Stats.Ended {
		dropped[k] = v
	}
	if n := len(res.Set.Tracks) - len(res.Window.Tracks) - len(res.Rejected); n > 0 {
		dropped[track.DropIncomplete] += n
	}
	if n := len(res.Rejected); n > 0 {
		dropped["residual-outlier"] += n
	}
	doc.Diagnostics.Tracks = &export.TrackCounts{Detected: res.Set.Stats.Detected, Kept: len(res.Window.Tracks), DroppedByReason: dropped}
	if cfg.Timing {
		doc.Diagnostics.TimingS = res.Timing
	}
	addStageReports(doc, res, cfg.Timing)
	return doc
}

// Settings returns every parameter of the run, defaults resolved, as the
// JSON "settings" object: the stages' options under "track" and "factor",
// the frame range under "range", and cfg.Settings merged on top.
func Settings(cfg Config) map[string]any {
	s := map[string]any{
		"track":     toMap(cfg.Track.WithDefaults()),
		"factor":    toMap(cfg.Factor.WithDefaults()),
		"robust":    toMap(cfg.Robust.WithDefaults()),
		"missing":   toMap(fixThreads(cfg).Missing.WithDefaults()),
		"refine":    refineSettings(fixThreads(cfg).Refine),
		"range":     toMap(cfg.Range),
		"ply_ascii": cfg.PLYASCII,
		"ply_sigma": cfg.PLYSigma,
	}
	for k, v := range cfg.Settings {
		s[k] = v
	}
	return s
}

// Threads is the number of goroutines the solvers use unless told
// otherwise. Their parallel sums depend on how the work is split, so a
// fixed count (rather than "all cores") makes the results the same on
// every machine, whatever its number of cores.
const Threads = 2

func fixThreads(cfg Config) Config {
	if cfg.Missing.Threads == 0 {
		cfg.Missing.Threads = Threads
	}
	if cfg.Refine.Bundle.Threads == 0 {
		cfg.Refine.Bundle.Threads = Threads
	}
	return cfg
}

func refineSettings(rc RefineConfig) map[string]any {
	m := toMap(rc)
	b := rc.Bundle.WithDefaults()
	b.Intrinsics = nil // recorded under factor.intrinsics
	m["bundle"] = toMap(b)
	if rc.Unit == "" {
		m["unit"] = "mm"
	}
	return m
}

// toMap turns an options struct into a JSON-ready map of its exported
// fields by name, in snake_case; function-valued fields (callbacks) are
// left out, nested structs become nested maps.
func toMap(v any) map[string]any {
	rv := reflect.ValueOf(v)
	for rv.Kind() == reflect.Pointer {
		if rv.IsNil() {
			return nil
		}
		rv = rv.Elem()
	}
	out := map[string]any{}
	rt := rv.Type()
	for i := 0; i < rt.NumField(); i++ {
		f := rt.Field(i)
		if !f.IsExported() {
			continue
		}
		fv := rv.Field(i)
		switch fv.Kind() {
		case reflect.Func, reflect.Chan, reflect.Interface, reflect.UnsafePointer:
			continue
		case reflect.Struct:
			out[snake(f.Name)] = toMap(fv.Interface())
		case reflect.Slice:
			if fv.IsNil() {
				out[snake(f.Name)] = nil
			} else if fv.Len() > 16 {
				// Masks and the like: say what was given, not every entry.
				out[snake(f.Name)] = fmt.Sprintf("%d entries", fv.Len())
			} else {
				out[snake(f.Name)] = fv.Interface()
			}
		default:
			out[snake(f.Name)] = fv.Interface()
		}
	}
	return out
}

// snake converts a Go field name to snake_case ("MaxCorners" → "max_corners",
// "FBThreshold" → "fb_threshold").
func snake(s string) string {
	var b strings.Builder
	r := []rune(s)
	for i, c := range r {
		if unicode.IsUpper(c) {
			if i > 0 && (unicode.IsLower(r[i-1]) || (i+1 < len(r) && unicode.IsLower(r[i+1]) && unicode.IsUpper(r[i-1]))) {
				b.WriteByte('_')
			}
			b.WriteRune(unicode.ToLower(c))
		} else {
			b.WriteRune(c)
		}
	}
	return b.String()
}

// CheckOut refuses an output folder that already holds results.
func CheckOut(dir string) error {
	st, err := export.OpenStage(dir, false)
	if err != nil {
		return &InputError{err}
	}
	st.Abort()
	return nil
}

// Write writes reconstruction.json, points.ply, cameras.ply, tracks.csv and
// report.html into cfg.Out through a stage: all files appear together or
// none does.
func Write(res *Result, cfg Config) (err error) {
	st, err := export.OpenStage(cfg.Out, cfg.Force)
	if err != nil {
		return &InputError{err}
	}
	defer func() {
		if err != nil {
			st.Abort()
		}
	}()
	// The tracks file holds exactly the observations the reconstruction used.
	used := append([]track.Track(nil), res.Window.Tracks...)
	sort.Slice(used, func(i, j int) bool { return used[i].ID < used[j].ID })
	files := []struct {
		name  string
		write func(io.Writer) error
	}{
		{"reconstruction.json", func(w io.Writer) error { return export.WriteJSON(w, res.Doc) }},
		{"points.ply", func(w io.Writer) error {
			o := export.PLYOptions{ASCII: cfg.PLYASCII}
			if cfg.PLYSigma {
				o.Uncertainty = plySigmas(res.Doc)
			}
			return export.WritePointsPLY(w, res.Doc, o)
		}},
		{"cameras.ply", func(w io.Writer) error {
			return export.WriteCamerasPLY(w, res.Doc, export.CamerasPLYOptions{ASCII: cfg.PLYASCII})
		}},
		{"tracks.csv", func(w io.Writer) error { return export.WriteTracksCSV(w, used) }},
		{export.FileReport, func(w io.Writer) error { return writeReport(w, res, cfg) }},
	}
	for _, f := range files {
		w, err := st.Create(f.name)
		if err != nil {
			return outputError(filepath.Join(cfg.Out, f.name), err)
		}
		if err := f.write(w); err != nil {
			w.Close()
			return outputError(filepath.Join(cfg.Out, f.name), err)
		}
		if err := w.Close(); err != nil {
			return outputError(filepath.Join(cfg.Out, f.name), err)
		}
		res.Files = append(res.Files, f.name)
	}
	if err := st.Commit(); err != nil {
		return outputError(cfg.Out, err)
	}
	return nil
}
