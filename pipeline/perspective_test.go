package pipeline

import (
	"context"
	"path/filepath"
	"testing"

	"trackfactor/eval"
	"trackfactor/factor"
	"trackfactor/track/synth"
)

// Issue 4: on a rendered close-range perspective turntable sequence (the
// synthetic pinhole camera at about twice the part's size from it), the
// perspective model with the renderer's intrinsics recovers the structure
// with at least 5× smaller error than the orthographic model. Ground truth
// is the renderer's geometry; the error is the similarity-aligned RMS of
// package eval.
func TestPerspectiveBeatsOrthographic(t *testing.T) {
	if testing.Short() {
		t.Skip("renders and tracks a sequence; runs in the full suite")
	}
	scene, dir := renderScene(t, synth.Options{Frames: 24, StepDeg: 1.5, Projection: synth.Pinhole, NoiseSigma: 1, Seed: 5})
	fx, fy, cx, cy := scene.Intrinsics()
	in := &factor.Intrinsics{Fx: fx, Fy: fy, Cx: cx, Cy: cy}
	score := func(model factor.Model, intr *factor.Intrinsics) eval.Report {
		res, err := Run(context.Background(), Config{Input: dir, Out: filepath.Join(t.TempDir(), string(model)),
			Factor: factor.Options{Model: model, Intrinsics: intr}})
		if err != nil {
			t.Fatalf("%s: %v", model, err)
		}
		rep, err := eval.Score(res.Rec, firstSeen(res.Set), scene)
		if err != nil {
			t.Fatal(err)
		}
		t.Logf("%-20s rotation median %.3f° max %.3f°, structure %.3f %% of diagonal, RMS %.3f px, %d points",
			model, rep.Rotation.MedianDeg, rep.Rotation.MaxDeg, rep.StructurePct, res.Rec.Diagnostics.RMS, rep.Points)
		return rep
	}
	ortho := score(factor.Orthographic, nil)
	persp := score(factor.Perspective, in)
	score(factor.Paraperspective, in)
	if persp.StructurePct*5 > ortho.StructurePct {
		t.Errorf("perspective structure error %.3f %% is not 5× below orthographic %.3f %%", persp.StructurePct, ortho.StructurePct)
	}
}
