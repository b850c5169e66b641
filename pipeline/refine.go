package pipeline

import (
	"context"
	"fmt"
	"math"
	"path/filepath"
	"strconv"
	"time"

	"trackfactor/export"
	"trackfactor/factor"
	"trackfactor/factor/bundle"
	"trackfactor/factor/turntable"
	"trackfactor/track"
)

// RefineConfig configures what follows the factorization: bundle
// adjustment, the turntable fit and the metric scale. The zero value
// refines with the defaults of package bundle, fits the turntable and
// leaves the units in pixels.
type RefineConfig struct {
	// Off skips bundle adjustment (the turntable fit still runs on the
	// factorization's cameras).
	Off bool
	// Turntable constrains the refinement to single-axis motion: one
	// angle per frame about a common axis.
	Turntable bool
	// NominalStepDeg is the turntable step the rig was set to (0: none):
	// the measured steps are compared with it.
	NominalStepDeg float64
	// PixelSize is the object-space size of one pixel (orthographic or
	// telecentric set-ups), in Unit; 0 for none.
	PixelSize float64
	// Reference gives the distance between two tracks, in Unit; nil for
	// none. At most one of PixelSize and Reference may be given.
	Reference *Reference
	// Unit names the length unit of PixelSize or Reference (default "mm").
	Unit   string
	Bundle bundle.Options
}

// Reference is a known distance between two points of the part, given
// either as two track ids or as two image points in one frame.
type Reference struct {
	TrackA, TrackB int
	Length         float64
	// Frame, when not "", gives the reference as image points A and B
	// (pixels, x right, y down) in that frame, named by its file name
	// (as listed in the JSON's input.frames) or its index from 0. Each
	// point stands for the used track observed closest to it in that
	// frame, within SnapPx; TrackA and TrackB are then ignored.
	Frame string
	A, B  [2]float64
	// SnapPx is how far from a point its track may be, px; 0 means
	// DefaultSnapPx.
	SnapPx float64
}

// DefaultSnapPx is the default Reference.SnapPx: a few pixels, about the
// spacing error of a click on a corner that the tracker also found.
const DefaultSnapPx = 4.0

// ReferenceUsed records which tracks an image-point reference stood for.
type ReferenceUsed struct {
	Frame          int
	TrackA, TrackB int
	// SnapA and SnapB are the distances, px, from the given points to the
	// tracks' observations in that frame.
	SnapA, SnapB float64
}

// resolveReference maps an image-point reference to the two used tracks
// observed nearest to its points in its frame.
func resolveReference(ref *Reference, set *track.Set, used []track.Track) (*ReferenceUsed, error) {
	f := -1
	for i, n := range set.Frames {
		if n == ref.Frame || filepath.Base(n) == ref.Frame {
			f = i
			break
		}
	}
	if f < 0 {
		if i, err := strconv.Atoi(ref.Frame); err == nil && i >= 0 && i < len(set.Frames) {
			f = i
		}
	}
	if f < 0 {
		return nil, fmt.Errorf("reference frame %q is not one of the %d frames of the input; name a frame by its file name or its index (0–%d)", ref.Frame, len(set.Frames), len(set.Frames)-1)
	}
	snap := ref.SnapPx
	if snap <= 0 {
		snap = DefaultSnapPx
	}
	nearest := func(p [2]float64) (int, float64) {
		best, bd := -1, math.Inf(1)
		for _, t := range used {
			for _, o := range t.Obs {
				if o.Frame != f {
					continue
				}
				if d := math.Hypot(o.X-p[0], o.Y-p[1]); d < bd {
					best, bd = t.ID, d
				}
			}
		}
		return best, bd
	}
	u := &ReferenceUsed{Frame: f}
	for k, p := range [][2]float64{ref.A, ref.B} {
		id, d := nearest(p)
		if id < 0 {
			return nil, fmt.Errorf("reference frame %q (%d): no reconstructed track is seen in it; name another frame", ref.Frame, f)
		}
		if d > snap {
			return nil, fmt.Errorf("reference point (%.1f, %.1f) in frame %q: the nearest reconstructed track (%d) is %.1f px away, more than %.1f px; pick a point on a corner the tracker followed (tracks.csv lists them by frame)", p[0], p[1], ref.Frame, id, d, snap)
		}
		if k == 0 {
			u.TrackA, u.SnapA = id, d
		} else {
			u.TrackB, u.SnapB = id, d
		}
	}
	if u.TrackA == u.TrackB {
		return nil, fmt.Errorf("both reference points in frame %q are nearest to track %d; give two points farther apart", ref.Frame, u.TrackA)
	}
	return u, nil
}

