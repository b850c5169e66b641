package track

import (
	"context"
	"encoding/binary"
	"fmt"
	"math"
	"math/bits"
	"math/rand/v2"
	"runtime"
	"slices"
	"sort"
	"sync"
	"sync/atomic"

	"gocv.io/x/gocv"
)

// LoopOptions configures CloseLoops. The zero value of every field means
// its default; booleans are phrased so that false is the default. Defaults
// that depend on the sequence use n, its number of frames.
type LoopOptions struct {
	// Off turns loop closure off: CloseLoops returns an empty report and
	// leaves the Set as it is.
	Off bool

	// MinGap is the fewest frames between the two frames in which an
	// earlier and a later track are compared. Default max(2, n/3): on a
	// turntable a point that leaves the view comes back about a turn
	// later; tracks a few frames apart are the tracker's business.
	MinGap int
	// Stride picks the key frames in which descriptors are computed:
	// frames 0, Stride, 2·Stride, … and the last frame. Default
	// max(1, round(n/36)), about 36 key frames.
	Stride int

	// Features is the most ORB keypoints detected per key frame (OpenCV's
	// nfeatures). Detection is masked to disks of radius MaxPixel around
	// the tracks' positions, so the keypoints land on tracks. Default
	// 10000.
	Features int
	// Levels is the number of ORB pyramid levels (OpenCV's nlevels; scale
	// factor 1.2, patch size and edge threshold 31 px). Default 3.
	Levels int
	// FastThreshold is the FAST threshold of ORB's detector in grey levels
	// (OpenCV's fastThreshold, whose own default is 20). Default 3: the
	// mask already restricts detection to tracked corners, and a low
	// threshold finds the low-contrast ones too.
	FastThreshold int
	// MaxPixel is the farthest, in pixels, an ORB keypoint may lie from a
	// track's position to describe that track (OpenCV 4.6 as bound by
	// gocv computes ORB descriptors only at keypoints it detects itself).
	// Default 3.
	MaxPixel float64
	// Descriptors is the most descriptors a track takes per key frame:
	// those of the keypoints nearest to it within MaxPixel. Two tracks are
	// as far apart as their closest descriptors, so a track described by a
	// neighbouring keypoint in one frame still meets itself. Default 3.
	Descriptors int

	// MaxHamming is the largest Hamming distance, of ORB's 256 bits, of a
	// match. Default 64.
	MaxHamming int
	// Ratio is the ratio test: the best match's distance must be below
	// Ratio times the second best's, on both sides (Lowe, IJCV 2004);
	// matches must also be mutual. Default 0.8.
	Ratio float64

	// Threshold is the largest distance in pixels of a match from the
	// affine fundamental matrix fitted between the two frames for an
	// inlier (as RejectOptions.Threshold). Default 1.5.
	Threshold float64
	// TransferThreshold is the largest distance in pixels between a
	// track's position and the position transferred from the other frame
	// of the pair and a third view (see CloseLoops) for an inlier. Default
	// 1.5: two tracks of one corner begun in different views disagree by
	// one or two pixels; a larger bound lets neighbouring corners in.
	TransferThreshold float64
	// MinParallax is the least parallax, in pixels, a third view must show
	// against its frame to be used for transfer: the RMS of the tracks'
	// depth coordinate over the two frames. Default 1.
	MinParallax float64
	// Iterations caps RANSAC's samples per fit. Default 1000.
	Iterations int
	// Confidence stops RANSAC once this probability of having drawn an
	// all-inlier sample is reached. Default 0.999.
	Confidence float64
	// Seed seeds RANSAC's random generator (deterministic results).
	// Default 1.
	Seed uint64
	// MinInliers is the fewest matches a frame pair must keep through
	// every check to be verified; pairs with fewer matches are not fitted.
	// Default 10.
	MinInliers int
	// MinInlierShare is the smallest share of a frame pair's matches that
	// must be inliers of its affine fundamental matrix. Default 0.5.
	MinInlierShare float64

	// NoGuided turns guided matching off (by default every verified frame
	// pair also links the tracks its transfers put on top of each other).
	NoGuided bool
	// GuidedRadius is the search radius in pixels of guided matching: a
	// track is taken when it is the only eligible one within GuidedRadius
	// of the transferred position and no other lies within twice that.
	// Default 1.5.
	GuidedRadius float64
	// GuidedHamming is the largest Hamming distance of a guided match when
	// both tracks are described. Default 96: the geometry already singles
	// the candidate out, the descriptors only veto gross disagreement.
	GuidedHamming int
	// NoPropagate turns propagation off (by default, once tracks are
	// merged, frame pairs without descriptor matches are verified on the
	// merged tracks and matched guided, for up to three rounds).
	NoPropagate bool
	// MinVotes is the fewest verified frame pairs that must support a link
	// between two tracks before they are merged. Default 1.
	MinVotes int
}

const (
	defaultLoopKeyFrames    = 36
	defaultLoopFeatures     = 10000
	defaultLoopLevels       = 3
	defaultLoopFast         = 3
	defaultLoopMaxPixel     = 3.0
	defaultLoopDescriptors  = 3
	defaultLoopMaxHamming   = 64
	defaultLoopRatio        = 0.8
	defaultLoopThreshold    = 1.5
	defaultLoopTransfer     = 1.5
	defaultLoopParallax     = 1.0
	defaultLoopIterations   = 1000
	defaultLoopConfidence   = 0.999
	defaultLoopSeed         = 1
	defaultLoopMinInliers   = 10
	defaultLoopInlierShare  = 0.5
	defaultLoopMinVotes     = 1
	defaultLoopGuidedHam    = 96
	defaultLoopGuidedRadius = 1.5

	loopDescriptorBytes = 32  // ORB: 256 bits
	loopScaleFactor     = 1.2 // OpenCV's default ORB scale factor
	loopPatchSize       = 31  // OpenCV's default ORB patch size and edge threshold
	loopBasisTracks     = 20  // fewest tracks to fit a third view's basis
)

