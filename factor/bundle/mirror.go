package bundle

import (
	"context"
	"fmt"
	"math"

	"trackfactor/factor"
	"trackfactor/factor/rotation"
)

// MirrorChoice is the outcome of ResolveMirror. The strings are stable.
type MirrorChoice string

const (
	// MirrorAsGiven: the depth order of the input fits clearly better.
	MirrorAsGiven MirrorChoice = "as-given"
	// MirrorFlipped: the mirrored depth order fits clearly better.
	MirrorFlipped MirrorChoice = "mirrored"
	// MirrorAmbiguous: the two fit within Options.MirrorRatio of each
	// other; the data do not tell them apart.
	MirrorAmbiguous MirrorChoice = "ambiguous"
)

// Mirror reports ResolveMirror.
type Mirror struct {
	Choice MirrorChoice
	// CostRatio is the worse final cost over the better one (≥ 1; +Inf
	// when one start could not be refined); Threshold the MirrorRatio
	// it was compared with.
	CostRatio, Threshold float64
	// AsGiven and Mirrored are the two perspective refinements (either may
	// be nil when its start failed; AsGivenErr and MirroredErr say why).
	AsGiven, Mirrored       *Result
	AsGivenErr, MirroredErr error
	// Best is the refinement with the lower final cost, to be used even
	// when the choice is ambiguous; its Diagnostics.MirrorAmbiguous tells
	// which (and a WarnMirror warning is added when ambiguous).
	Best    *Result
	Message string
}

// Mirrored returns the mirror image of an affine reconstruction: the
// structure reflected in the viewing direction k of camera 0,
// X' = H·X with H = I − 2·k·kᵀ, and each camera's image axes reflected
// likewise, R' = [R₀·H; R₁·H; (R₀·H) × (R₁·H)], which is again a proper
// rotation. Since R'ᵢ·X' = Rᵢ·H·H·X = Rᵢ·X for the two image rows, every
// affine projection is unchanged — the depth-reversal ambiguity of affine
// cameras (Tomasi and Kanade 1992; Hartley and Zisserman, MVG 2nd ed.,
// §18.2 on the affine reconstruction ambiguity). Translations, scales and
// everything else are copied.
func Mirrored(rec *factor.Reconstruction) *factor.Reconstruction {
	if len(rec.Cameras) == 0 {
		panic("bundle: Mirrored: no cameras")
	}
	out := *rec
	k := rec.Cameras[0].R[2]
	H := rotation.Identity()
	for a := 0; a < 3; a++ {
		for b := 0; b < 3; b++ {
			H[a][b] -= 2 * k[a] * k[b]
		}
	}
	out.Cameras = append([]factor.Camera(nil), rec.Cameras...)
	for i := range out.Cameras {
		R := out.Cameras[i].R
		r0 := rotation.Apply(H, R[0]) // (R₀·H)ᵀ = H·R₀ᵀ, H symmetric
		r1 := rotation.Apply(H, R[1])
		out.Cameras[i].R = [3][3]float64{r0, r1, rotation.Cross(r0, r1)}
	}
	out.Points = append([]factor.Point(nil), rec.Points...)
	for i := range out.Points {
		out.Points[i].X = rotation.Apply(H, out.Points[i].X)
	}
	return &out
}

