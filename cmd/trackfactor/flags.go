package main

import (
	"fmt"
	"math"
	"os"
	"strconv"
	"strings"

	"github.com/urfave/cli/v2"

	"trackfactor/export"
	"trackfactor/factor"
	"trackfactor/pipeline"
	"trackfactor/track"
)

// Flag groups shared by the commands. Defaults shown in --help come from
// the packages' own WithDefaults, so help and behaviour cannot disagree.

type commonFlags struct {
	quiet     bool
	logFormat string
	sink      *progressSink // set by progress (progress.go)
}

func (f *commonFlags) flags() []cli.Flag {
	return []cli.Flag{
		&cli.BoolFlag{Name: "quiet", Aliases: []string{"q"}, Usage: "print nothing but errors", Destination: &f.quiet},
		&cli.StringFlag{Name: "log-format", Usage: "progress on stderr: " + logText + " (a bar on a terminal, plain lines otherwise) or " + logJSON + " (one object per line)", Value: logText, Destination: &f.logFormat},
	}
}

type trackFlags struct {
	start, end, step     int
	corners              int
	quality, minDistance float64
	window, levels       int
	fb, minEigen         float64
	redetect             int
	minLength            int
	noRefine, noReject   bool
	noOcclusion          bool
	mask, roi            string
}

func (f *trackFlags) flags() []cli.Flag {
	d := track.Options{}.WithDefaults()
	return []cli.Flag{
		&cli.IntFlag{Name: "start", Category: "frames", Usage: "first frame index to use (0-based, in sorted order)", Value: 0, Destination: &f.start},
		&cli.IntFlag{Name: "end", Category: "frames", Usage: "stop before this frame index (0 = to the last frame)", Value: 0, Destination: &f.end},
		&cli.IntFlag{Name: "step", Category: "frames", Usage: "use every N-th frame", Value: 1, Destination: &f.step},
		&cli.IntFlag{Name: "corners", Category: "tracking", Usage: "most corners to detect per detection round", Value: d.Detect.MaxCorners, Destination: &f.corners},
		&cli.Float64Flag{Name: "quality", Category: "tracking", Usage: "corner quality: fraction of the strongest corner's score below which corners are ignored", Value: d.Detect.Quality, Destination: &f.quality},
		&cli.Float64Flag{Name: "min-distance", Category: "tracking", Usage: "smallest distance between corners, px", Value: d.Detect.MinDistance, Destination: &f.minDistance},
		&cli.IntFlag{Name: "window", Category: "tracking", Usage: "Lucas–Kanade window side, px (odd)", Value: d.Window, Destination: &f.window},
		&cli.IntFlag{Name: "levels", Category: "tracking", Usage: "pyramid levels above full resolution", Value: d.Levels, Destination: &f.levels},
		&cli.Float64Flag{Name: "fb-threshold", Category: "tracking", Usage: "forward–backward check: largest round-trip error, px (negative turns it off)", Value: d.FBThreshold, Destination: &f.fb},
		&cli.Float64Flag{Name: "min-eigen", Category: "tracking", Usage: "end a track when its window's smaller gradient eigenvalue per pixel falls below this", Value: d.MinEigen, Destination: &f.minEigen},
		&cli.IntFlag{Name: "redetect-every", Category: "tracking", Usage: "detect new corners in empty areas every N frames (negative: only when the count falls)", Value: d.RedetectEvery, Destination: &f.redetect},
		&cli.IntFlag{Name: "min-length", Category: "tracking", Usage: "drop tracks with fewer observations", Value: d.MinLength, Destination: &f.minLength},
		&cli.BoolFlag{Name: "no-refine", Category: "tracking", Usage: "skip the drift-free refinement of positions against each track's first appearance", Destination: &f.noRefine},
		&cli.BoolFlag{Name: "no-reject", Category: "tracking", Usage: "keep static-background and outlier tracks", Destination: &f.noReject},
		&cli.BoolFlag{Name: "no-occlusion-check", Category: "tracking", Usage: "keep tracks whose point is background dragged along by the part's outline (the two-layer motion test that ends them as occlusion-boundary)", Destination: &f.noOcclusion},
		&cli.StringFlag{Name: "mask", Category: "tracking", Usage: "image of the frame size: corners are detected only where it is bright", Destination: &f.mask},
		&cli.StringFlag{Name: "roi", Category: "tracking", Usage: "detect corners only inside the rectangle X,Y,W,H (px)", Destination: &f.roi},
	}
}