// Validate reports the first option that breaks its rule, naming the
// field, the value and the rule.
func (o LoopOptions) Validate() error {
	bad := func(v float64) bool { return v < 0 || math.IsNaN(v) || math.IsInf(v, 0) }
	switch {
	case o.MinGap < 0:
		return fmt.Errorf("track: loop MinGap %d is negative (0 = default max(2, frames/3))", o.MinGap)
	case o.Stride < 0:
		return fmt.Errorf("track: loop Stride %d is negative (0 = default about frames/%d)", o.Stride, defaultLoopKeyFrames)
	case o.Features < 0:
		return fmt.Errorf("track: loop Features %d is negative (0 = default %d)", o.Features, defaultLoopFeatures)
	case o.Levels < 0 || o.Levels > 16:
		return fmt.Errorf("track: loop Levels %d must be in 1..16 (0 = default %d)", o.Levels, defaultLoopLevels)
	case o.FastThreshold < 0 || o.FastThreshold > 255:
		return fmt.Errorf("track: loop FastThreshold %d must be in 1..255 grey levels (0 = default %d)", o.FastThreshold, defaultLoopFast)
	case bad(o.MaxPixel):
		return fmt.Errorf("track: loop MaxPixel %g must be a positive number of pixels (0 = default %g)", o.MaxPixel, defaultLoopMaxPixel)
	case o.Descriptors < 0:
		return fmt.Errorf("track: loop Descriptors %d is negative (0 = default %d)", o.Descriptors, defaultLoopDescriptors)
	case o.MaxHamming < 0 || o.MaxHamming > 8*loopDescriptorBytes:
		return fmt.Errorf("track: loop MaxHamming %d must be in 1..%d bits (0 = default %d)", o.MaxHamming, 8*loopDescriptorBytes, defaultLoopMaxHamming)
	case bad(o.Ratio) || o.Ratio > 1:
		return fmt.Errorf("track: loop Ratio %g must be in (0,1] (0 = default %g)", o.Ratio, defaultLoopRatio)
	case bad(o.Threshold):
		return fmt.Errorf("track: loop Threshold %g must be a positive number of pixels (0 = default %g)", o.Threshold, defaultLoopThreshold)
	case bad(o.TransferThreshold):
		return fmt.Errorf("track: loop TransferThreshold %g must be a positive number of pixels (0 = default %g)", o.TransferThreshold, defaultLoopTransfer)
	case bad(o.MinParallax):
		return fmt.Errorf("track: loop MinParallax %g must be a positive number of pixels (0 = default %g)", o.MinParallax, defaultLoopParallax)
	case o.Iterations < 0:
		return fmt.Errorf("track: loop Iterations %d is negative (0 = default %d)", o.Iterations, defaultLoopIterations)
	case bad(o.Confidence) || o.Confidence >= 1:
		return fmt.Errorf("track: loop Confidence %g must be in (0,1) (0 = default %g)", o.Confidence, defaultLoopConfidence)
	case o.MinInliers < 0 || (o.MinInliers > 0 && o.MinInliers < 5):
		return fmt.Errorf("track: loop MinInliers %d must be at least 5 (0 = default %d)", o.MinInliers, defaultLoopMinInliers)
	case bad(o.MinInlierShare) || o.MinInlierShare > 1:
		return fmt.Errorf("track: loop MinInlierShare %g must be in (0,1] (0 = default %g)", o.MinInlierShare, defaultLoopInlierShare)
	case bad(o.GuidedRadius):
		return fmt.Errorf("track: loop GuidedRadius %g must be a positive number of pixels (0 = default %g)", o.GuidedRadius, defaultLoopGuidedRadius)
	case o.GuidedHamming < 0 || o.GuidedHamming > 8*loopDescriptorBytes:
		return fmt.Errorf("track: loop GuidedHamming %d must be in 1..%d bits (0 = default %d)", o.GuidedHamming, 8*loopDescriptorBytes, defaultLoopGuidedHam)
	case o.MinVotes < 0:
		return fmt.Errorf("track: loop MinVotes %d is negative (0 = default %d)", o.MinVotes, defaultLoopMinVotes)
	}
	return nil
}

// WithDefaults returns the options with every zero field replaced by its
// documented default for a sequence of n frames: the settings a run
// actually used.
func (o LoopOptions) WithDefaults(n int) LoopOptions {
	def := func(v *int, d int) {
		if *v == 0 {
			*v = d
		}
	}
	deff := func(v *float64, d float64) {
		if *v == 0 {
			*v = d
		}
	}
	def(&o.MinGap, max(2, n/3))
	def(&o.Stride, max(1, int(math.Round(float64(n)/defaultLoopKeyFrames))))
	def(&o.Features, defaultLoopFeatures)
	def(&o.Levels, defaultLoopLevels)
	def(&o.FastThreshold, defaultLoopFast)
	deff(&o.MaxPixel, defaultLoopMaxPixel)
	def(&o.Descriptors, defaultLoopDescriptors)
	def(&o.MaxHamming, defaultLoopMaxHamming)
	deff(&o.Ratio, defaultLoopRatio)
	deff(&o.Threshold, defaultLoopThreshold)
	deff(&o.TransferThreshold, defaultLoopTransfer)
	deff(&o.MinParallax, defaultLoopParallax)
	def(&o.Iterations, defaultLoopIterations)
	deff(&o.Confidence, defaultLoopConfidence)
	if o.Seed == 0 {
		o.Seed = defaultLoopSeed
	}
	def(&o.MinInliers, defaultLoopMinInliers)
	deff(&o.MinInlierShare, defaultLoopInlierShare)
	def(&o.GuidedHamming, defaultLoopGuidedHam)
	deff(&o.GuidedRadius, defaultLoopGuidedRadius)
	def(&o.MinVotes, defaultLoopMinVotes)
	return o
}

// Reasons CloseLoops rejects a match, a guided candidate or a link (keys
// of LoopReport.Rejected). The strings are stable: they are written into
// reports and JSON.
const (
	// Matches (one count per descriptor match):
	LoopRejectFewMatches  = "few-matches"   // its frame pair had fewer than MinInliers matches and was not fitted
	LoopRejectPairFit     = "pair-fit"      // its frame pair was fitted but not verified
	LoopRejectEpipolar    = "epipolar"      // off the frame pair's affine fundamental matrix
	LoopRejectTransfer    = "transfer"      // off the position transferred through a third view
	LoopRejectNoThirdView = "no-third-view" // neither track seen in a usable third view
	// Guided candidates (one count per candidate pair of tracks):
	LoopRejectAmbiguous  = "guided-ambiguous"  // another track within twice the radius
	LoopRejectDescriptor = "guided-descriptor" // both described, but farther than GuidedHamming
	// Links (one count per distinct pair of tracks):
	LoopRejectVotes        = "few-votes"     // supported by fewer than MinVotes frame pairs
	LoopRejectInconsistent = "inconsistent"  // a verified pair's transfer puts the two tracks apart
	LoopRejectOverlap      = "frame-overlap" // its tracks' groups share a frame
)

// LoopPair is the geometry fitted between two key frames far apart in
// time, From < To, from the descriptor matches between tracks seen in
// From and later tracks seen in To.
type LoopPair struct {
	From, To int // frames
	Matches  int // mutual, ratio-tested descriptor matches
	Inliers  int // matches within Threshold of the affine fundamental matrix
	// F holds (a, b, c, d, e) of a·x' + b·y' + c·x + d·y + e = 0 with
	// a²+b²+c²+d² = 1 (x in From, x' in To), as PairFit.F; RMS is the RMS
	// distance of its inliers in pixels.
	F   [5]float64
	RMS float64
	// Shift is the median image distance, in pixels, between the two
	// positions of the inliers: how far the surface moved in the image
	// between From and To. Frames a whole turn apart have a small Shift.
	Shift float64
	// ThirdFrom and ThirdTo are the third views used for transfer next
	// to From and To (−1 when none).
	ThirdFrom, ThirdTo int
	// Transferred counts the inliers that every transfer covering them
	// kept; TransferRMS is their RMS transfer residual in pixels.
	Transferred int
	TransferRMS float64
	// Guided counts the links guided matching added in this pair.
	Guided int
	// Propagated marks a pair fitted to merged tracks (propagation)
	// rather than to descriptor matches.
	Propagated bool
	Verified   bool // Transferred ≥ MinInliers
}

// LoopLink is a merge CloseLoops made: the later track Later (with its
// group) was joined to the group of the earlier track Earlier.
type LoopLink struct {
	Earlier, Later int // track ids before the merge
	// Into is the id the merged track has in the Set afterwards: that of
	// the earliest track of the final group.
	Into int
	// From and To are the frames of the frame pair whose evidence for the
	// link was best (lowest Hamming distance): Earlier is seen in From,
	// Later in To.
	From, To int
	// Votes counts the verified frame pairs supporting the link, Guided
	// those among them that found it by guided matching only.
	Votes, Guided int
	// Hamming is the smallest Hamming distance between the two tracks'
	// descriptors in a supporting pair; −1 when no pair had both
	// described.
	Hamming int
	// Shift is the image distance in pixels between the two tracks'
	// positions in From and To; Residual the transfer residual in pixels
	// in that pair (the distance between the later position and the one
	// transferred from the earlier, or the reverse).
	Shift, Residual float64
}

