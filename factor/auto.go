package factor

import (
	"context"
	"fmt"
	"math"
)

// factorAuto fits every model the inputs allow — orthographic, scaled
// orthographic and paraperspective always (paraperspective with the
// default intrinsics and the WarnDefaultIntrinsics warning when none are
// given), perspective when Options.Intrinsics is set — and keeps the one
// with the lowest geometric AIC (Kanatani, "Geometric information
// criterion for model selection", IJCV 26(3), 1998):
//
//	G-AIC = J + 2 d σ̂²,
//
// J the residual sum of squares (px²), d the model's number of free
// parameters (Diagnostics.Parameters) and σ̂² the noise variance, the same
// for all candidates: Options.NoiseSigma² when given, else the smallest
// unbiased estimate J_c/(n − d_c) among the candidates (the best-fitting
// model's, as the criterion requires the noise of a model that fits).
// Every candidate's RMS and score are in Diagnostics.Candidates.
func factorAuto(ctx context.Context, m *Measurements, opts Options) (*Reconstruction, error) {
	models := []Model{Orthographic, ScaledOrthographic, Paraperspective}
	if opts.Intrinsics != nil {
		models = append(models, Perspective)
	}
	recs := make([]*Reconstruction, len(models))
	cands := make([]Candidate, len(models))
	var firstErr error
	s2 := math.Inf(1)
	for i, model := range models {
		if err := checkCtx(ctx); err != nil {
			return nil, err
		}
		o := opts
		o.Model = model
		o.Progress = nil
		if opts.Progress != nil {
			o.Progress = func(stage string, done, total int) {
				opts.Progress(string(model)+" "+stage, done, total)
			}
		}
		var rec *Reconstruction
		var err error
		if model == Perspective {
			rec, err = factorPerspective(ctx, m, o)
		} else {
			rec, err = factorAffine(ctx, m, o, model)
		}
		cands[i] = Candidate{Model: model, Score: math.Inf(1)}
		if err != nil {
			cands[i].Err = err.Error()
			if firstErr == nil {
				firstErr = err
			}
			continue
		}
		d := &rec.Diagnostics
		recs[i] = rec
		cands[i].RMS, cands[i].Parameters = d.RMS, d.Parameters
		if d.Measurements > d.Parameters {
			s2 = math.Min(s2, d.RMS*d.RMS*float64(d.Measurements)/float64(d.Measurements-d.Parameters))
		}
	}
	if opts.NoiseSigma > 0 {
		s2 = opts.NoiseSigma * opts.NoiseSigma
	}
	if math.IsInf(s2, 1) {
		s2 = 0
	}
	best := -1
	for i, rec := range recs {
		if rec == nil {
			continue
		}
		d := &rec.Diagnostics
		J := d.RMS * d.RMS * float64(d.Measurements)
		cands[i].Score = J + 2*float64(d.Parameters)*s2
		if best < 0 || cands[i].Score < cands[best].Score {
			best = i
		}
	}
	if best < 0 {
		return nil, fmt.Errorf("factor: no model could be fitted (model %q): %w", Auto, firstErr)
	}
	rec := recs[best]
	rec.Diagnostics.Candidates = cands
	return rec, nil
}