// Refinement is what the refinement stage did, for the outputs.
type Refinement struct {
	Summary     *bundle.Summary
	Mirror      *bundle.Mirror
	Uncertainty *bundle.Uncertainty
	Turntable   *turntable.Fit
	Scale       *bundle.Scaled
	// Reference is which tracks an image-point reference stood for; nil
	// when none was given that way.
	Reference *ReferenceUsed
	Units     string
	// Skipped says why bundle adjustment did not run ("" when it ran).
	Skipped string
	// DepthConvention is true when the depth order of an affine result
	// was chosen by the camera-above-the-table convention.
	DepthConvention bool
}

// WarnDepthConvention: the depth order of an affine reconstruction was
// chosen by convention (camera above the turntable), not by the data.
const WarnDepthConvention = "depth-order-by-convention"

// WarnNoUncertainty: the refinement ran but computed no covariance (too
// many cameras).
const WarnNoUncertainty = "uncertainty-not-computed"

// usedMeasurements rebuilds the measurement matrix of the tracks the
// reconstruction used, over all frames of the set, with a mask when any
// entry is missing.
func usedMeasurements(set *track.Set, used []track.Track) *factor.Measurements {
	tmp := &track.Set{Frames: set.Frames, Width: set.Width, Height: set.Height, Tracks: used}
	m, _ := IncompleteMeasurements(tmp, 1)
	if m.Complete() {
		m.Mask = nil
	}
	return m
}