// LoopReport says what CloseLoops did.
type LoopReport struct {
	// Used is the options with the defaults filled in.
	Used LoopOptions
	// KeyFrames is the number of frames in which descriptors were
	// computed; Positions the track observations in them; Keypoints the
	// ORB keypoints found near those; Described the observations that
	// received at least one descriptor.
	KeyFrames, Positions, Keypoints, Described int
	// FramePairs is the number of key-frame pairs at least MinGap apart
	// whose descriptors were matched.
	FramePairs int
	// Matches is the number of mutual, ratio-tested descriptor matches
	// over all frame pairs; Verified those that passed every check of a
	// verified frame pair; Guided the further links guided matching made
	// in verified pairs.
	Matches, Verified, Guided int
	// Propagated is the number of links guided matching made in pairs
	// verified on merged tracks (propagation).
	Propagated int
	// Links is the number of distinct (earlier, later) track pairs
	// supported by verified matches or guided matching.
	Links int
	// Merged is the number of tracks merged into an earlier one (their ids
	// no longer exist in the Set; the Set has Merged fewer tracks).
	// MergedPairs lists the links merged as (earlier id, later id), in
	// the order they were merged; Merges gives each one's evidence.
	Merged      int
	MergedPairs [][2]int
	Merges      []LoopLink
	// Rejected counts rejected matches, guided candidates and links by
	// reason (the LoopReject* constants).
	Rejected map[string]int
	// Pairs lists every frame pair that was fitted: first those with at
	// least MinInliers descriptor matches, verified or not, in order of
	// From then To; then the pairs propagation verified, round by round.
	Pairs []LoopPair
	// Closure is the pair verified on descriptor matches with the most
	// transferred matches (zero when none was): the two frames that see the
	// same surface after the return. With the merged tracks it is the
	// data for a closure error: the motion a reconstruction recovers
	// between Closure.From and Closure.To against the motion the merged
	// tracks seen in both frames show (Closure.Shift, Closure.F).
	Closure LoopPair
}

// CloseLoops links tracks of set that are the same surface point seen
// again after a gap, verifies the links geometrically and merges them.
// src must be the sequence set was tracked from (same frame count and
// size); its key frames are read once, in order.
//
// Descriptors: in each key frame (Stride apart) ORB keypoints (Rublee,
// Rabaud, Konolige & Bradski, ICCV 2011, as implemented by OpenCV) are
// detected in disks of radius MaxPixel around the positions of the tracks
// seen there; each track takes the descriptors of its Descriptors nearest
// keypoints.
//
// Matching: for every pair of key frames (i, j) with j − i ≥ MinGap, each
// track seen in i is matched against the tracks seen in j that begin after
// it ends, by Hamming distance (the smallest between their descriptors),
// mutual best matches within MaxHamming passing the ratio test.
//
// Verification: the matches of a frame pair must be consistent with one
// rigid motion of the object between the two frames.
//  1. The affine fundamental matrix (Hartley & Zisserman, Multiple View
//     Geometry, ch. 14) is fitted to the matches by RANSAC and refitted to
//     the inliers, as in Reject; at least MinInlierShare must be inliers.
//     This constrains only the component of a match across the epipolar
//     lines: a wrong match to a neighbouring point along them passes.
//  2. Transfer. Two affine views determine a point's affine structure up
//     to one dependent coordinate, so any third affine view of a rigid
//     object is an affine function of the positions in two others (the
//     linear combination of views, Ullman & Basri, PAMI 1991). The tracks
//     themselves supply the second view: a frame t near i in which the
//     earlier tracks are seen too, with at least MinParallax of parallax.
//     The position in j is fitted as an affine function of the three
//     principal coordinates of (x_i, y_i, x_t, y_t) by RANSAC (samples of
//     four, 2D residual, TransferThreshold) over the epipolar inliers;
//     the same from j and a frame near it back to i. Each side takes the
//     third view whose fit keeps the most inliers. A match passes when a
//     transfer covers it and every transfer covering it agrees.
//
// A pair with at least MinInliers passing matches is verified. Its
// passing matches vote for links (earlier track, later track); guided
// matching (H&Z sec. 11.6) adds a vote for every pair of tracks seen in
// the two frames that the transfers put on top of each other: the later
// track is the only eligible one within GuidedRadius of the position
// transferred from the earlier (or the reverse), none other within twice
// that, every transfer covering the two agrees, and when both are
// described their descriptors are within GuidedHamming.
//
// Merging: a link needs MinVotes votes and must not be contradicted by
// the verified pairs: of the transfers of all verified pairs that cover
// its two tracks, no more may put them farther apart than
// max(TransferThreshold, GuidedRadius) than within it
// (LoopRejectInconsistent). The links are taken in order of votes (then
// Hamming distance); a link joins the groups of its two tracks unless
// they would share a frame. Each group becomes one track: the id and
// colour of its earliest track, all observations in frame order (with
// gaps between the parts). The other ids disappear. The Set's Stats are
// not changed.
//
// Propagation: once tracks are merged, they are correspondences between
// frames that saw the surface from too different directions for the
// descriptors to match. Every key-frame pair at least MinGap apart in
// which 2·MinInliers merged pairs of tracks are seen is verified on them
// as above and matched guided (both tracks described, within MaxHamming);
// the new links are merged the same way, for up to three rounds or until
// a round merges nothing.
//
// Cancelling ctx stops the work and returns ctx's error; set is then
// unchanged.
func CloseLoops(ctx context.Context, src Source, set *Set, opts LoopOptions) (*LoopReport, error) {
	if src == nil || set == nil {
		panic("track: CloseLoops with a nil Source or Set")
	}
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	n := src.Len()
	o := opts.WithDefaults(n)
	rep := &LoopReport{Used: o, Rejected: map[string]int{}}
	if o.Off {
		return rep, nil
	}
	if len(set.Frames) != 0 && len(set.Frames) != n {
		return nil, fmt.Errorf("track: loop closure: the source has %d frames but the tracks refer to %d; give the sequence the tracks came from", n, len(set.Frames))
	}
	if w, h := src.Size(); set.Width != 0 && (w != set.Width || h != set.Height) {
		return nil, fmt.Errorf("track: loop closure: the source's frames are %dx%d but the tracks were made on %dx%d frames; give the sequence the tracks came from", w, h, set.Width, set.Height)
	}
	for k := range set.Tracks {
		if t := &set.Tracks[k]; t.First() < 0 || t.Last() >= n {
			return nil, fmt.Errorf("track: loop closure: track %d has frames %d..%d but the source has frames 0..%d", t.ID, t.First(), t.Last(), n-1)
		}
	}
	if n-1 < o.MinGap || len(set.Tracks) < 2 {
		return rep, nil
	}

	keys := loopKeyFrames(n, o.Stride)
	feats, err := loopDescribe(ctx, src, set, keys, o, rep)
	if err != nil {
		return nil, err
	}
	lp := &loopPairs{set: set, n: n, o: o, bases: map[[2]int]*viewBasis{},
		rng: rand.New(rand.NewPCG(o.Seed, 0x6c6f6f70)),
		ro:  RejectOptions{Threshold: o.Threshold, Iterations: o.Iterations, Confidence: o.Confidence}}

	links := map[[2]int]*loopVotes{} // track indices (earlier, later)
	var verified [][2]*transferModel // transfers of the verified pairs
	vote := func(a, b, from, to, ham int, shift, resid float64, guided bool) {
		key := [2]int{a, b}
		l := links[key]
		if l == nil {
			l = &loopVotes{ham: -1, from: from, to: to, shift: shift, resid: resid}
			links[key] = l
		}
		l.votes++
		if guided {
			l.guided++
		}
		if ham >= 0 && (l.ham < 0 || ham < l.ham) {
			l.ham, l.from, l.to, l.shift, l.resid = ham, from, to, shift, resid
		}
	}
	// Descriptor matching of every pair, in parallel; verification in
	// order (one random generator, deterministic results).
	var pairs [][2]int
	for ki, i := range keys {
		for _, j := range keys[ki+1:] {
			if j-i >= o.MinGap && len(feats[i]) > 0 && len(feats[j]) > 0 {
				pairs = append(pairs, [2]int{i, j})
			}
		}
	}
	matches := make([][]loopMatchPair, len(pairs))
	if err := loopParallel(ctx, len(pairs), func(k int) {
		matches[k] = loopMatch(set, feats[pairs[k][0]], feats[pairs[k][1]], o)
	}); err != nil {
		return nil, err
	}
	for pk, pr := range pairs {
		i, j := pr[0], pr[1]
		fa, fb := feats[i], feats[j]
		rep.FramePairs++
		ms := matches[pk]
		rep.Matches += len(ms)
		if len(ms) < o.MinInliers {
			rep.Rejected[LoopRejectFewMatches] += len(ms)
			continue
		}
		pf, pass := lp.verify(i, j, fa, fb, ms)
		if !pf.Verified {
			rep.Pairs = append(rep.Pairs, pf.LoopPair)
			rep.Rejected[LoopRejectPairFit] += len(ms)
			continue
		}
		rep.Rejected[LoopRejectEpipolar] += len(ms) - pf.Inliers
		rep.Rejected[LoopRejectTransfer] += pf.Inliers - pf.Transferred - pf.uncovered
		rep.Rejected[LoopRejectNoThirdView] += pf.uncovered
		rep.Verified += pf.Transferred
		voted := map[[2]int]bool{}
		for k, m := range ms {
			if !pass[k] {
				continue
			}
			a, b := fa[m.a], fb[m.b]
			voted[[2]int{a.track, b.track}] = true
			vote(a.track, b.track, i, j, m.ham, math.Hypot(b.x-a.x, b.y-a.y), pf.resid[k], false)
		}
		if !o.NoGuided {
			for _, g := range lp.guided(&pf, fa, fb, o.GuidedHamming, false, rep.Rejected) {
				if voted[[2]int{g.a, g.b}] {
					continue
				}
				pf.Guided++
				rep.Guided++
				vote(g.a, g.b, i, j, g.ham, g.shift, g.resid, true)
			}
		}
		rep.Pairs = append(rep.Pairs, pf.LoopPair)
		verified = append(verified, pf.models)
		if pf.Transferred > rep.Closure.Transferred {
			rep.Closure = pf.LoopPair
		}
	}
	rep.Links = len(links)
	g := newLoopGroups(set, n)
	var joined [][2]int
	joined = loopMerge(set, g, links, verified, o, rep, joined)

	// Propagation: the merged tracks are correspondences between frames
	// that share no descriptor matches; verify those pairs on them and
	// match guided there, until a round merges nothing new.
	for round := 0; round < loopRounds && !o.NoPropagate && len(joined) > 0; round++ {
		more := map[[2]int]*loopVotes{}
		for ki, i := range keys {
			for _, j := range keys[ki+1:] {
				if j-i < o.MinGap {
					continue
				}
				if err := ctx.Err(); err != nil {
					return nil, err
				}
				fa, fb, ms := loopGroupMatches(set, g, feats, i, j)
				if len(ms) < 2*o.MinInliers {
					continue
				}
				pf, _ := lp.verify(i, j, fa, fb, ms)
				if !pf.Verified {
					continue
				}
				pf.Propagated = true
				for _, gl := range lp.guided(&pf, fa, fb, o.MaxHamming, true, rep.Rejected) {
					if ra, rb := g.root(gl.a), g.root(gl.b); ra == rb {
						continue
					}
					pf.Guided++
					rep.Propagated++
					key := [2]int{gl.a, gl.b}
					l := more[key]
					if l == nil {
						l = &loopVotes{ham: -1, from: i, to: j, shift: gl.shift, resid: gl.resid}
						more[key] = l
					}
					l.votes++
					l.guided++
					if gl.ham >= 0 && (l.ham < 0 || gl.ham < l.ham) {
						l.ham, l.from, l.to, l.shift, l.resid = gl.ham, i, j, gl.shift, gl.resid
					}
				}
				rep.Pairs = append(rep.Pairs, pf.LoopPair)
				verified = append(verified, pf.models)
			}
		}
		rep.Links += len(more)
		k := len(joined)
		if joined = loopMerge(set, g, more, verified, o, rep, joined); len(joined) == k {
			break
		}
	}

	for k, jn := range joined {
		rep.Merges[k].Into = set.Tracks[g.root(jn[0])].ID
		rep.MergedPairs = append(rep.MergedPairs, [2]int{rep.Merges[k].Earlier, rep.Merges[k].Later})
	}
	rep.Merged = len(joined)
	if rep.Merged > 0 {
		g.apply(set)
	}
	return rep, nil
}

