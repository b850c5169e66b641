package pipeline

import (
	"context"
	"path/filepath"
	"testing"

	"trackfactor/eval"
	"trackfactor/factor"
	"trackfactor/track/synth"
)

// Issue 5's acceptance case: a rendered full turn (72 frames, 5° per
// frame, orthographic camera), where no point is seen in every frame.
// Every frame must be recovered, the median relative-rotation error be
// ≤ 0.3° and the largest ≤ 1°, the structure RMS ≤ 1 % of the bounding-box
// diagonal. Ground truth is the renderer's geometry, the scores are those
// of package eval.
func TestFullTurnIncomplete(t *testing.T) {
	if testing.Short() {
		t.Skip("renders 72 frames; runs in the full suite")
	}
	scene, dir := renderScene(t, synth.Options{Frames: 72, StepDeg: 5, NoiseSigma: 1, Seed: 7})
	res, err := Run(context.Background(), Config{Input: dir, Out: filepath.Join(t.TempDir(), "out")})
	if err != nil {
		t.Fatal(err)
	}
	rep, err := eval.Score(res.Rec, firstSeen(res.Set), scene)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("%d cameras, %d points; rotation median %.3f° max %.3f°; structure %.3f %% of diagonal; RMS %.3f px",
		len(res.Rec.Cameras), len(res.Rec.Points), rep.Rotation.MedianDeg, rep.Rotation.MaxDeg, rep.StructurePct, res.Rec.Diagnostics.RMS)
	if res.Missing == nil {
		t.Fatal("the missing-data solver did not run on a full turn")
	}
	if len(res.Rec.Cameras) != 72 {
		t.Errorf("%d of 72 frames recovered", len(res.Rec.Cameras))
	}
	if rep.Rotation.MedianDeg > 0.3 || rep.Rotation.MaxDeg > 1 {
		t.Errorf("rotation error median %.3f° (≤ 0.3°), max %.3f° (≤ 1°)", rep.Rotation.MedianDeg, rep.Rotation.MaxDeg)
	}
	if rep.StructurePct > 1 {
		t.Errorf("structure RMS %.3f %% of the diagonal > 1 %%", rep.StructurePct)
	}
	if tt := res.Refinement.Turntable; tt != nil {
		t.Logf("turntable: mean step %.4f° ± %.4f°, closure %s %.3f°", tt.MeanStepDeg, tt.StepStdDeg, tt.Closure.Kind, tt.Closure.ErrorDeg)
	}
	t.Logf("timing %v", res.Timing)
	for _, w := range res.Rec.Diagnostics.Warnings {
		t.Logf("warning %s: %s", w.Code, w.Message)
	}
	t.Logf("runs %d verified %v", len(res.Missing.Runs), res.Missing.Verified)
	if res.Loop == nil || res.Loop.Merged == 0 {
		t.Error("loop closure merged no track on a full turn")
	} else {
		t.Logf("loop closure: %d tracks merged", res.Loop.Merged)
	}
	// Issue 5: with loop closure the rotation after a full turn returns to
	// the start within 0.5° (the turntable fit's closure error: the step
	// from the last frame back to the first against the mean step).
	if tt := res.Refinement.Turntable; tt == nil || tt.Closure.ErrorDeg > 0.5 {
		t.Errorf("closure error over 0.5° or no turntable fit: %+v", tt)
	}
	_ = factor.Orthographic
}
