package report

import (
	"math"

	"trackfactor/export"
	"trackfactor/factor"
)

// Verdict is the one-word answer of a report: can the result be used?
type Verdict string

// The three verdicts, from best to worst.
const (
	Good     Verdict = "good"
	Warnings Verdict = "usable with warnings"
	Failed   Verdict = "failed"
)

// Minimum sizes below which a document is judged failed: the smallest
// problem the factorization accepts (factor.MinFrames frames,
// factor.MinPoints points).
const (
	minCameras = factor.MinFrames
	minPoints  = factor.MinPoints
)

// Judgement is a verdict with its reasons.
type Judgement struct {
	Verdict Verdict
	// Reasons say in plain words why the verdict is what it is, one line
	// each; empty for Good.
	Reasons []string
	// Lowering are the warnings that lowered the verdict; Info are the
	// informational ones (shown, but without effect on the verdict).
	Lowering, Info []export.Warning
}

// Judge computes the verdict of a reconstruction (the rule of the package
// documentation):
//
//   - Failed when the document has fewer than 3 cameras or 4 points, a
//     residual that is not a finite number, or any warning whose code is in
//     the severe list (planar-scene, little-rotation, metric-upgrade-failed,
//     too-few-measurements, disconnected-views);
//   - otherwise Warnings when any warning is not informational — every
//     code that factor.Informational does not list, unknown codes included;
//   - otherwise Good.
//
// Informational codes (mirror-ambiguity, incomplete-tracks-dropped,
// outlier-tracks-rejected) never lower the verdict by themselves.
func Judge(doc *export.Document) Judgement {
	var j Judgement
	if doc == nil {
		return Judgement{Verdict: Failed, Reasons: []string{"there is no reconstruction"}}
	}
	failed := false
	if n := len(doc.Cameras); n < minCameras {
		failed = true
		j.Reasons = append(j.Reasons, plural(n, "camera was", "cameras were")+" recovered; at least 3 are needed")
	}
	if n := len(doc.Points); n < minPoints {
		failed = true
		j.Reasons = append(j.Reasons, plural(n, "point was", "points were")+" recovered; at least 4 are needed")
	}
	if r := doc.Diagnostics.RMSPx; math.IsNaN(r) || math.IsInf(r, 0) {
		failed = true
		j.Reasons = append(j.Reasons, "the residual is not a number: the solve broke down")
	}
	for _, w := range doc.Diagnostics.Warnings {
		switch {
		case factor.Informational(w.Code):
			j.Info = append(j.Info, w)
		case Severe(w.Code):
			failed = true
			j.Lowering = append(j.Lowering, w)
			j.Reasons = append(j.Reasons, Explain(w.Code).Title)
		default:
			j.Lowering = append(j.Lowering, w)
			j.Reasons = append(j.Reasons, Explain(w.Code).Title)
		}
	}
	switch {
	case failed:
		j.Verdict = Failed
	case len(j.Lowering) > 0:
		j.Verdict = Warnings
	default:
		j.Verdict = Good
	}
	return j
}

// Severe reports whether a warning code alone makes the verdict Failed:
// the depth or the rotations are undetermined, so the shape cannot be
// trusted at all.
func Severe(code string) bool {
	switch code {
	case factor.WarnPlanar, // no depth relief: depth and rotations unreliable
		factor.WarnLittleRotation,    // too little rotation to constrain depth
		factor.WarnMetricFailed,      // no metric shape
		factor.WarnTooFew,            // no redundancy: nothing checks the fit
		factor.WarnDisconnectedViews: // the views do not form one reconstruction
		return true
	}
	return false
}