func (f *trackFlags) rangeOf() (track.Range, error) {
	if f.start < 0 || f.end < 0 || f.step < 1 {
		return track.Range{}, usagef("--start and --end must be ≥ 0 and --step ≥ 1 (got %d, %d, %d); e.g. --start 10 --end 50 --step 2", f.start, f.end, f.step)
	}
	if f.end != 0 && f.end <= f.start {
		return track.Range{}, usagef("--end %d must be past --start %d (or 0 for the last frame)", f.end, f.start)
	}
	return track.Range{Start: f.start, End: f.end, Step: f.step}, nil
}

func (f *trackFlags) options() (track.Options, error) {
	o := track.Options{}.WithDefaults()
	o.Detect.MaxCorners = f.corners
	o.Detect.Quality = f.quality
	o.Detect.MinDistance = f.minDistance
	o.Window = f.window
	o.Levels = f.levels
	o.FBThreshold = f.fb
	o.MinEigen = f.minEigen
	o.RedetectEvery = f.redetect
	o.MinLength = f.minLength
	o.Refine.Off = f.noRefine
	o.Reject.Off = f.noReject
	if f.noOcclusion {
		o.Refine.StaticShare = -1
	}
	if err := o.Validate(); err != nil {
		return o, &usageError{err.Error()}
	}
	return o, nil
}

// maskSpec returns the mask file and rectangle given on the command line.
func (f *trackFlags) maskSpec() (string, [4]int, error) {
	var r [4]int
	if f.roi == "" {
		return f.mask, r, nil
	}
	parts := strings.Split(f.roi, ",")
	if len(parts) != 4 {
		return "", r, usagef("--roi %q: want X,Y,W,H in pixels, e.g. --roi 100,50,400,300", f.roi)
	}
	for i, p := range parts {
		v, err := strconv.Atoi(strings.TrimSpace(p))
		if err != nil || v < 0 || (i >= 2 && v == 0) {
			return "", r, usagef("--roi %q: want four whole numbers X,Y,W,H with W,H > 0, e.g. --roi 100,50,400,300", f.roi)
		}
		r[i] = v
	}
	return f.mask, r, nil
}

type factorFlags struct {
	model       string
	noiseSigma  float64
	minRotation float64
	intrinsics  string
	perspMethod string
}

func (f *factorFlags) flags() []cli.Flag {
	d := factor.Options{}.WithDefaults()
	return []cli.Flag{
		&cli.StringFlag{Name: "model", Category: "reconstruction", Usage: "camera model: " + strings.Join(modelNames(), ", "), Value: string(d.Model), Destination: &f.model},
		&cli.Float64Flag{Name: "noise-sigma", Category: "reconstruction", Usage: "expected tracking noise per coordinate, px (0 = estimate from the data)", Value: 0, Destination: &f.noiseSigma},
		&cli.StringFlag{Name: "intrinsics", Category: "reconstruction", Usage: "camera calibration file: our JSON/YAML (fx, fy, cx, cy, distortion) or an OpenCV FileStorage YAML (camera_matrix, distortion_coefficients); observations are undistorted first", Destination: &f.intrinsics},
		&cli.StringFlag{Name: "perspective-method", Category: "reconstruction", Usage: "perspective model's start: " + factor.ChristyHoraud + " (iterative correction of an affine fit) or " + factor.SturmTriggs + " (projective factorization)", Value: factor.ChristyHoraud, Destination: &f.perspMethod},
		&cli.Float64Flag{Name: "min-rotation", Category: "reconstruction", Usage: "smallest spread of viewing directions that constrains depth, degrees", Value: d.MinRotationDeg, Destination: &f.minRotation},
	}
}

