package factor

import (
	"context"
	"fmt"
	"math"
	"sort"

	"gonum.org/v1/gonum/mat"
)

// RejectOptions configure FactorizeRejecting. The zero value gives the
// documented defaults.
type RejectOptions struct {
	// Off turns rejection off: FactorizeRejecting is then Factorize.
	Off bool
	// K is the rejection threshold in robust standard deviations: a point
	// is rejected when its RMS residual exceeds median + K·1.4826·MAD of
	// all points' RMS residuals (1.4826·MAD estimates the standard
	// deviation of a normal sample; Rousseeuw and Croux, JASA 1993).
	// Default 4.
	K float64
	// FloorPx: points with an RMS residual below FloorPx are never
	// rejected, however tight the distribution. Default 0.03 px.
	FloorPx float64
	// MaxShare is the largest share of the points that may be rejected
	// in all. Default 0.2.
	MaxShare float64
	// Rounds bounds the reject-and-refit rounds. Default 3.
	Rounds int
}

func (o RejectOptions) withDefaults() RejectOptions {
	if o.K == 0 {
		o.K = 4
	}
	if o.FloorPx == 0 {
		o.FloorPx = 0.03
	}
	if o.MaxShare == 0 {
		o.MaxShare = 0.2
	}
	if o.Rounds == 0 {
		o.Rounds = 3
	}
	return o
}

// WithDefaults returns the options with defaults filled in.
func (o RejectOptions) WithDefaults() RejectOptions { return o.withDefaults() }

// TrackRejection says which points FactorizeRejecting rejected.
type TrackRejection struct {
	Rounds   int   // refits done after the first fit
	Rejected []int // track ids (Measurements.Tracks, or column indices) rejected
	// Thresholds are the per-round rejection thresholds, px.
	Thresholds []float64
}

// FactorizeRejecting factorizes, then rejects points whose RMS residual is an
// outlier among all points' residuals and refits, for a few rounds. Tracks
// that slide along an occluding contour or jump between features do not
// move rigidly with the part: their residuals stand out from the rest,
// and dropping them keeps them from bending the rigid fit. A point is
// judged by its own residual only after the fit, so this is a remedy for
// a few bad tracks, not for a majority.
func FactorizeRejecting(ctx context.Context, m *Measurements, opts Options, ro RejectOptions) (*Reconstruction, TrackRejection, error) {
	return RejectTracks(ctx, m, ro, func(ctx context.Context, m *Measurements) (*Reconstruction, error) {
		return Factorize(ctx, m, opts)
	})
}

// FitFunc is a factorization of measurements, for RejectTracks.
type FitFunc func(ctx context.Context, m *Measurements) (*Reconstruction, error)

// RejectTracks runs fit, rejects the points whose RMS residual is an
// outlier (see FactorizeRejecting) and refits, for any factorization —
// complete or incomplete data.
func RejectTracks(ctx context.Context, m *Measurements, ro RejectOptions, fit FitFunc) (*Reconstruction, TrackRejection, error) {
	ro = ro.withDefaults()
	var rep TrackRejection
	rec, err := fit(ctx, m)
	if err != nil || ro.Off {
		return rec, rep, err
	}
	_, np0 := m.Dims()
	cur := m
	for round := 0; round < ro.Rounds; round++ {
		// Judge every point by its residual scaled to what noise alone
		// would leave: a point seen in v views has 2v coordinates and 3
		// parameters, so E[RMS²] = σ²(1 − 3/(2v)) (Hartley & Zisserman,
		// the ML residual result, applied per point with cameras fixed).
		byID := make(map[int]float64, len(rec.Points))
		var norm []float64
		for _, p := range rec.Points {
			v := math.Max(float64(p.Views), 2)
			r := p.RMS / math.Sqrt(1-3/(2*v))
			byID[p.Track] = r
			norm = append(norm, r)
		}
		if len(norm) < MinPoints {
			break
		}
		thr := math.Max(robustThreshold(norm, ro.K), ro.FloorPx)
		_, np := cur.Dims()
		var keep []int
		for j := 0; j < np; j++ {
			id := j
			if cur.Tracks != nil {
				id = cur.Tracks[j]
			}
			if r, ok := byID[id]; !ok || r <= thr {
				keep = append(keep, j)
			}
		}
		if len(keep) == np {
			break
		}
		if np0-len(keep) > int(ro.MaxShare*float64(np0)) || len(keep) < MinPoints {
			break
		}
		rep.Thresholds = append(rep.Thresholds, thr)
		next := selectColumns(cur, keep)
		rec2, err := fit(ctx, next)
		if err != nil {
			// Keep the last good fit rather than fail after rejection.
			break
		}
		for j := 0; j < np; j++ {
			if !contains(keep, j) {
				id := j
				if cur.Tracks != nil {
					id = cur.Tracks[j]
				}
				rep.Rejected = append(rep.Rejected, id)
			}
		}
		rep.Rounds++
		rec, cur = rec2, next
	}
	sort.Ints(rep.Rejected)
	if n := len(rep.Rejected); n > 0 {
		rec.Diagnostics.Warn(WarnOutliersRejected, fmt.Sprintf("%d of %d tracks did not move rigidly with the rest (residual above %.3f px) and were left out", n, np0, rep.Thresholds[len(rep.Thresholds)-1]))
	}
	return rec, rep, nil
}

// WarnOutliersRejected: FactorizeRejecting left tracks out.
const WarnOutliersRejected = "outlier-tracks-rejected"

func contains(s []int, v int) bool {
	i := sort.SearchInts(s, v)
	return i < len(s) && s[i] == v
}

// robustThreshold is median + k·1.4826·MAD.
func robustThreshold(v []float64, k float64) float64 {
	s := append([]float64(nil), v...)
	sort.Float64s(s)
	med := s[len(s)/2]
	dev := make([]float64, len(s))
	for i, x := range s {
		dev[i] = math.Abs(x - med)
	}
	sort.Float64s(dev)
	return med + k*1.4826*dev[len(dev)/2]
}

// selectColumns keeps the listed columns (sorted) of the measurements.
func selectColumns(m *Measurements, cols []int) *Measurements {
	nf, np := m.Dims()
	W := mat.NewDense(2*nf, len(cols), nil)
	out := &Measurements{W: W, Frames: m.Frames}
	if m.Tracks != nil {
		out.Tracks = make([]int, len(cols))
	}
	if m.Mask != nil {
		out.Mask = make([]bool, nf*len(cols))
	}
	for k, j := range cols {
		for r := 0; r < 2*nf; r++ {
			W.Set(r, k, m.W.At(r, j))
		}
		if m.Tracks != nil {
			out.Tracks[k] = m.Tracks[j]
		}
		if m.Mask != nil {
			for f := 0; f < nf; f++ {
				out.Mask[f*len(cols)+k] = m.Mask[f*np+j]
			}
		}
	}
	return out
}
