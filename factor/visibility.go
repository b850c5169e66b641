package factor

import (
	"fmt"
	"math/bits"
	"sort"
	"strings"
)

// Visibility is the pattern of observed entries of a measurement matrix.
type Visibility struct {
	Frames int `json:"frames"`
	Tracks int `json:"tracks"`
	// Observed counts the observed (frame, track) entries; Share is
	// Observed / (Frames × Tracks).
	Observed int     `json:"observed"`
	Share    float64 `json:"share_observed"`
	// PerFrame[f] counts the tracks observed in frame f, PerTrack[p] the
	// frames track p is observed in (input order).
	PerFrame []int `json:"per_frame"`
	PerTrack []int `json:"per_track"`
	// Parts are the connected parts of the frame graph in which two frames
	// are linked when they share at least MinSharedTracks tracks, as the
	// caller's frame indices, ordered by their first frame. One part means
	// the views hang together.
	Parts [][]int `json:"parts"`
	// SharedBetweenParts[i] counts the tracks observed both in Parts[i]
	// and in Parts[i+1].
	SharedBetweenParts []int `json:"shared_between_parts"`

	partPos [][]int // Parts as frame positions
	partObs []int   // observations per part
}

// incBits is a set of small integers.
type incBits []uint64

func newIncBits(n int) incBits   { return make(incBits, (n+63)/64) }
func (b incBits) set(i int)      { b[i>>6] |= 1 << (uint(i) & 63) }
func (b incBits) has(i int) bool { return b[i>>6]&(1<<(uint(i)&63)) != 0 }
func (b incBits) andWith(o incBits) {
	for i := range b {
		b[i] &= o[i]
	}
}
func (b incBits) orWith(o incBits) {
	for i := range b {
		b[i] |= o[i]
	}
}
func incAndCount(a, b incBits) int {
	n := 0
	for i := range a {
		n += bits.OnesCount64(a[i] & b[i])
	}
	return n
}

// incFrameBits returns, per frame, the set of observed tracks.
func incFrameBits(m *Measurements) []incBits {
	nf, np := m.Dims()
	out := make([]incBits, nf)
	for f := range out {
		out[f] = newIncBits(np)
		for p := 0; p < np; p++ {
			if m.Observed(f, p) {
				out[f].set(p)
			}
		}
	}
	return out
}

// VisibilityPattern summarises which entries of m are observed and splits
// the frames into parts tied together by at least minShared common tracks
// (zero means 4).
func VisibilityPattern(m *Measurements, minShared int) Visibility {
	checkShape(m)
	if minShared == 0 {
		minShared = 4
	}
	nf, np := m.Dims()
	v := Visibility{Frames: nf, Tracks: np, PerFrame: make([]int, nf), PerTrack: make([]int, np)}
	fb := incFrameBits(m)
	for f := 0; f < nf; f++ {
		for p := 0; p < np; p++ {
			if fb[f].has(p) {
				v.PerFrame[f]++
				v.PerTrack[p]++
			}
		}
		v.Observed += v.PerFrame[f]
	}
	if nf*np > 0 {
		v.Share = float64(v.Observed) / float64(nf*np)
	}
	// Union–find over frames linked by ≥ minShared common tracks.
	parent := make([]int, nf)
	for i := range parent {
		parent[i] = i
	}
	var find func(int) int
	find = func(i int) int {
		for parent[i] != i {
			parent[i] = parent[parent[i]]
			i = parent[i]
		}
		return i
	}
	for f := 0; f < nf; f++ {
		for g := f + 1; g < nf; g++ {
			if find(f) == find(g) {
				continue
			}
			if incAndCount(fb[f], fb[g]) >= minShared {
				parent[find(g)] = find(f)
			}
		}
	}
	idx := map[int]int{}
	for f := 0; f < nf; f++ {
		r := find(f)
		i, ok := idx[r]
		if !ok {
			i = len(v.partPos)
			idx[r] = i
			v.partPos = append(v.partPos, nil)
			v.partObs = append(v.partObs, 0)
		}
		v.partPos[i] = append(v.partPos[i], f)
		v.partObs[i] += v.PerFrame[f]
	}
	// Parts come out ordered by their first frame.
	var union []incBits
	for _, part := range v.partPos {
		ids := make([]int, len(part))
		u := newIncBits(np)
		for i, f := range part {
			ids[i] = incFrameID(m, f)
			u.orWith(fb[f])
		}
		v.Parts = append(v.Parts, ids)
		union = append(union, u)
	}
	for i := 0; i+1 < len(union); i++ {
		v.SharedBetweenParts = append(v.SharedBetweenParts, incAndCount(union[i], union[i+1]))
	}
	return v
}

// mainPart returns the positions of the frames of the part with the most
// observations (the first such part on ties).
func (v *Visibility) mainPart() []int {
	best := 0
	for i, n := range v.partObs {
		if n > v.partObs[best] {
			best = i
		}
	}
	if len(v.partPos) == 0 {
		return nil
	}
	return v.partPos[best]
}

// incDisconnectedWarning builds the WarnDisconnectedViews warning when the
// views fall into more than one part.
func incDisconnectedWarning(m *Measurements, v *Visibility, minShared int) (Warning, bool) {
	if len(v.Parts) <= 1 {
		return Warning{}, false
	}
	var parts []string
	for _, p := range v.Parts {
		parts = append(parts, incRanges(p))
	}
	main := v.mainPart()
	ids := make([]int, len(main))
	for i, f := range main {
		ids[i] = incFrameID(m, f)
	}
	shared := make([]string, len(v.SharedBetweenParts))
	for i, s := range v.SharedBetweenParts {
		shared[i] = fmt.Sprint(s)
	}
	return Warning{Code: WarnDisconnectedViews, Message: fmt.Sprintf(
		"the views split into %d parts that share too few tracks to be tied together (fewer than %d common tracks link any two frames across parts): frames %s; consecutive parts share %s tracks in all; only frames %s are reconstructed; link the parts with longer tracks or loop closure, or reconstruct them separately",
		len(v.Parts), minShared, strings.Join(parts, " | "), strings.Join(shared, ", "), incRanges(ids))}, true
}

// incCore returns the frames and tracks (positions) that can take
// part in the affine fit: the frames of the main part, pruned until every
// kept track has at least two kept frames and every kept frame at least
// MinPoints kept tracks (each frame has 8 unknowns, each track 3 and two
// equations per view).
func incCore(m *Measurements, v *Visibility) (frames, points []int) {
	nf, np := m.Dims()
	keepF := make([]bool, nf)
	for _, f := range v.mainPart() {
		keepF[f] = true
	}
	keepP := make([]bool, np)
	for p := range keepP {
		keepP[p] = true
	}
	for changed := true; changed; {
		changed = false
		for p := 0; p < np; p++ {
			if !keepP[p] {
				continue
			}
			n := 0
			for f := 0; f < nf && n < 2; f++ {
				if keepF[f] && m.Observed(f, p) {
					n++
				}
			}
			if n < 2 {
				keepP[p] = false
				changed = true
			}
		}
		for f := 0; f < nf; f++ {
			if !keepF[f] {
				continue
			}
			n := 0
			for p := 0; p < np && n < MinPoints; p++ {
				if keepP[p] && m.Observed(f, p) {
					n++
				}
			}
			if n < MinPoints {
				keepF[f] = false
				changed = true
			}
		}
	}
	for f, k := range keepF {
		if k {
			frames = append(frames, f)
		}
	}
	for p, k := range keepP {
		if k {
			points = append(points, p)
		}
	}
	sort.Ints(frames)
	return frames, points
}