func modelNames() []string {
	return []string{string(factor.Orthographic), string(factor.ScaledOrthographic), string(factor.Paraperspective), string(factor.Perspective), string(factor.Auto)}
}

func (f *factorFlags) options() (factor.Options, error) {
	ok := false
	for _, m := range modelNames() {
		ok = ok || m == f.model
	}
	if !ok {
		return factor.Options{}, usagef("--model %q is not known; use one of %s", f.model, strings.Join(modelNames(), ", "))
	}
	o := factor.Options{Model: factor.Model(f.model), NoiseSigma: f.noiseSigma, MinRotationDeg: f.minRotation, PerspectiveMethod: f.perspMethod}
	if f.perspMethod != factor.ChristyHoraud && f.perspMethod != factor.SturmTriggs {
		return o, usagef("--perspective-method %q is not known; use %s or %s", f.perspMethod, factor.ChristyHoraud, factor.SturmTriggs)
	}
	if f.intrinsics != "" {
		data, err := os.ReadFile(f.intrinsics)
		if err != nil {
			return o, &pipeline.InputError{Err: fmt.Errorf("--intrinsics: %w; give the calibration file's path", err)}
		}
		in, err := factor.ParseIntrinsics(data, f.intrinsics)
		if err != nil {
			return o, &pipeline.InputError{Err: err}
		}
		o.Intrinsics = &in
	}
	if o.Model == factor.Perspective && o.Intrinsics == nil {
		return o, usagef("--model perspective needs the camera's intrinsics: add --intrinsics FILE (or use --model paraperspective, which can work without them)")
	}
	if math.IsNaN(f.noiseSigma) {
		return o, usagef("--noise-sigma must be a number")
	}
	if err := o.Validate(); err != nil {
		return o, &usageError{err.Error()}
	}
	return o, nil
}

type outFlags struct {
	dir       string
	force     bool
	plyASCII  bool
	plySigma  bool
	timing    bool
	maxMemory string
	maxBytes  int64 // maxMemory parsed by validate
}

func (f *outFlags) flags() []cli.Flag {
	return []cli.Flag{
		&cli.StringFlag{Name: "out", Category: "output", Aliases: []string{"o"}, Usage: "output folder (created if missing)", Destination: &f.dir},
		&cli.BoolFlag{Name: "force", Category: "output", Usage: "replace results already in the output folder (other files there are left alone)", Destination: &f.force},
		&cli.BoolFlag{Name: "timing", Category: "output", Usage: "record each stage's wall-clock time in the JSON and the report (outputs then differ from run to run)", Destination: &f.timing},
		&cli.BoolFlag{Name: "ply-ascii", Category: "output", Usage: "write PLY files as ASCII instead of binary little-endian", Destination: &f.plyASCII},
		&cli.BoolFlag{Name: "ply-sigma", Category: "output", Usage: "add each point's position standard deviation (from the refinement) to points.ply as a vertex property \"sigma\"; -1 where none was determined", Destination: &f.plySigma},
		&cli.StringFlag{Name: "max-memory", Category: "limits", Usage: fmt.Sprintf("refuse a reconstruction estimated to need more memory than this, e.g. 16G or 800M (0 = %.0f %% of the memory available when the run starts)", 100*pipeline.DefaultMemoryFraction), Value: "0", Destination: &f.maxMemory},
	}
}

func (f *outFlags) validate() error {
	if f.dir == "" {
		return usagef("no output folder: give one with -o, e.g. -o out/part42")
	}
	if st, err := os.Stat(f.dir); err == nil && !st.IsDir() {
		return usagef("-o %s is a file, not a folder; name a folder", f.dir)
	}
	b, err := pipeline.ParseSize(f.maxMemory)
	if err != nil {
		return usagef("--max-memory: %v (0 = %.0f %% of the available memory)", err, 100*pipeline.DefaultMemoryFraction)
	}
	f.maxBytes = b
	return nil
}

func producer(c *cli.Context) export.Producer {
	return export.Producer{Version: version, Command: strings.Join(os.Args, " ")}
}
