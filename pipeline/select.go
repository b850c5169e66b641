package pipeline

import (
	"sort"

	"gonum.org/v1/gonum/mat"

	"trackfactor/factor"
	"trackfactor/track"
)

// Window is a run of consecutive frames [First, Last] and the tracks seen
// in every one of them: the complete block a complete-data model can use.
type Window struct {
	First, Last int
	Tracks      []track.Track // restricted to the window's frames
}

// Frames is the number of frames in the window.
func (w Window) Frames() int { return w.Last - w.First + 1 }

// LargestCompleteWindow finds the run of consecutive frames whose complete
// tracks give the most observations (frames × tracks), among windows with
// at least minFrames frames and minTracks tracks; it prefers the whole
// sequence whenever the whole sequence has at least minTracks complete
// tracks and keeps at least half the observations of the best window.
// ok is false when no window qualifies.
//
// A track with a gap contributes each gap-free run separately. The search
// visits every start frame a and, for the runs that begin at or before a,
// counts how many reach each end frame b: O(F·R log R) for R runs.
func LargestCompleteWindow(set *track.Set, minFrames, minTracks int) (Window, bool) {
	nf := len(set.Frames)
	type run struct{ track, first, last int }
	var runs []run
	for ti, t := range set.Tracks {
		for i := 0; i < len(t.Obs); {
			j := i
			for j+1 < len(t.Obs) && t.Obs[j+1].Frame == t.Obs[j].Frame+1 {
				j++
			}
			runs = append(runs, run{ti, t.Obs[i].Frame, t.Obs[j].Frame})
			i = j + 1
		}
	}
	bestA, bestB, bestScore := -1, -1, 0
	ends := make([]int, 0, len(runs))
	for a := 0; a < nf; a++ {
		ends = ends[:0]
		for _, r := range runs {
			if r.first <= a && r.last >= a {
				ends = append(ends, r.last)
			}
		}
		sort.Sort(sort.Reverse(sort.IntSlice(ends)))
		// ends[k-1] is the furthest frame reached by at least k runs.
		for k := 1; k <= len(ends); k++ {
			if k < len(ends) && ends[k] == ends[k-1] {
				continue
			}
			b := ends[k-1]
			if b-a+1 < minFrames || k < minTracks {
				continue
			}
			if s := k * (b - a + 1); s > bestScore {
				bestA, bestB, bestScore = a, b, s
			}
		}
	}
	if bestScore == 0 {
		return Window{}, false
	}
	full := 0
	for _, r := range runs {
		if r.first == 0 && r.last == nf-1 {
			full++
		}
	}
	if nf >= minFrames && full >= minTracks && 2*full*nf >= bestScore {
		bestA, bestB = 0, nf-1
	}
	w := Window{First: bestA, Last: bestB}
	for _, r := range runs {
		if r.first <= bestA && r.last >= bestB {
			t := set.Tracks[r.track]
			sub := track.Track{ID: t.ID, RGB: t.RGB}
			for _, o := range t.Obs {
				if o.Frame >= bestA && o.Frame <= bestB {
					sub.Obs = append(sub.Obs, o)
				}
			}
			w.Tracks = append(w.Tracks, sub)
		}
	}
	return w, true
}

// CompleteMeasurements builds the measurement matrix of a complete window:
// row 2f / 2f+1 hold x / y of frame First+f, column p track p.
func CompleteMeasurements(w Window) *factor.Measurements {
	nf, np := w.Frames(), len(w.Tracks)
	W := mat.NewDense(2*nf, np, nil)
	frames := make([]int, nf)
	for f := range frames {
		frames[f] = w.First + f
	}
	ids := make([]int, np)
	for p, t := range w.Tracks {
		ids[p] = t.ID
		for _, o := range t.Obs {
			f := o.Frame - w.First
			W.Set(2*f, p, o.X)
			W.Set(2*f+1, p, o.Y)
		}
	}
	return &factor.Measurements{W: W, Frames: frames, Tracks: ids}
}