// loopRounds caps the propagation rounds.
const loopRounds = 3

// loopMerge takes the links with at least MinVotes votes that the
// verified transfers do not contradict, in order of votes (then Hamming
// distance), and joins their groups unless they would share a frame. It
// appends the joined links to joined and their evidence to rep.Merges.
func loopMerge(set *Set, g *loopGroups, links map[[2]int]*loopVotes, verified [][2]*transferModel, o LoopOptions, rep *LoopReport, joined [][2]int) [][2]int {
	type cand struct {
		a, b int
		*loopVotes
	}
	var cs []cand
	for k, v := range links {
		if v.votes < o.MinVotes {
			rep.Rejected[LoopRejectVotes]++
			continue
		}
		if !loopConsistent(set, k[0], k[1], verified, math.Max(o.TransferThreshold, o.GuidedRadius)) {
			rep.Rejected[LoopRejectInconsistent]++
			continue
		}
		cs = append(cs, cand{k[0], k[1], v})
	}
	hamKey := func(h int) int {
		if h < 0 {
			return math.MaxInt
		}
		return h
	}
	sort.Slice(cs, func(x, y int) bool {
		a, b := cs[x], cs[y]
		if a.votes != b.votes {
			return a.votes > b.votes
		}
		if ha, hb := hamKey(a.ham), hamKey(b.ham); ha != hb {
			return ha < hb
		}
		if a.a != b.a {
			return a.a < b.a
		}
		return a.b < b.b
	})
	for _, c := range cs {
		switch g.join(c.a, c.b) {
		case joinOverlap:
			rep.Rejected[LoopRejectOverlap]++
			continue
		case joinSame:
			continue
		}
		joined = append(joined, [2]int{c.a, c.b})
		rep.Merges = append(rep.Merges, LoopLink{
			Earlier: set.Tracks[c.a].ID, Later: set.Tracks[c.b].ID,
			From: c.from, To: c.to, Votes: c.votes, Guided: c.guided,
			Hamming: c.ham, Shift: c.shift, Residual: c.resid,
		})
	}
	return joined
}

// loopGroupMatches returns the features of key frames i and j and, as
// matches, every pair of one group's tracks, the earlier seen in i and the
// later in j.
func loopGroupMatches(set *Set, g *loopGroups, feats [][]loopFeature, i, j int) (fa, fb []loopFeature, ms []loopMatchPair) {
	fa, fb = feats[i], feats[j]
	byRoot := map[int][]int{} // group root → its tracks seen in i
	for k := range fa {
		r := g.root(fa[k].track)
		byRoot[r] = append(byRoot[r], k)
	}
	for kb := range fb {
		b := fb[kb].track
		for _, ka := range byRoot[g.root(b)] {
			if a := fa[ka].track; a != b && set.Tracks[a].Last() < set.Tracks[b].First() {
				ms = append(ms, loopMatchPair{a: ka, b: kb, ham: -1})
			}
		}
	}
	sort.Slice(ms, func(x, y int) bool {
		if ms[x].a != ms[y].a {
			return ms[x].a < ms[y].a
		}
		return ms[x].b < ms[y].b
	})
	return fa, fb, ms
}

