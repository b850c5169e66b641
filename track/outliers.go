package track

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"sort"

	"gonum.org/v1/gonum/mat"
)

// RejectOptions configures the checks run on a whole Set after tracking:
// static background and affine-epipolar outliers. The zero value of every
// field means its default; booleans are phrased so false is the default.
type RejectOptions struct {
	// Off turns both checks off.
	Off bool

	// NoStatic turns the static-background check off.
	NoStatic bool
	// StaticMaxPx: a track whose every observation stays within
	// StaticMaxPx pixels of its first is a static candidate. Default 1.
	StaticMaxPx float64
	// StaticScenePx: a static candidate is removed (DropStatic) when the
	// scene moved at least this far over the track's frames. The scene's
	// motion between consecutive frames is the SceneQuantile quantile of
	// all tracks' displacements; summed over the track's span. Default 10.
	StaticScenePx float64
	// SceneQuantile is the quantile (0..1) of per-frame track
	// displacements taken as the scene's motion. Default 0.75, so that a
	// static background covering up to three quarters of the tracks does
	// not hide the object's motion (the median, 0.5, tolerates up to a
	// half).
	SceneQuantile float64

	// NoOutliers turns the affine-epipolar outlier check off.
	NoOutliers bool
	// Gap is the frame distance of the pairs checked: (0, Gap),
	// (Gap, 2·Gap), …, and a last pair ending at the last frame.
	// Default 5.
	Gap int
	// Threshold is the largest distance, in pixels, of a correspondence
	// from the fitted affine epipolar hyperplane for an inlier. Default 1.5.
	Threshold float64
	// Iterations caps RANSAC's samples per pair. Default 500.
	Iterations int
	// Confidence stops RANSAC once this probability of having drawn an
	// all-inlier sample is reached. Default 0.999.
	Confidence float64
	// Seed seeds RANSAC's random generator (deterministic results).
	// Default 1.
	Seed uint64
	// MinLength removes tracks that outlier cutting leaves with fewer
	// observations. Default 2.
	MinLength int
	// MinTracks is the fewest tracks a pair must share to be checked.
	// Default 8.
	MinTracks int
}

const (
	defaultStaticMaxPx   = 1.0
	defaultStaticScenePx = 10.0
	defaultSceneQuantile = 0.75
	defaultGap           = 5
	defaultThreshold     = 1.5
	defaultIterations    = 500
	defaultConfidence    = 0.999
	defaultSeed          = 1
	defaultMinTracks     = 8
)

func (o RejectOptions) withDefaults() RejectOptions {
	if o.StaticMaxPx == 0 {
		o.StaticMaxPx = defaultStaticMaxPx
	}
	if o.StaticScenePx == 0 {
		o.StaticScenePx = defaultStaticScenePx
	}
	if o.SceneQuantile == 0 {
		o.SceneQuantile = defaultSceneQuantile
	}
	if o.Gap == 0 {
		o.Gap = defaultGap
	}
	if o.Threshold == 0 {
		o.Threshold = defaultThreshold
	}
	if o.Iterations == 0 {
		o.Iterations = defaultIterations
	}
	if o.Confidence == 0 {
		o.Confidence = defaultConfidence
	}
	if o.Seed == 0 {
		o.Seed = defaultSeed
	}
	if o.MinLength == 0 {
		o.MinLength = defaultMinLength
	}
	if o.MinTracks == 0 {
		o.MinTracks = defaultMinTracks
	}
	return o
}

// Validate reports the first option that breaks its rule.
func (o RejectOptions) Validate() error {
	bad := func(v float64) bool { return v < 0 || math.IsNaN(v) || math.IsInf(v, 0) }
	switch {
	case bad(o.StaticMaxPx):
		return fmt.Errorf("track: reject StaticMaxPx %g must be a positive number of pixels (0 = default %g)", o.StaticMaxPx, defaultStaticMaxPx)
	case bad(o.StaticScenePx):
		return fmt.Errorf("track: reject StaticScenePx %g must be a positive number of pixels (0 = default %g)", o.StaticScenePx, defaultStaticScenePx)
	case bad(o.SceneQuantile) || o.SceneQuantile > 1:
		return fmt.Errorf("track: reject SceneQuantile %g must be in (0,1] (0 = default %g)", o.SceneQuantile, defaultSceneQuantile)
	case o.Gap < 0:
		return fmt.Errorf("track: reject Gap %d is negative (0 = default %d)", o.Gap, defaultGap)
	case bad(o.Threshold):
		return fmt.Errorf("track: reject Threshold %g must be a positive number of pixels (0 = default %g)", o.Threshold, defaultThreshold)
	case o.Iterations < 0:
		return fmt.Errorf("track: reject Iterations %d is negative (0 = default %d)", o.Iterations, defaultIterations)
	case bad(o.Confidence) || o.Confidence >= 1:
		return fmt.Errorf("track: reject Confidence %g must be in (0,1) (0 = default %g)", o.Confidence, defaultConfidence)
	case o.MinLength < 0:
		return fmt.Errorf("track: reject MinLength %d is negative (0 = default %d)", o.MinLength, defaultMinLength)
	case o.MinTracks < 0 || (o.MinTracks > 0 && o.MinTracks < 5):
		return fmt.Errorf("track: reject MinTracks %d must be at least 5 (0 = default %d)", o.MinTracks, defaultMinTracks)
	}
	return nil
}

