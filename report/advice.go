package report

import (
	"fmt"
	"strings"

	"trackfactor/factor"
)

// Advice explains a warning code in plain words: a short title, what it
// means for the result and what to do about it.
type Advice struct {
	Title string // a few words, e.g. "The part looks flat"
	Means string // what it says about the result
	Do    string // what to do
}

// adviceTable holds the explanation of every code the project emits. Codes
// not listed get a generic text (and lower the verdict, see Judge).
func adviceTable() map[string]Advice {
	return map[string]Advice{
		"depth-order-by-convention": {
			"Depth order chosen by convention",
			"The affine model cannot tell which way depth runs; the result shown assumes the camera looks down on the turntable, the usual set-up.",
			"Nothing if the camera looks down on the part; if it looks up, depth is reversed. Give --intrinsics so a perspective refinement decides from the data.",
		},
		"uncertainty-not-computed": {
			"No uncertainties for this many frames",
			"The refinement ran, but the point and angle standard deviations need the inverse of the whole camera system, which is computed only up to a few hundred frames; sigma is absent (and -1 in points.ply with --ply-sigma).",
			"Reconstruct every second or third frame (--step 2 or 3) or a part of the sequence (--end) to get the uncertainties.",
		},
		"input-stopped": {
			"The video stopped early",
			"Frames stopped decoding part way through the video (a damaged or cut file); the result uses only the frames before that point.",
			"If the missing frames matter, copy or export the video again and rerun; otherwise pass --end before the damaged frame to make the choice explicit.",
		},
		"tracking-option-changed": {
			"A tracking option was adjusted",
			"An option could not be used as given on these frames (for example more pyramid levels than a small image has) and was reduced; the result is otherwise normal.",
			"Set the option to the value named in the warning to silence it, or use larger frames.",
		},
		"not-single-axis": {
			"The motion is not a single-axis turn",
			"The camera rotations stray from one common axis, so the turntable angles are only approximate.",
			"Check that the part sat firmly on the table and did not wobble or slide; without a turntable, ignore the turntable numbers.",
		},
		"uneven-steps": {
			"The turntable steps are uneven",
			"At least one step between frames differs from the expected one by more than a quarter: a missed or doubled frame, or a slipping table.",
			"Look at the turntable-angle plot for the odd step; recapture if the table slipped, or drop the odd frame.",
		},
		"camera-moved": {
			"The camera seems to have moved",
			"The camera translations do not fit one fixed camera looking at a turning part.",
			"Check that the camera and the turntable were fixed during the capture.",
		},
		"refinement-unusable": {
			"The refinement did not give a usable result",
			"Bundle adjustment ended without a usable result, so the factorization is reported instead; it is less accurate.",
			"Check the tracks for outliers (see the per-track residuals) and that the camera model fits the set-up.",
		},
		"turntable-fit-failed": {
			"No turntable axis could be fitted",
			"The rotations did not allow a single-axis fit; the camera rotations are reported as they are.",
			"Check that the capture is a turntable sequence with enough rotation.",
		},
		factor.WarnPlanar: {
			"The points lie nearly in one plane",
			"Depth cannot be told apart from noise, so the 3D shape and the camera rotations are not reliable.",
			"Film a part with depth relief, add features that stick out of the plane, or check that the part really turned.",
		},
		factor.WarnLittleRotation: {
			"The part turned too little",
			"The views are so alike that depth is barely constrained.",
			"Capture a wider arc (at least 10° of turn), or use more frames of the sequence (--start, --end, --step).",
		},
		factor.WarnTooFew: {
			"Too few measurements",
			"There are barely more measurements than unknowns, so nothing checks the fit.",
			"Track more corners (--corners, lower --quality) or use more frames.",
		},
		factor.WarnMetricFallback: {
			"The metric upgrade needed a fallback",
			"The rotations may be slightly distorted (sheared or stretched).",
			"Look for outlier tracks in the frames below and check that the camera model fits the set-up (a long lens for the orthographic model).",
		},
		factor.WarnMetricFailed: {
			"The metric upgrade failed",
			"The shape is only known up to an affine distortion; angles and proportions are wrong.",
			"Remove outliers (keep the track checks on), capture more rotation, or try another camera model (--model).",
		},
		factor.WarnHighResidual: {
			"The residual is high",
			"The tracks do not fit the camera model as well as the noise allows: either the model is wrong for the set-up or bad tracks remain.",
			"Try a perspective model for a close camera, mask the background (--mask, --roi), or look at the per-track residuals below for outliers.",
		},
		factor.WarnMirror: {
			"Depth may be mirrored",
			"Affine camera models cannot tell the shape from its mirror image; this is a known limit of the model, not a fault of the capture.",
			"If the handedness matters, use a perspective model or refinement, or check one known feature by eye.",
		},
		factor.WarnIncompleteDropped: {
			"Some tracks or frames were left out",
			"The model needs tracks seen in every frame, so it used the largest block of frames and tracks that are complete.",
			"Nothing, if the frames used cover enough rotation; otherwise use a model that handles incomplete tracks or a shorter, steadier sequence.",
		},
		factor.WarnOutliersRejected: {
			"Outlier tracks were removed",
			"A few tracks did not move rigidly with the rest (reflections, background, slipping features) and were left out.",
			"Nothing; they are shown crossed out in the frames below. Many of them point to background or reflections: mask those areas.",
		},
		factor.WarnDefaultIntrinsics: {
			"Assumed camera intrinsics",
			"No focal length or principal point was given, so defaults were used; depth scale and perspective may be off.",
			"Give the camera's calibration (--intrinsics).",
		},
		factor.WarnNotConverged: {
			"A solver did not converge",
			"An iterative stage stopped before reaching its tolerance; the result may be inaccurate.",
			"Raise the iteration limit, or check that the camera model fits the set-up.",
		},
		factor.WarnWeakPerspective: {
			"Perspective cues are weak",
			"The camera is far from the part, so the perspective model adds little and depth order and distances are poorly determined.",
			"Use an affine model (orthographic), which is adequate here.",
		},
		factor.WarnDisconnectedViews: {
			"The views fall apart into groups",
			"Groups of frames share too few tracks to be tied into one reconstruction.",
			"Use frames closer together (smaller --step) or track more corners so that neighbouring frames share tracks.",
		},
		factor.WarnFramesUnrecovered: {
			"Some frames could not be placed",
			"Too few tracks tie those frames to the rest; they have no camera in the result.",
			"Use frames closer together or track more corners; the message names the frames.",
		},
		factor.WarnOptimumUnverified: {
			"The solution may be a local minimum",
			"Restarts of the solver never reached the same optimum twice.",
			"Try more restarts, more tracks, or a complete block of frames.",
		},
	}
}

// Explain returns the plain-language explanation of a warning code; an
// unknown code gets a generic one that names it.
func Explain(code string) Advice {
	if a, ok := adviceTable()[code]; ok {
		return a
	}
	return Advice{
		Title: fmt.Sprintf("Warning %q", code),
		Means: "This build of the report does not know this warning; it is treated as lowering the verdict.",
		Do:    "Read the message beside it, and update trackfactor if it is newer than this report.",
	}
}

// KnownCodes returns the codes Explain has a specific text for.
func KnownCodes() []string {
	t := adviceTable()
	out := make([]string, 0, len(t))
	for k := range t {
		out = append(out, k)
	}
	return out
}

func plural(n int, one, many string) string {
	if n == 1 {
		return fmt.Sprintf("%d %s", n, one)
	}
	return fmt.Sprintf("%d %s", n, many)
}

// sentence capitalises the first letter of s and ends it with a full stop.
func sentence(s string) string {
	s = strings.TrimSpace(s)
	if s == "" {
		return s
	}
	s = strings.ToUpper(s[:1]) + s[1:]
	if !strings.HasSuffix(s, ".") {
		s += "."
	}
	return s
}