// loopConsistent reports whether every transfer of every verified pair
// that covers tracks a (earlier) and b (later) puts them within r of each
// other.
func loopConsistent(set *Set, a, b int, verified [][2]*transferModel, r float64) bool {
	ta, tb := &set.Tracks[a], &set.Tracks[b]
	agree, disagree := 0, 0
	for _, ms := range verified {
		for side, m := range ms {
			if m == nil {
				continue
			}
			src, dst := ta, tb
			if side == 1 {
				src, dst = tb, ta
			}
			q, ok := dst.At(m.g)
			if !ok {
				continue
			}
			x, y, ok := m.predict(src)
			if !ok {
				continue
			}
			if math.Hypot(q.X-x, q.Y-y) > r {
				disagree++
			} else {
				agree++
			}
		}
	}
	return disagree <= agree
}

// loopParallel calls fn(0) … fn(n−1) on GOMAXPROCS goroutines and
// returns ctx's error if it was cancelled meanwhile.
func loopParallel(ctx context.Context, n int, fn func(k int)) error {
	var next atomic.Int64
	var wg sync.WaitGroup
	for w := 0; w < min(n, runtime.GOMAXPROCS(0)); w++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for ctx.Err() == nil {
				k := int(next.Add(1)) - 1
				if k >= n {
					return
				}
				fn(k)
			}
		}()
	}
	wg.Wait()
	return ctx.Err()
}

// loopVotes is the evidence for one link.
type loopVotes struct {
	votes, guided int
	ham           int // smallest Hamming distance, −1 when none
	from, to      int
	shift, resid  float64
}

// loopKeyFrames returns 0, stride, 2·stride, … and n−1.
func loopKeyFrames(n, stride int) []int {
	var k []int
	for f := 0; f < n; f += stride {
		k = append(k, f)
	}
	if k[len(k)-1] != n-1 {
		k = append(k, n-1)
	}
	return k
}

// loopFeature is a track's position and descriptors in one key frame.
type loopFeature struct {
	track int // index into set.Tracks
	x, y  float64
	desc  [][4]uint64 // of the nearest keypoints, nearest first
}

// loopDescribe computes the ORB descriptors of the tracks seen in each key
// frame. The result is indexed by frame (nil for frames that are not key
// frames) and holds every track seen there, in track order; desc is nil
// for a track no keypoint describes.
func loopDescribe(ctx context.Context, src Source, set *Set, keys []int, o LoopOptions, rep *LoopReport) ([][]loopFeature, error) {
	n := src.Len()
	w, h := src.Size()
	isKey := make([]bool, n)
	for _, f := range keys {
		isKey[f] = true
	}
	at := make([][]loopFeature, n)
	for k := range set.Tracks {
		for _, ob := range set.Tracks[k].Obs {
			if isKey[ob.Frame] {
				at[ob.Frame] = append(at[ob.Frame], loopFeature{track: k, x: ob.X, y: ob.Y})
			}
		}
	}
	orb := gocv.NewORBWithParams(o.Features, loopScaleFactor, o.Levels, loopPatchSize, 0, 2, gocv.ORBScoreTypeHarris, loopPatchSize, o.FastThreshold)
	defer orb.Close()
	bgr, gray := gocv.NewMat(), gocv.NewMat()
	defer bgr.Close()
	defer gray.Close()
	mask := gocv.NewMatWithSize(h, w, gocv.MatTypeCV8U)
	defer mask.Close()
	mp, err := mask.DataPtrUint8()
	if err != nil {
		panic("track: loop closure mask has no data: " + err.Error())
	}
	r := o.MaxPixel
	ri := int(math.Ceil(r))
	cell := max(8, 2*ri+1)
	gw, gh := (w+cell-1)/cell, (h+cell-1)/cell
	grid := make([][]int32, gw*gh)
	type near struct {
		q int
		d float64
	}
	var nears [][]near
	out := make([][]loopFeature, n)
	for _, f := range keys {
		fs := at[f]
		if len(fs) == 0 {
			continue
		}
		rep.KeyFrames++
		rep.Positions += len(fs)
		if err := src.Read(ctx, f, &bgr); err != nil {
			return nil, err
		}
		gocv.CvtColor(bgr, &gray, gocv.ColorBGRToGray)
		clear(mp)
		for g := range grid {
			grid[g] = grid[g][:0]
		}
		for k, t := range fs {
			cx, cy := int(math.Round(t.x)), int(math.Round(t.y))
			for y := max(0, cy-ri); y <= min(h-1, cy+ri); y++ {
				for x := max(0, cx-ri); x <= min(w-1, cx+ri); x++ {
					if sq(float64(x)-t.x)+sq(float64(y)-t.y) <= sq(r+0.5) {
						mp[y*w+x] = 255
					}
				}
			}
			gx, gy := min(gw-1, max(0, int(t.x)/cell)), min(gh-1, max(0, int(t.y)/cell))
			grid[gy*gw+gx] = append(grid[gy*gw+gx], int32(k))
		}
		out[f] = fs
		kps, desc := orb.DetectAndCompute(gray, mask)
		rep.Keypoints += len(kps)
		if desc.Empty() || desc.Cols() != loopDescriptorBytes || desc.Rows() != len(kps) {
			desc.Close()
			continue
		}
		db, err := desc.DataPtrUint8()
		if err != nil {
			desc.Close()
			panic("track: ORB descriptors have no data: " + err.Error())
		}
		nears = slices.Grow(nears[:0], len(fs))[:len(fs)]
		for k := range nears {
			nears[k] = nears[k][:0]
		}
		for q, kp := range kps {
			gx, gy := int(kp.X)/cell, int(kp.Y)/cell
			for yy := max(0, gy-1); yy <= min(gh-1, gy+1); yy++ {
				for xx := max(0, gx-1); xx <= min(gw-1, gx+1); xx++ {
					for _, k := range grid[yy*gw+xx] {
						if d := math.Hypot(kp.X-fs[k].x, kp.Y-fs[k].y); d <= r {
							nears[k] = append(nears[k], near{q, d})
						}
					}
				}
			}
		}
		for k, ns := range nears {
			if len(ns) == 0 {
				continue
			}
			sort.Slice(ns, func(a, b int) bool { return ns[a].d < ns[b].d })
			ft := &fs[k]
			for _, nq := range ns[:min(len(ns), o.Descriptors)] {
				row := db[nq.q*loopDescriptorBytes : (nq.q+1)*loopDescriptorBytes]
				var d [4]uint64
				for b := range d {
					d[b] = binary.LittleEndian.Uint64(row[8*b:])
				}
				ft.desc = append(ft.desc, d)
			}
			rep.Described++
		}
		desc.Close()
	}
	return out, nil
}

// loopMatchPair is a descriptor match between feature a of the earlier
// frame and feature b of the later frame.
type loopMatchPair struct{ a, b, ham int }

func hamming(a, b *[4]uint64) int {
	return bits.OnesCount64(a[0]^b[0]) + bits.OnesCount64(a[1]^b[1]) + bits.OnesCount64(a[2]^b[2]) + bits.OnesCount64(a[3]^b[3])
}

// minHamming is the smallest Hamming distance between a descriptor of a
// and one of b.
func minHamming(a, b [][4]uint64) int {
	m := math.MaxInt32
	for i := range a {
		for j := range b {
			m = min(m, hamming(&a[i], &b[j]))
		}
	}
	return m
}