// RejectReport says what Reject did.
type RejectReport struct {
	Static   []int     // ids of tracks removed as static background
	Outliers []int     // ids of tracks cut (or removed) as outliers
	Removed  []int     // ids of outlier tracks left too short and removed
	Pairs    []PairFit // one per frame pair checked for outliers
	// SceneMotion is the scene's displacement between frame f−1 and f
	// (index f; index 0 is 0), the SceneQuantile of track displacements.
	SceneMotion []float64
}

// PairFit is the affine fundamental matrix fitted between two frames.
type PairFit struct {
	From, To int // frames
	Tracks   int // tracks seen in both
	Inliers  int
	// F holds (a, b, c, d, e) of a·x' + b·y' + c·x + d·y + e = 0 with
	// a²+b²+c²+d² = 1 (x in From, x' in To); zero when skipped.
	F       [5]float64
	RMS     float64 // RMS distance of the inliers in pixels
	Skipped bool    // fewer than MinTracks shared tracks
}

// Reject removes static-background tracks and cuts outlier tracks of set
// in place, and reports what it did. It works on any Set (from Track or
// ReadCSV) and does not touch set.Stats.
//
// Static background: a track whose observations all stay within
// StaticMaxPx of its first position while the scene (SceneQuantile of the
// per-frame displacements) moved StaticScenePx or more over the same frames
// is removed.
//
// Outliers: between frames (f, f+Gap) the affine fundamental matrix is
// fitted by RANSAC (Fischler & Bolles 1981) with the affine epipolar
// constraint (Hartley & Zisserman, Multiple View Geometry, 2nd ed.,
// ch. 14.2, eq. 14.1):
//
//	a·x' + b·y' + c·x + d·y + e = 0,
//
// a hyperplane in the joint space (x', y', x, y). Minimal samples are four
// correspondences; the residual is the orthogonal distance to the
// hyperplane with (a, b, c, d) of unit length, the geometric error the
// Gold Standard algorithm minimises (H&Z Algorithm 14.1), and the final
// model is refitted to the inliers by that algorithm (total least squares
// on the centred correspondences). A track that is an outlier in pair
// (f, f+Gap) keeps its observations up to frame f; if that leaves fewer
// than MinLength it is removed.
func Reject(ctx context.Context, set *Set, opts RejectOptions) (*RejectReport, error) {
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	o := opts.withDefaults()
	rep := &RejectReport{}
	nf := len(set.Frames)
	if nf == 0 {
		for _, t := range set.Tracks {
			nf = max(nf, t.Last()+1)
		}
	}
	if o.Off || nf < 2 {
		return rep, nil
	}
	rep.SceneMotion = sceneMotion(set, nf, o.SceneQuantile)
	if !o.NoStatic {
		cum := make([]float64, nf)
		for f := 1; f < nf; f++ {
			cum[f] = cum[f-1] + rep.SceneMotion[f]
		}
		kept := set.Tracks[:0]
		for _, t := range set.Tracks {
			if len(t.Obs) >= 2 && isStatic(&t, o.StaticMaxPx) && cum[t.Last()]-cum[t.First()] >= o.StaticScenePx {
				rep.Static = append(rep.Static, t.ID)
				continue
			}
			kept = append(kept, t)
		}
		clear(set.Tracks[len(kept):])
		set.Tracks = kept
	}
	if o.NoOutliers {
		return rep, nil
	}
	rng := rand.New(rand.NewPCG(o.Seed, 0x7472616b))
	cut := map[int]int{} // track index → last frame kept
	var pairs [][2]int
	gap := min(o.Gap, nf-1)
	for f := 0; f+gap < nf; f += gap {
		pairs = append(pairs, [2]int{f, f + gap})
	}
	if last := pairs[len(pairs)-1][1]; last < nf-1 {
		pairs = append(pairs, [2]int{nf - 1 - gap, nf - 1})
	}
	var pts [][4]float64
	var who []int
	for _, pr := range pairs {
		if err := ctx.Err(); err != nil {
			return nil, err
		}
		pts, who = pts[:0], who[:0]
		for k := range set.Tracks {
			t := &set.Tracks[k]
			a, ok1 := t.At(pr[0])
			b, ok2 := t.At(pr[1])
			if ok1 && ok2 {
				pts = append(pts, [4]float64{b.X, b.Y, a.X, a.Y})
				who = append(who, k)
			}
		}
		fit := PairFit{From: pr[0], To: pr[1], Tracks: len(pts)}
		if len(pts) < o.MinTracks {
			fit.Skipped = true
			rep.Pairs = append(rep.Pairs, fit)
			continue
		}
		model, inl := ransacAffineF(pts, o, rng)
		fit.F = model
		var ss float64
		for i, in := range inl {
			if in {
				fit.Inliers++
				ss += sq(affineFResidual(model, pts[i]))
				continue
			}
			k := who[i]
			if c, ok := cut[k]; !ok || pr[0] < c {
				cut[k] = pr[0]
			}
		}
		if fit.Inliers > 0 {
			fit.RMS = math.Sqrt(ss / float64(fit.Inliers))
		}
		rep.Pairs = append(rep.Pairs, fit)
	}
	if len(cut) == 0 {
		return rep, nil
	}
	kept := set.Tracks[:0]
	for k := range set.Tracks {
		t := set.Tracks[k]
		if c, ok := cut[k]; ok {
			rep.Outliers = append(rep.Outliers, t.ID)
			j := sort.Search(len(t.Obs), func(i int) bool { return t.Obs[i].Frame > c })
			t.Obs = t.Obs[:j:j]
			if len(t.Obs) < o.MinLength {
				rep.Removed = append(rep.Removed, t.ID)
				continue
			}
		}
		kept = append(kept, t)
	}
	clear(set.Tracks[len(kept):])
	set.Tracks = kept
	sort.Ints(rep.Outliers)
	return rep, nil
}