// ResolveMirror refines an affine reconstruction (orthographic, scaled
// orthographic or paraperspective) with the perspective model from both
// depth orders — as given and Mirrored — and compares the final costs.
// Intrinsics come from opts.Intrinsics or the reconstruction. The
// perspective start of each camera keeps its image of the world origin and
// its scale there (T_z = Fx/Scale). The order is decided when the worse
// cost exceeds the better by the factor Options.MirrorRatio, otherwise it
// is ambiguous. The other options apply to both refinements (Model is
// forced to Perspective).
func ResolveMirror(ctx context.Context, m *factor.Measurements, rec *factor.Reconstruction, opts Options) (*Mirror, error) {
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	switch rec.Model {
	case factor.Orthographic, factor.ScaledOrthographic, factor.Paraperspective:
	default:
		return nil, fmt.Errorf("bundle: mirror resolution needs an affine reconstruction (orthographic, scaled-orthographic or paraperspective), not %q", rec.Model)
	}
	if opts.Intrinsics == nil && rec.Intrinsics == nil {
		return nil, fmt.Errorf("bundle: mirror resolution refines with the perspective model and needs intrinsics; give Options.Intrinsics")
	}
	o := opts
	o.Model = factor.Perspective
	thr := opts.WithDefaults().MirrorRatio
	out := &Mirror{Threshold: thr}
	out.AsGiven, out.AsGivenErr = Adjust(ctx, m, rec, o)
	if err := ctx.Err(); err != nil {
		return nil, fmt.Errorf("bundle: mirror resolution stopped: %w", err)
	}
	out.Mirrored, out.MirroredErr = Adjust(ctx, m, Mirrored(rec), o)
	if err := ctx.Err(); err != nil {
		return nil, fmt.Errorf("bundle: mirror resolution stopped: %w", err)
	}
	a, b := out.AsGiven, out.Mirrored
	switch {
	case a == nil && b == nil:
		return nil, fmt.Errorf("bundle: mirror resolution: neither depth order could be refined (as given: %v; mirrored: %v)", out.AsGivenErr, out.MirroredErr)
	case b == nil:
		out.Best, out.Choice, out.CostRatio = a, MirrorAsGiven, math.Inf(1)
		out.Message = fmt.Sprintf("the mirrored start could not be refined (%v); the depth order as given is kept", out.MirroredErr)
	case a == nil:
		out.Best, out.Choice, out.CostRatio = b, MirrorFlipped, math.Inf(1)
		out.Message = fmt.Sprintf("the start as given could not be refined (%v); the mirrored depth order is kept", out.AsGivenErr)
	default:
		ca, cb := a.Summary.FinalCost, b.Summary.FinalCost
		lo, hi := ca, cb
		out.Best, out.Choice = a, MirrorAsGiven
		if cb < ca {
			lo, hi = cb, ca
			out.Best, out.Choice = b, MirrorFlipped
		}
		out.CostRatio = hi / lo
		same := sameHandedness(a.Reconstruction, b.Reconstruction)
		if !(out.CostRatio >= thr) && !same {
			out.Choice = MirrorAmbiguous
		}
		switch {
		case same:
			out.Message = fmt.Sprintf("both starts converged to the same depth order (final costs %.6g as given, %.6g mirrored): the %s one is kept", ca, cb, out.Choice)
		case out.Choice == MirrorAmbiguous:
			out.Message = fmt.Sprintf("both depth orders fit alike (final costs %.6g as given, %.6g mirrored, ratio %.4f < %.3g): the perspective cues are too weak to tell them apart", ca, cb, out.CostRatio, thr)
		default:
			out.Message = fmt.Sprintf("the %s depth order wins: final costs %.6g as given, %.6g mirrored, ratio %.4g ≥ %.3g", out.Choice, ca, cb, out.CostRatio, thr)
		}
	}
	d := &out.Best.Reconstruction.Diagnostics
	d.MirrorAmbiguous = out.Choice == MirrorAmbiguous
	if d.MirrorAmbiguous {
		d.Warn(factor.WarnMirror, "perspective refinement could not resolve the mirror ambiguity: "+out.Message)
	}
	return out, nil
}

// sameHandedness reports whether two reconstructions of the same tracks
// have the same depth order: the orthogonal factor of the best
// alignment of b's points to a's (the polar factor of their cross-
// covariance; Umeyama, IEEE PAMI 13(4), 1991) is a rotation, not a
// reflection. Fewer than four shared refined points, or a degenerate
// spread, give false.
func sameHandedness(a, b *factor.Reconstruction) bool {
	pos := map[int][3]float64{}
	for _, p := range a.Points {
		if p.Views >= 2 {
			pos[p.Track] = p.X
		}
	}
	var A, B [][3]float64
	for _, p := range b.Points {
		if x, ok := pos[p.Track]; ok && p.Views >= 2 {
			A = append(A, x)
			B = append(B, p.X)
		}
	}
	if len(A) < 4 {
		return false
	}
	var ma, mb [3]float64
	for i := range A {
		ma, mb = rotation.Add(ma, A[i]), rotation.Add(mb, B[i])
	}
	ma, mb = rotation.Scale(1/float64(len(A)), ma), rotation.Scale(1/float64(len(A)), mb)
	var C [3][3]float64
	for i := range A {
		x, y := rotation.Sub(A[i], ma), rotation.Sub(B[i], mb)
		for r := 0; r < 3; r++ {
			for c := 0; c < 3; c++ {
				C[r][c] += x[r] * y[c]
			}
		}
	}
	// The orthogonal polar factor U·Vᵀ of C = U·Σ·Vᵀ has det U·det V =
	// sign(det C): a rotation iff det C > 0. A nearly singular C (a flat
	// or collinear structure) decides nothing.
	n := 0.0
	for r := 0; r < 3; r++ {
		n += rotation.Dot(C[r], C[r])
	}
	d := rotation.Det(C)
	return d > 1e-6*math.Pow(n, 1.5)
}