// loopMatch matches the described features of fa (earlier frame) to those
// of fb (later frame); a pair is eligible when fa's track ends before fb's
// begins. Kept: mutual
// best matches within MaxHamming that pass the ratio test on both sides.
func loopMatch(set *Set, fa, fb []loopFeature, o LoopOptions) []loopMatchPair {
	const none = math.MaxInt32
	b1a, b2a, bia := make([]int, len(fa)), make([]int, len(fa)), make([]int, len(fa))
	b1b, b2b, bib := make([]int, len(fb)), make([]int, len(fb)), make([]int, len(fb))
	for i := range fa {
		b1a[i], b2a[i], bia[i] = none, none, -1
	}
	first := make([]int, len(fb))
	for j := range fb {
		b1b[j], b2b[j], bib[j] = none, none, -1
		first[j] = set.Tracks[fb[j].track].First()
	}
	for i := range fa {
		last := set.Tracks[fa[i].track].Last()
		da := fa[i].desc
		if da == nil {
			continue
		}
		for j := range fb {
			if first[j] <= last || fb[j].desc == nil {
				continue
			}
			d := minHamming(da, fb[j].desc)
			if d < b1a[i] {
				b2a[i], b1a[i], bia[i] = b1a[i], d, j
			} else if d < b2a[i] {
				b2a[i] = d
			}
			if d < b1b[j] {
				b2b[j], b1b[j], bib[j] = b1b[j], d, i
			} else if d < b2b[j] {
				b2b[j] = d
			}
		}
	}
	var ms []loopMatchPair
	for i, j := range bia {
		if j < 0 || bib[j] != i || b1a[i] > o.MaxHamming {
			continue
		}
		if float64(b1a[i]) >= o.Ratio*float64(b2a[i]) || float64(b1b[j]) >= o.Ratio*float64(b2b[j]) {
			continue
		}
		ms = append(ms, loopMatchPair{a: i, b: j, ham: b1a[i]})
	}
	return ms
}

// loopPairs holds what the frame pairs of one CloseLoops call share.
type loopPairs struct {
	set   *Set
	n     int
	o     LoopOptions
	ro    RejectOptions
	rng   *rand.Rand
	bases map[[2]int]*viewBasis // (frame, third view) → basis; nil = unusable
}

// loopPairFit is a fitted frame pair with per-match results.
type loopPairFit struct {
	LoopPair
	resid     []float64 // per match: largest transfer residual (NaN when none)
	uncovered int       // epipolar inliers that no transfer covers
	models    [2]*transferModel
}

// transferModel predicts the position in frame g of a track seen in
// frames f and t: c·[u; 1] with u = vb.coords(position in f, in t).
type transferModel struct {
	f, g, t int
	vb      *viewBasis
	c       [2][4]float64
}

// predict returns the position in g predicted for tr, if tr is seen in f
// and t.
func (m *transferModel) predict(tr *Track) (x, y float64, ok bool) {
	p, ok1 := tr.At(m.f)
	p3, ok2 := tr.At(m.t)
	if !ok1 || !ok2 {
		return 0, 0, false
	}
	u := m.vb.coords(p.X, p.Y, p3.X, p3.Y)
	return transferAt(&m.c, u)
}

func transferAt(c *[2][4]float64, u [3]float64) (x, y float64, ok bool) {
	x = c[0][0]*u[0] + c[0][1]*u[1] + c[0][2]*u[2] + c[0][3]
	y = c[1][0]*u[0] + c[1][1]*u[1] + c[1][2]*u[2] + c[1][3]
	return x, y, true
}

// transferResidual is the distance of q from the transfer c·[u; 1].
func transferResidual(c *[2][4]float64, u [3]float64, q [2]float64) float64 {
	x, y, _ := transferAt(c, u)
	return math.Hypot(q[0]-x, q[1]-y)
}

// verify fits the geometry of key frames i < j to the matches ms between
// features fa (frame i) and fb (frame j) and reports which matches pass.
func (lp *loopPairs) verify(i, j int, fa, fb []loopFeature, ms []loopMatchPair) (loopPairFit, []bool) {
	set, o := lp.set, lp.o
	pf := loopPairFit{LoopPair: LoopPair{From: i, To: j, Matches: len(ms), ThirdFrom: -1, ThirdTo: -1}}
	pf.resid = make([]float64, len(ms))
	pass := make([]bool, len(ms))
	pts := make([][4]float64, len(ms))
	for k, m := range ms {
		a, b := fa[m.a], fb[m.b]
		pts[k] = [4]float64{b.x, b.y, a.x, a.y}
		pf.resid[k] = math.NaN()
	}
	model, inl := ransacAffineF(pts, lp.ro, lp.rng)
	pf.F = model
	var ss float64
	var shifts []float64
	for k, in := range inl {
		if in {
			pf.Inliers++
			ss += sq(affineFResidual(model, pts[k]))
			shifts = append(shifts, math.Hypot(pts[k][0]-pts[k][2], pts[k][1]-pts[k][3]))
		}
	}
	if pf.Inliers == 0 {
		return pf, pass
	}
	pf.RMS = math.Sqrt(ss / float64(pf.Inliers))
	sort.Float64s(shifts)
	pf.Shift = shifts[len(shifts)/2]
	if pf.Inliers < o.MinInliers || float64(pf.Inliers) < o.MinInlierShare*float64(len(ms)) {
		return pf, pass
	}

	covered := make([]bool, len(ms))
	bad := make([]bool, len(ms))
	var tss float64
	var tn int
	for side := 0; side < 2; side++ {
		// Basis frame f (with a third view) and target frame g.
		f, g := i, j
		ends := func(m loopMatchPair) (src, dst int) { return fa[m.a].track, fb[m.b].track }
		if side == 1 {
			f, g = j, i
			ends = func(m loopMatchPair) (int, int) { return fb[m.b].track, fa[m.a].track }
		}
		var tracks []int
		for k, m := range ms {
			if inl[k] {
				s, _ := ends(m)
				tracks = append(tracks, s)
			}
		}
		// Every usable third view; keep the transfer with the most
		// inliers (then the lowest RMS).
		type fit struct {
			t     int
			vb    *viewBasis
			c     [2][4]float64
			in    []bool
			us    [][3]float64
			qs    [][2]float64
			who   []int
			n     int
			rms   float64
			valid bool
		}
		var best fit
		for _, tv := range lp.thirdViews(tracks, f) {
			cur := fit{t: tv.t, vb: tv.vb}
			for k, m := range ms {
				if !inl[k] {
					continue
				}
				s, d := ends(m)
				p, ok1 := set.Tracks[s].At(f)
				p3, ok2 := set.Tracks[s].At(tv.t)
				q, ok3 := set.Tracks[d].At(g)
				if !ok1 || !ok2 || !ok3 {
					continue
				}
				cur.us = append(cur.us, tv.vb.coords(p.X, p.Y, p3.X, p3.Y))
				cur.qs = append(cur.qs, [2]float64{q.X, q.Y})
				cur.who = append(cur.who, k)
			}
			if len(cur.us) < o.MinInliers {
				continue
			}
			var ok bool
			cur.c, cur.in, ok = ransacTransfer(cur.us, cur.qs, o, lp.rng)
			if !ok {
				continue
			}
			var ss float64
			for q := range cur.us {
				if cur.in[q] {
					cur.n++
					ss += sq(transferResidual(&cur.c, cur.us[q], cur.qs[q]))
				}
			}
			cur.rms = math.Sqrt(ss / float64(max(1, cur.n)))
			cur.valid = true
			if !best.valid || cur.n > best.n || (cur.n == best.n && cur.rms < best.rms) {
				best = cur
			}
		}
		if !best.valid {
			continue
		}
		pf.models[side] = &transferModel{f: f, g: g, t: best.t, vb: best.vb, c: best.c}
		if side == 0 {
			pf.ThirdFrom = best.t
		} else {
			pf.ThirdTo = best.t
		}
		for q, k := range best.who {
			covered[k] = true
			r := transferResidual(&best.c, best.us[q], best.qs[q])
			if !best.in[q] {
				bad[k] = true
			} else {
				tss += r * r
				tn++
			}
			if math.IsNaN(pf.resid[k]) || r > pf.resid[k] {
				pf.resid[k] = r
			}
		}
	}
	for k := range ms {
		switch {
		case !inl[k]:
		case !covered[k]:
			pf.uncovered++
		case !bad[k]:
			pass[k] = true
			pf.Transferred++
		}
	}
	if tn > 0 {
		pf.TransferRMS = math.Sqrt(tss / float64(tn))
	}
	pf.Verified = pf.Transferred >= o.MinInliers
	if !pf.Verified {
		clear(pass)
	}
	return pf, pass
}