// isStatic reports whether every observation stays within r of the first.
func isStatic(t *Track, r float64) bool {
	x0, y0 := t.Obs[0].X, t.Obs[0].Y
	r2 := r * r
	for _, ob := range t.Obs[1:] {
		if sq(ob.X-x0)+sq(ob.Y-y0) >= r2 {
			return false
		}
	}
	return true
}

// sceneMotion returns, per frame f ≥ 1, the q-quantile of the
// displacements of the tracks seen in both f−1 and f.
func sceneMotion(set *Set, nf int, q float64) []float64 {
	per := make([][]float64, nf)
	for _, t := range set.Tracks {
		for i := 1; i < len(t.Obs); i++ {
			a, b := t.Obs[i-1], t.Obs[i]
			if b.Frame == a.Frame+1 && b.Frame < nf {
				per[b.Frame] = append(per[b.Frame], math.Hypot(b.X-a.X, b.Y-a.Y))
			}
		}
	}
	out := make([]float64, nf)
	for f, d := range per {
		if len(d) == 0 {
			continue
		}
		sort.Float64s(d)
		k := int(math.Ceil(q*float64(len(d)))) - 1
		out[f] = d[max(0, min(len(d)-1, k))]
	}
	return out
}

// affineFResidual is the signed distance of correspondence p = (x', y',
// x, y) to the hyperplane m = (a, b, c, d, e) with |(a,b,c,d)| = 1.
func affineFResidual(m [5]float64, p [4]float64) float64 {
	return m[0]*p[0] + m[1]*p[1] + m[2]*p[2] + m[3]*p[3] + m[4]
}

// ransacAffineF fits the affine fundamental matrix to pts by RANSAC and
// refits it to the inliers (Gold Standard, H&Z Algorithm 14.1).
func ransacAffineF(pts [][4]float64, o RejectOptions, rng *rand.Rand) ([5]float64, []bool) {
	n := len(pts)
	best, bestN := [5]float64{}, -1
	need := o.Iterations
	for it := 0; it < need && it < o.Iterations; it++ {
		var s [4]int
		for k := 0; k < 4; k++ {
		again:
			s[k] = rng.IntN(n)
			for j := 0; j < k; j++ {
				if s[j] == s[k] {
					goto again
				}
			}
		}
		m, ok := hyperplane4(pts[s[0]], pts[s[1]], pts[s[2]], pts[s[3]])
		if !ok {
			continue
		}
		c := 0
		for _, p := range pts {
			if math.Abs(affineFResidual(m, p)) < o.Threshold {
				c++
			}
		}
		if c > bestN {
			best, bestN = m, c
			// Adaptive sample count: N = log(1−p) / log(1−w⁴)
			// (Hartley & Zisserman, eq. 4.18).
			w := float64(c) / float64(n)
			if w >= 1 {
				need = 0
			} else if d := math.Log(1 - math.Pow(w, 4)); d < 0 {
				need = int(math.Ceil(math.Log(1-o.Confidence) / d))
			}
		}
	}
	inl := make([]bool, n)
	if bestN < 0 {
		// Every sample degenerate (for example all tracks identical):
		// nothing can be told apart; keep all.
		for i := range inl {
			inl[i] = true
		}
		return best, inl
	}
	mark := func(m [5]float64) int {
		c := 0
		for i, p := range pts {
			inl[i] = math.Abs(affineFResidual(m, p)) < o.Threshold
			if inl[i] {
				c++
			}
		}
		return c
	}
	mark(best)
	// Refit on the inliers and re-mark, twice (converges in practice).
	for r := 0; r < 2; r++ {
		if m, ok := goldStandardAffineF(pts, inl); ok {
			if mark(m) >= 4 {
				best = m
				continue
			}
			mark(best)
		}
		break
	}
	return best, inl
}