// refine runs the refinement stage on res in place.
func refine(ctx context.Context, res *Result, cfg Config) error {
	rc := cfg.Refine
	out := &Refinement{Units: "px"}
	res.Refinement = out
	m := usedMeasurements(res.Set, res.Window.Tracks)
	bo := rc.Bundle
	if bo.Progress == nil {
		bo.Progress = cfg.Progress
	}
	rec := res.Rec
	intr := cfg.Factor.Intrinsics
	if intr == nil {
		intr = rec.Intrinsics
	}
	t0 := time.Now()
	fitOpts := turntable.Options{NominalStepDeg: rc.NominalStepDeg}
	switch {
	case rc.Off:
		out.Skipped = "turned off (--refine=false)"
	case rc.Turntable:
		if intr != nil && rec.Model == factor.Perspective {
			bo.Intrinsics = intr
		}
		fit, br, err := turntable.Refine(ctx, m, rec, fitOpts, bo)
		if err != nil {
			return fmt.Errorf("refine: single-axis bundle adjustment: %w", err)
		}
		res.Rec, out.Summary, out.Uncertainty, out.Turntable = br.Reconstruction, &br.Summary, br.Uncertainty, fit
	case intr != nil && rec.Model != factor.Perspective:
		// An affine start with known intrinsics: refine both depth orders
		// with the perspective model and keep the better.
		bo.Intrinsics = intr
		mir, err := bundle.ResolveMirror(ctx, m, rec, bo)
		if err != nil {
			return fmt.Errorf("refine: %w", err)
		}
		out.Mirror = mir
		res.Rec, out.Summary, out.Uncertainty = mir.Best.Reconstruction, &mir.Best.Summary, mir.Best.Uncertainty
	default:
		if rec.Model == factor.Paraperspective {
			// Paraperspective has no exact bundle model of its own
			// without intrinsics; keep the factorization.
			out.Skipped = "the paraperspective model is refined only with intrinsics (give --intrinsics)"
			break
		}
		if rec.Model == factor.Perspective {
			bo.Intrinsics = intr
		}
		br, err := bundle.Adjust(ctx, m, rec, bo)
		if err != nil {
			return fmt.Errorf("refine: bundle adjustment: %w", err)
		}
		res.Rec, out.Summary, out.Uncertainty = br.Reconstruction, &br.Summary, br.Uncertainty
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	if out.Summary != nil && !out.Summary.Usable() {
		res.Rec.Diagnostics.Warn("refinement-unusable", fmt.Sprintf("bundle adjustment ended without a usable result (%s): the factorization is reported instead; check the tracks for outliers", out.Summary.Termination))
		res.Rec = rec
		out.Uncertainty = nil
	}
	res.Timing["refine"] = time.Since(t0).Seconds()
	if lim := bo.WithDefaults().UncertaintyMaxCameras; out.Summary != nil && out.Summary.Usable() && out.Uncertainty == nil && lim > 0 && len(res.Rec.Cameras) > lim {
		res.Rec.Diagnostics.Warn(WarnNoUncertainty, fmt.Sprintf("no uncertainties (sigma) were computed: %d cameras is more than the %d the covariance is computed for (it needs a dense inverse of the whole camera system); reconstruct a subset of the frames (--step, --end) to get them", len(res.Rec.Cameras), lim))
	}

	if out.Turntable == nil && len(res.Rec.Cameras) >= 3 {
		fitOpts.Uncertainty = out.Uncertainty
		if fit, err := turntable.FitReconstruction(res.Rec, fitOpts); err == nil {
			out.Turntable = fit
		} else {
			res.Rec.Diagnostics.Warn("turntable-fit-failed", fmt.Sprintf("no turntable axis could be fitted (%v); the rotations are reported as they are", err))
		}
	}
	if out.Turntable != nil && res.Rec.Diagnostics.MirrorAmbiguous && out.Turntable.ElevationDeg < 0 && !out.Turntable.Constrained {
		// Affine models cannot tell the depth order; of the two, report
		// the one in which the camera looks down on the turntable, the
		// usual set-up, and say so.
		mirrored := bundle.Mirrored(res.Rec)
		fitOpts.Uncertainty = out.Uncertainty
		if fit, err := turntable.FitReconstruction(mirrored, fitOpts); err == nil {
			res.Rec, out.Turntable = mirrored, fit
			out.DepthConvention = true
		}
	}
	if out.DepthConvention {
		res.Rec.Diagnostics.Warn(WarnDepthConvention, "the depth order is not determined by the data (affine model); the one shown assumes the camera looks down on the turntable — if it looks up at the part, depth is reversed. Give --intrinsics to let a perspective refinement decide")
	}
	if out.Turntable != nil {
		res.Rec.Diagnostics.Warnings = append(res.Rec.Diagnostics.Warnings, out.Turntable.Warnings...)
	}
	return applyScale(res, rc, out)
}

func applyScale(res *Result, rc RefineConfig, out *Refinement) error {
	unit := rc.Unit
	if unit == "" {
		unit = "mm"
	}
	var sc *bundle.Scaled
	var err error
	switch {
	case rc.PixelSize > 0 && rc.Reference != nil:
		return &InputError{fmt.Errorf("give either a pixel size or a reference length, not both")}
	case rc.PixelSize > 0:
		sc, err = bundle.ScaleByPixelSize(res.Rec, rc.PixelSize, unit)
	case rc.Reference != nil:
		a, b := rc.Reference.TrackA, rc.Reference.TrackB
		if rc.Reference.Frame != "" {
			u, err := resolveReference(rc.Reference, res.Set, res.Window.Tracks)
			if err != nil {
				return &InputError{fmt.Errorf("scale: %w", err)}
			}
			out.Reference, a, b = u, u.TrackA, u.TrackB
		}
		sc, err = bundle.ScaleByReference(res.Rec, out.Uncertainty, a, b, rc.Reference.Length, unit)
	default:
		return nil
	}
	if err != nil {
		return &InputError{fmt.Errorf("scale: %w", err)}
	}
	central := res.Rec.Model == factor.Perspective || res.Rec.Model == factor.Paraperspective
	res.Rec = sc.Reconstruction
	if out.Uncertainty != nil {
		out.Uncertainty = out.Uncertainty.Scaled(sc.Factor, central)
	}
	out.Scale, out.Units = sc, sc.Unit
	return nil
}

// pointSigmas returns the per-point standard deviations in the order of
// rec.Points, or nil when none are known. Points without one get 0 — the
// caller checks the share.
func pointSigmas(res *Result) []float64 {
	if res.Refinement == nil || res.Refinement.Uncertainty == nil {
		return nil
	}
	byTrack := map[int]float64{}
	for _, p := range res.Refinement.Uncertainty.Points {
		if p.Refined && !math.IsNaN(p.Sigma) && !math.IsInf(p.Sigma, 0) {
			byTrack[p.Track] = p.Sigma
		}
	}
	out := make([]float64, len(res.Rec.Points))
	for i, p := range res.Rec.Points {
		out[i] = byTrack[p.Track]
	}
	return out
}

// plySigmas returns the points' standard deviations in document order for
// the PLY sigma property, with export.SigmaUnknown for points the
// refinement gave none (not refined, or refinement skipped).
func plySigmas(doc *export.Document) []float64 {
	out := make([]float64, len(doc.Points))
	for i, p := range doc.Points {
		out[i] = export.SigmaUnknown
		if p.Sigma != nil {
			out[i] = *p.Sigma
		}
	}
	return out
}