// viewBasis maps the positions of a point in two nearby frames, the
// 4-vector (x, y, x3, y3), to three coordinates of its affine structure:
// the components along the three principal directions of all tracks seen
// in both frames. The fourth direction is the normal of the affine
// epipolar hyperplane (H&Z ch. 14), along which two views carry no
// information about the point.
type viewBasis struct {
	mean  [4]float64
	axes  [3][4]float64 // largest principal direction first
	depth float64       // RMS of the third coordinate in pixels: the parallax
	n     int           // tracks the basis was fitted to
}

func (b *viewBasis) coords(x, y, x3, y3 float64) [3]float64 {
	d := [4]float64{x - b.mean[0], y - b.mean[1], x3 - b.mean[2], y3 - b.mean[3]}
	var u [3]float64
	for a := range u {
		u[a] = b.axes[a][0]*d[0] + b.axes[a][1]*d[1] + b.axes[a][2]*d[2] + b.axes[a][3]*d[3]
	}
	return u
}

// fitViewBasis fits the basis of frames f and t to the tracks of set seen
// in both, refitted without those farther than 3·threshold from the
// epipolar hyperplane of the first fit. nil when fewer than minTracks
// tracks are seen in both.
func fitViewBasis(set *Set, f, t int, threshold float64, minTracks int) *viewBasis {
	var ps [][4]float64
	lo, hi := min(f, t), max(f, t)
	for k := range set.Tracks {
		tr := &set.Tracks[k]
		if tr.First() > lo || tr.Last() < hi {
			continue
		}
		a, ok1 := tr.At(f)
		b, ok2 := tr.At(t)
		if ok1 && ok2 {
			ps = append(ps, [4]float64{a.X, a.Y, b.X, b.Y})
		}
	}
	use := make([]bool, len(ps))
	for k := range use {
		use[k] = true
	}
	var vb *viewBasis
	for pass := 0; pass < 2; pass++ {
		c, n, v, vals, ok := centredScatterEigen(ps, use, minTracks)
		if !ok {
			return nil
		}
		vb = &viewBasis{mean: c, n: n, depth: math.Sqrt(math.Max(0, vals[1]) / float64(n))}
		for a := 0; a < 3; a++ {
			for b := 0; b < 4; b++ {
				vb.axes[a][b] = v.At(b, 3-a)
			}
		}
		if pass == 1 {
			break
		}
		for k, p := range ps {
			var r float64
			for b := 0; b < 4; b++ {
				r += v.At(b, 0) * (p[b] - c[b])
			}
			use[k] = math.Abs(r) <= 3*threshold
		}
	}
	return vb
}

// thirdView is a candidate third view t of a frame and its basis.
type thirdView struct {
	t  int
	vb *viewBasis
}

// thirdViews lists the frames t up to MinGap/2 frames from f in which at
// least MinInliers of tracks are seen and whose basis with f shows at
// least MinParallax of parallax.
func (lp *loopPairs) thirdViews(tracks []int, f int) []thirdView {
	set, o := lp.set, lp.o
	var out []thirdView
	for off := 1; off <= max(1, o.MinGap/2); off++ {
		for _, t := range [2]int{f - off, f + off} {
			if t < 0 || t >= lp.n {
				continue
			}
			c := 0
			for _, k := range tracks {
				if _, ok := set.Tracks[k].At(t); ok {
					c++
				}
			}
			if c < o.MinInliers {
				continue
			}
			key := [2]int{f, t}
			vb, seen := lp.bases[key]
			if !seen {
				vb = fitViewBasis(set, f, t, o.Threshold, loopBasisTracks)
				lp.bases[key] = vb
			}
			if vb == nil || vb.depth < o.MinParallax {
				continue
			}
			out = append(out, thirdView{t, vb})
		}
	}
	return out
}

// fitTransfer solves q ≈ c·[u; 1] by least squares over the used
// correspondences (normal equations, 4×4).
func fitTransfer(us [][3]float64, qs [][2]float64, use []bool) ([2][4]float64, bool) {
	var a [4][4]float64
	var bx, by [4]float64
	n := 0
	for k, u := range us {
		if use != nil && !use[k] {
			continue
		}
		n++
		v := [4]float64{u[0], u[1], u[2], 1}
		for r := 0; r < 4; r++ {
			for c := 0; c < 4; c++ {
				a[r][c] += v[r] * v[c]
			}
			bx[r] += v[r] * qs[k][0]
			by[r] += v[r] * qs[k][1]
		}
	}
	var c [2][4]float64
	if n < 4 {
		return c, false
	}
	x, ok1 := solve4(a, bx)
	y, ok2 := solve4(a, by)
	c[0], c[1] = x, y
	return c, ok1 && ok2
}

// ransacTransfer fits the transfer q ≈ c·[u; 1] by RANSAC (minimal
// samples of four, 2D residual below TransferThreshold, adaptive sample
// count as in ransacAffineF), then refits to the inliers twice.
func ransacTransfer(us [][3]float64, qs [][2]float64, o LoopOptions, rng *rand.Rand) ([2][4]float64, []bool, bool) {
	n := len(us)
	var best [2][4]float64
	bestN := -1
	need := o.Iterations
	sel := make([]bool, n)
	count := func(c *[2][4]float64) int {
		k := 0
		for q := range us {
			if transferResidual(c, us[q], qs[q]) < o.TransferThreshold {
				k++
			}
		}
		return k
	}
	for it := 0; it < need && it < o.Iterations; it++ {
		clear(sel)
		for k := 0; k < 4; k++ {
			for {
				s := rng.IntN(n)
				if !sel[s] {
					sel[s] = true
					break
				}
			}
		}
		c, ok := fitTransfer(us, qs, sel)
		if !ok {
			continue
		}
		if cnt := count(&c); cnt > bestN {
			best, bestN = c, cnt
			w := float64(cnt) / float64(n)
			if w >= 1 {
				need = 0
			} else if d := math.Log(1 - math.Pow(w, 4)); d < 0 {
				need = int(math.Ceil(math.Log(1-o.Confidence) / d))
			}
		}
	}
	inl := make([]bool, n)
	if bestN < 4 {
		return best, inl, false
	}
	mark := func(c *[2][4]float64) int {
		k := 0
		for q := range us {
			inl[q] = transferResidual(c, us[q], qs[q]) < o.TransferThreshold
			if inl[q] {
				k++
			}
		}
		return k
	}
	mark(&best)
	for r := 0; r < 2; r++ {
		c, ok := fitTransfer(us, qs, inl)
		if !ok {
			break
		}
		if mark(&c) < 4 {
			mark(&best)
			break
		}
		best = c
	}
	return best, inl, true
}

// solve4 solves the 4×4 system a·x = b by Gaussian elimination with
// partial pivoting; false when a pivot is below 1e-12 of the largest entry.
func solve4(a [4][4]float64, b [4]float64) ([4]float64, bool) {
	var scale float64
	for r := range a {
		for c := range a[r] {
			scale = math.Max(scale, math.Abs(a[r][c]))
		}
	}
	var x [4]float64
	if scale == 0 {
		return x, false
	}
	for c := 0; c < 4; c++ {
		p := c
		for r := c + 1; r < 4; r++ {
			if math.Abs(a[r][c]) > math.Abs(a[p][c]) {
				p = r
			}
		}
		if math.Abs(a[p][c]) < 1e-12*scale {
			return x, false
		}
		a[c], a[p] = a[p], a[c]
		b[c], b[p] = b[p], b[c]
		for r := c + 1; r < 4; r++ {
			f := a[r][c] / a[c][c]
			for k := c; k < 4; k++ {
				a[r][k] -= f * a[c][k]
			}
			b[r] -= f * b[c]
		}
	}
	for c := 3; c >= 0; c-- {
		v := b[c]
		for k := c + 1; k < 4; k++ {
			v -= a[c][k] * x[k]
		}
		x[c] = v / a[c][c]
	}
	return x, true
}