// hyperplane4 is the hyperplane through four points of R⁴: its normal is
// the generalised cross product of the three difference vectors (the
// cofactors of the 3×4 matrix they form).
func hyperplane4(p0, p1, p2, p3 [4]float64) ([5]float64, bool) {
	var d [3][4]float64
	for j := 0; j < 4; j++ {
		d[0][j] = p1[j] - p0[j]
		d[1][j] = p2[j] - p0[j]
		d[2][j] = p3[j] - p0[j]
	}
	det3 := func(c0, c1, c2 int) float64 {
		return d[0][c0]*(d[1][c1]*d[2][c2]-d[1][c2]*d[2][c1]) -
			d[0][c1]*(d[1][c0]*d[2][c2]-d[1][c2]*d[2][c0]) +
			d[0][c2]*(d[1][c0]*d[2][c1]-d[1][c1]*d[2][c0])
	}
	nrm := [4]float64{det3(1, 2, 3), -det3(0, 2, 3), det3(0, 1, 3), -det3(0, 1, 2)}
	l := math.Sqrt(nrm[0]*nrm[0] + nrm[1]*nrm[1] + nrm[2]*nrm[2] + nrm[3]*nrm[3])
	// Scale of the differences: reject nearly dependent samples.
	var sc float64
	for i := 0; i < 3; i++ {
		for j := 0; j < 4; j++ {
			sc = math.Max(sc, math.Abs(d[i][j]))
		}
	}
	if sc == 0 || l < 1e-9*sc*sc*sc {
		return [5]float64{}, false
	}
	var m [5]float64
	for j := 0; j < 4; j++ {
		m[j] = nrm[j] / l
	}
	m[4] = -(m[0]*p0[0] + m[1]*p0[1] + m[2]*p0[2] + m[3]*p0[3])
	return m, true
}

// goldStandardAffineF is H&Z Algorithm 14.1: centre the correspondences
// (x', y', x, y); the normal (a, b, c, d) is the eigenvector of the
// smallest eigenvalue of the 4×4 scatter matrix; e = −N·centroid.
func goldStandardAffineF(pts [][4]float64, use []bool) ([5]float64, bool) {
	c, _, v, _, ok := centredScatterEigen(pts, use, 4)
	if !ok {
		return [5]float64{}, false
	}
	var m [5]float64
	for j := 0; j < 4; j++ {
		m[j] = v.At(j, 0) // ascending eigenvalues: column 0 is the smallest
	}
	m[4] = -(m[0]*c[0] + m[1]*c[1] + m[2]*c[2] + m[3]*c[3])
	return m, true
}

// centredScatterEigen is the eigen-decomposition of the 4×4 scatter matrix
// Σ (p − c)(p − c)ᵀ of the used correspondences about their centroid c:
// the eigenvectors as the columns of v, eigenvalues vals ascending, n the
// number used. ok is false with fewer than minN correspondences or when
// the decomposition fails.
func centredScatterEigen(pts [][4]float64, use []bool, minN int) (c [4]float64, n int, v *mat.Dense, vals []float64, ok bool) {
	for i, p := range pts {
		if use[i] {
			for j := range c {
				c[j] += p[j]
			}
			n++
		}
	}
	if n < minN {
		return c, n, nil, nil, false
	}
	for j := range c {
		c[j] /= float64(n)
	}
	s := mat.NewSymDense(4, nil)
	for i, p := range pts {
		if !use[i] {
			continue
		}
		for a := 0; a < 4; a++ {
			for b := a; b < 4; b++ {
				s.SetSym(a, b, s.At(a, b)+(p[a]-c[a])*(p[b]-c[b]))
			}
		}
	}
	var eig mat.EigenSym
	if !eig.Factorize(s, true) {
		return c, n, nil, nil, false
	}
	v = new(mat.Dense)
	eig.VectorsTo(v)
	return c, n, v, eig.Values(nil), true
}
