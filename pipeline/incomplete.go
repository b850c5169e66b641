package pipeline

import (
	"context"
	"sort"

	"gonum.org/v1/gonum/mat"

	"trackfactor/factor"
	"trackfactor/track"
)

// useIncomplete decides whether the missing-data solver should run: when
// the model supports incomplete tracks and no complete block spans every
// frame with enough tracks (at least MinCompleteTracks, or a fifth of all
// tracks). A complete block over the whole sequence is preferred even when
// it leaves shorter tracks out: long tracks are the best-determined points
// (their views span the whole arc) and a track that slides along an
// occluding contour betrays itself by its residual only over a long arc.
func useIncomplete(set *track.Set, w Window, ok bool, model factor.Model) bool {
	if model != factor.Orthographic && model != factor.ScaledOrthographic {
		return false
	}
	if !ok || w.Frames() < len(set.Frames) {
		return true
	}
	return len(w.Tracks) < MinCompleteTracks && 5*len(w.Tracks) < len(set.Tracks)
}

// MinCompleteTracks is the number of complete tracks over the whole
// sequence that makes the complete-data path preferable.
const MinCompleteTracks = 50

// minViews is the fewest observations a track needs to enter the
// missing-data solver: a quarter of the frames, at least 3, at most 8 —
// shorter tracks add little but noise and let sliding features through.
func minViews(frames int) int {
	return max(3, min(8, frames/4))
}

// IncompleteMeasurements builds the measurement matrix of every track with
// at least minViews observations over all frames of the set, with the
// visibility mask.
func IncompleteMeasurements(set *track.Set, minViews int) (*factor.Measurements, []track.Track) {
	nf := len(set.Frames)
	var used []track.Track
	for _, t := range set.Tracks {
		if len(t.Obs) >= minViews {
			used = append(used, t)
		}
	}
	np := len(used)
	W := mat.NewDense(2*nf, np, nil)
	mask := make([]bool, nf*np)
	frames := make([]int, nf)
	for f := range frames {
		frames[f] = f
	}
	ids := make([]int, np)
	for p, t := range used {
		ids[p] = t.ID
		for _, o := range t.Obs {
			W.Set(2*o.Frame, p, o.X)
			W.Set(2*o.Frame+1, p, o.Y)
			mask[o.Frame*np+p] = true
		}
	}
	return &factor.Measurements{W: W, Mask: mask, Frames: frames, Tracks: ids}, used
}

// reconstructIncomplete runs the missing-data solver and keeps, for the
// outputs, exactly the observations the reconstruction used: recovered
// frames and tracks, rejected observations removed.
func reconstructIncomplete(ctx context.Context, set *track.Set, cfg Config, res *Result) error {
	// Count before building: the matrix of no track at all cannot be made.
	p, n := countViews(set, minViews(len(set.Frames)))
	if p < factor.MinPoints {
		return &InputError{errTooFewTracks(set)}
	}
	if err := CheckMemory(len(set.Frames), p, n, true, cfg); err != nil {
		return err
	}
	m, used := IncompleteMeasurements(set, minViews(len(set.Frames)))
	if len(used) < factor.MinPoints {
		return &InputError{errTooFewTracks(set)}
	}
	var rep, firstRep *factor.MissingReport
	fits := 0
	rec, rob, err := factor.RejectTracks(ctx, m, cfg.Robust, func(ctx context.Context, m *factor.Measurements) (*factor.Reconstruction, error) {
		mo := cfg.Missing
		if fits > 0 && mo.MaxRuns == 0 {
			// Refits after rejecting a few tracks start from the same
			// propagated block; the optimum was verified by the first fit's
			// restarts, so one run suffices.
			mo.MaxRuns = 1
		}
		fits++
		r, mr, err := factor.FactorizeIncomplete(ctx, m, cfg.Factor, mo)
		if err == nil {
			rep = mr
			if firstRep == nil {
				firstRep = mr
			}
		}
		return r, err
	})
	if err != nil {
		return err
	}
	if firstRep != rep {
		// The verification by restarts belongs to the first fit.
		rep.Verified, rep.RunsToAgree = firstRep.Verified, firstRep.RunsToAgree
	}
	res.Rec = rec
	res.Missing = rep
	frames := map[int]bool{}
	for _, c := range rec.Cameras {
		frames[c.Frame] = true
	}
	points := map[int]bool{}
	for _, p := range rec.Points {
		points[p.Track] = true
	}
	rejected := map[[2]int]bool{}
	for _, o := range rep.Robust.Rejected {
		rejected[[2]int{o.Track, o.Frame}] = true
	}
	var kept []track.Track
	first, last := len(set.Frames), -1
	for _, t := range used {
		if !points[t.ID] {
			continue
		}
		sub := track.Track{ID: t.ID, RGB: t.RGB}
		for _, o := range t.Obs {
			if frames[o.Frame] && !rejected[[2]int{t.ID, o.Frame}] {
				sub.Obs = append(sub.Obs, o)
				first, last = min(first, o.Frame), max(last, o.Frame)
			}
		}
		if len(sub.Obs) > 0 {
			kept = append(kept, sub)
		}
	}
	sort.Slice(kept, func(i, j int) bool { return kept[i].ID < kept[j].ID })
	res.Window = Window{First: first, Last: last, Tracks: kept}
	res.Rejected = append(append([]int(nil), rob.Rejected...), rep.UnrecoveredTracks...)
	return nil
}