// guidedLink is a link found by guided matching.
type guidedLink struct {
	a, b         int // track indices, a earlier
	ham          int // −1 when not both described
	shift, resid float64
}

// guided finds, with a verified pair's transfers, the pairs (earlier track
// of fa seen in From, later track of fb seen in To, the later beginning
// after the earlier ends) that the transfers put on top of each other:
// the candidate is the only eligible track within TransferThreshold of the
// transferred position (none other within twice that), every transfer
// covering either track agrees, and when both are described their
// descriptors are within maxHam (with needDesc, both must be described).
// Rejected candidates are counted in rej.
func (lp *loopPairs) guided(pf *loopPairFit, fa, fb []loopFeature, maxHam int, needDesc bool, rej map[string]int) []guidedLink {
	set, o := lp.set, lp.o
	r := o.GuidedRadius
	cell := 2 * r
	type grid map[[2]int][]int
	index := func(fs []loopFeature) grid {
		g := grid{}
		for k, f := range fs {
			c := [2]int{int(math.Floor(f.x / cell)), int(math.Floor(f.y / cell))}
			g[c] = append(g[c], k)
		}
		return g
	}
	ga, gb := index(fa), index(fb)
	// nearest returns the feature of fs nearest to (x, y) among those
	// eligible, if it is within r and no other lies within 2r; ambiguous
	// reports a second one within 2r.
	nearest := func(fs []loopFeature, g grid, x, y float64, eligible func(k int) bool) (best int, d float64, ambiguous bool) {
		best, d = -1, math.Inf(1)
		second := math.Inf(1)
		cx, cy := int(math.Floor(x/cell)), int(math.Floor(y/cell))
		for yy := cy - 1; yy <= cy+1; yy++ {
			for xx := cx - 1; xx <= cx+1; xx++ {
				for _, k := range g[[2]int{xx, yy}] {
					if !eligible(fs[k].track) {
						continue
					}
					e := math.Hypot(fs[k].x-x, fs[k].y-y)
					if e < d {
						second, best, d = d, k, e
					} else if e < second {
						second = e
					}
				}
			}
		}
		if d > r {
			return -1, d, false
		}
		if second <= 2*r {
			return -1, d, true
		}
		return best, d, false
	}
	agree := func(m *transferModel, src, dst int) bool {
		if m == nil {
			return true
		}
		x, y, ok := m.predict(&set.Tracks[src])
		if !ok {
			return true
		}
		p, _ := set.Tracks[dst].At(m.g)
		return math.Hypot(p.X-x, p.Y-y) <= r
	}
	seen := map[[2]int]bool{}
	var out []guidedLink
	try := func(ka, kb int, resid float64) {
		a, b := fa[ka].track, fb[kb].track
		key := [2]int{a, b}
		if seen[key] {
			return
		}
		seen[key] = true
		if !agree(pf.models[0], a, b) || !agree(pf.models[1], b, a) {
			return
		}
		ham := -1
		if da, db := fa[ka].desc, fb[kb].desc; da != nil && db != nil {
			if ham = minHamming(da, db); ham > maxHam {
				rej[LoopRejectDescriptor]++
				return
			}
		} else if needDesc {
			rej[LoopRejectDescriptor]++
			return
		}
		out = append(out, guidedLink{a: a, b: b, ham: ham, shift: math.Hypot(fb[kb].x-fa[ka].x, fb[kb].y-fa[ka].y), resid: resid})
	}
	if m := pf.models[0]; m != nil {
		for ka := range fa {
			x, y, ok := m.predict(&set.Tracks[fa[ka].track])
			if !ok {
				continue
			}
			last := set.Tracks[fa[ka].track].Last()
			kb, d, amb := nearest(fb, gb, x, y, func(k int) bool { return set.Tracks[k].First() > last })
			if amb {
				rej[LoopRejectAmbiguous]++
			}
			if kb >= 0 {
				try(ka, kb, d)
			}
		}
	}
	if m := pf.models[1]; m != nil {
		for kb := range fb {
			x, y, ok := m.predict(&set.Tracks[fb[kb].track])
			if !ok {
				continue
			}
			first := set.Tracks[fb[kb].track].First()
			ka, d, amb := nearest(fa, ga, x, y, func(k int) bool { return set.Tracks[k].Last() < first })
			if amb {
				rej[LoopRejectAmbiguous]++
			}
			if ka >= 0 {
				try(ka, kb, d)
			}
		}
	}
	return out
}

// loopGroups is a union–find over the tracks of a Set in which no group
// may see a frame twice; a group's root is its earliest track.
type loopGroups struct {
	parent []int
	frames map[int][]uint64 // root → frame bitset (groups touched so far)
	set    *Set
	words  int
}

// Results of loopGroups.join.
const (
	joinDone    = iota // the two groups are one now
	joinSame           // they were one already
	joinOverlap        // they share a frame; nothing changed
)

func newLoopGroups(set *Set, n int) *loopGroups {
	g := &loopGroups{parent: make([]int, len(set.Tracks)), frames: map[int][]uint64{}, set: set, words: (n + 63) / 64}
	for i := range g.parent {
		g.parent[i] = i
	}
	return g
}

func (g *loopGroups) root(i int) int {
	for g.parent[i] != i {
		g.parent[i] = g.parent[g.parent[i]]
		i = g.parent[i]
	}
	return i
}

func (g *loopGroups) bitset(r int) []uint64 {
	b := g.frames[r]
	if b == nil {
		b = make([]uint64, g.words)
		for _, ob := range g.set.Tracks[r].Obs {
			b[ob.Frame/64] |= 1 << (ob.Frame % 64)
		}
		g.frames[r] = b
	}
	return b
}

// join merges the groups of tracks a and b unless they share a frame.
func (g *loopGroups) join(a, b int) int {
	ra, rb := g.root(a), g.root(b)
	if ra == rb {
		return joinSame
	}
	fa, fb := g.bitset(ra), g.bitset(rb)
	for k := range fa {
		if fa[k]&fb[k] != 0 {
			return joinOverlap
		}
	}
	ta, tb := &g.set.Tracks[ra], &g.set.Tracks[rb]
	if tb.First() < ta.First() || (tb.First() == ta.First() && rb < ra) {
		ra, rb, fa, fb = rb, ra, fb, fa
	}
	for k := range fa {
		fa[k] |= fb[k]
	}
	g.parent[rb] = ra
	delete(g.frames, rb)
	return joinDone
}

// apply rewrites set: each group becomes its root track with all the
// group's observations in frame order; set.Tracks keeps its order.
func (g *loopGroups) apply(set *Set) {
	members := map[int][]int{}
	for i := range set.Tracks {
		if r := g.root(i); r != i {
			members[r] = append(members[r], i)
		}
	}
	kept := make([]Track, 0, len(set.Tracks))
	for i := range set.Tracks {
		if g.root(i) != i {
			continue
		}
		t := set.Tracks[i]
		if ms, ok := members[i]; ok {
			obs := slices.Clone(t.Obs)
			for _, m := range ms {
				obs = append(obs, set.Tracks[m].Obs...)
			}
			sort.Slice(obs, func(x, y int) bool { return obs[x].Frame < obs[y].Frame })
			t.Obs = obs
		}
		kept = append(kept, t)
	}
	set.Tracks = kept
}
