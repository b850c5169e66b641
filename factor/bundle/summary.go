package bundle

import (
	"fmt"
	"math"
	"strings"
	"time"

	"trackfactor/factor"
)

// Termination says why the Levenberg–Marquardt iterations stopped. The
// strings are stable (they go into reports and JSON).
type Termination string

const (
	// FunctionToleranceReached: an accepted step lowered the cost by less
	// than FunctionTolerance × cost.
	FunctionToleranceReached Termination = "function-tolerance"
	// ParameterToleranceReached: the step became shorter than
	// ParameterTolerance·(|x| + ParameterTolerance).
	ParameterToleranceReached Termination = "parameter-tolerance"
	// GradientToleranceReached: the largest gradient component fell below
	// GradientTolerance × its initial value.
	GradientToleranceReached Termination = "gradient-tolerance"
	// IterationLimit: MaxIterations ran out before any tolerance was met.
	IterationLimit Termination = "iteration-limit"
	// NoProgress: the damping grew to its bound (1e32) without any step
	// lowering the cost; the start was kept or the last good iterate.
	NoProgress Termination = "no-progress"
	// Cancelled: the context ended; the best iterate so far is returned
	// with the context's error.
	Cancelled Termination = "cancelled"
)

// Converged reports whether the termination is one of the tolerances.
func (t Termination) Converged() bool {
	return t == FunctionToleranceReached || t == ParameterToleranceReached || t == GradientToleranceReached
}

// Iteration is the record of one Levenberg–Marquardt iteration.
type Iteration struct {
	Iteration int // 1-based
	// Cost after the iteration (the new cost if the step was accepted,
	// the old one otherwise), ½·Σρ, px².
	Cost float64
	// CostChange is old − new cost of the tried step (negative: it rose).
	CostChange float64
	// GradientMax is the largest gradient component at the linearisation.
	GradientMax float64
	// CGIterations of the conjugate-gradient solve of this step (0 for
	// the dense solvers).
	CGIterations int
	// StepNorm is |δ|; Damping the λ the step was solved with; Ratio the
	// actual over the predicted cost decrease.
	StepNorm, Damping, Ratio float64
	Accepted                 bool
	// Duration of this iteration; Elapsed since the start of Adjust.
	Duration, Elapsed time.Duration
}

// Timing splits the run time by phase.
type Timing struct {
	Linearize      time.Duration // Jacobians, normal equations and the Schur complement
	Factorize      time.Duration // Cholesky of the reduced (or full) system, or its conjugate-gradient solve
	BackSubstitute time.Duration // point updates from the camera step
	Evaluate       time.Duration // cost of trial points
	Uncertainty    time.Duration // covariance
	Total          time.Duration
}

// Summary reports one bundle adjustment like a solver's summary.
type Summary struct {
	Model  factor.Model
	Motion string // "free" or "single-axis"
	Loss   Loss
	// LossScale, px.
	LossScale float64
	Solver    Solver
	// LinearSolver is how the step was solved: LinearDenseCholesky or
	// LinearPCG for Schur (see Options.IterativeAbove),
	// LinearFullCholesky for Dense. CGIterations is the total of the
	// conjugate-gradient iterations over all steps.
	LinearSolver string
	CGIterations int
	// ThreadsGiven is Options.Threads as given (0: default), ThreadsUsed
	// what ran.
	ThreadsGiven, ThreadsUsed int

	Cameras int // cameras in the problem
	// Points refined; SkippedPoints kept as they were (fewer than
	// MinViews observations, or no column in the measurements).
	Points, SkippedPoints int
	// Observations (2D) used; Residuals n = 2·Observations; Parameters d
	// the free parameters after the gauge.
	Observations, Residuals, Parameters int
	// Gauge describes the parameters held to fix the similarity (or
	// rigid) ambiguity; GaugeTrack is the reference point's track id.
	Gauge      string
	GaugeTrack int

	// Costs are ½·Σρ(|r|²), px²; RMS values per image coordinate over the
	// observations used, px (unweighted).
	InitialCost, FinalCost float64
	InitialRMS, FinalRMS   float64
	// NoiseSigma is σ̂ = FinalRMS/√(1 − d/n), the noise level the final
	// residual implies (Hartley and Zisserman, MVG 2nd ed., §5.1.3).
	NoiseSigma float64

	Iterations                     int
	SuccessfulSteps, RejectedSteps int
	Termination                    Termination
	Message                        string
	Records                        []Iteration

	// Focal (Fx) and K1 before and after, when refined (else equal).
	InitialFocal, FinalFocal float64
	InitialK1, FinalK1       float64

	Timing Timing
}

// Usable is the single "can I use this" answer: the iterations met a
// tolerance, or hit the iteration limit after lowering the cost, and the
// final residual is finite.
func (s *Summary) Usable() bool {
	if math.IsNaN(s.FinalCost) || math.IsInf(s.FinalCost, 0) {
		return false
	}
	return s.Termination.Converged() || (s.Termination == IterationLimit && s.FinalCost < s.InitialCost) || (s.Termination == NoProgress && s.Iterations > 0 && s.SuccessfulSteps > 0)
}

// Brief returns a one-line summary.
func (s *Summary) Brief() string {
	return fmt.Sprintf("bundle %s/%s: %d cameras, %d points, %d obs; cost %.6g → %.6g, RMS %.3f → %.3f px; %d iterations (%d accepted), %s, %s",
		s.Model, s.Motion, s.Cameras, s.Points, s.Observations, s.InitialCost, s.FinalCost, s.InitialRMS, s.FinalRMS,
		s.Iterations, s.SuccessfulSteps, s.Termination, s.Timing.Total.Round(time.Millisecond))
}

// Report returns the full multi-line report.
func (s *Summary) Report() string {
	var b strings.Builder
	w := func(format string, a ...any) { fmt.Fprintf(&b, format, a...) }
	w("Bundle adjustment\n")
	w("  model %s, motion %s, loss %s (scale %.3g px), solver %s (%s), threads %d given / %d used\n",
		s.Model, s.Motion, s.Loss, s.LossScale, s.Solver, s.LinearSolver, s.ThreadsGiven, s.ThreadsUsed)
	w("  problem: %d cameras, %d points (%d skipped), %d observations, n = %d residuals, d = %d parameters\n",
		s.Cameras, s.Points, s.SkippedPoints, s.Observations, s.Residuals, s.Parameters)
	w("  gauge: %s\n", s.Gauge)
	w("\n  %-26s %14s %14s\n", "", "initial", "final")
	w("  %-26s %14.6g %14.6g\n", "cost ½Σρ (px²)", s.InitialCost, s.FinalCost)
	w("  %-26s %14.4f %14.4f\n", "RMS per coordinate (px)", s.InitialRMS, s.FinalRMS)
	if s.InitialFocal != s.FinalFocal {
		w("  %-26s %14.4f %14.4f\n", "focal length fx (px)", s.InitialFocal, s.FinalFocal)
	}
	if s.InitialK1 != s.FinalK1 {
		w("  %-26s %14.6g %14.6g\n", "k1", s.InitialK1, s.FinalK1)
	}
	w("  noise level implied σ̂ = RMS/√(1 − d/n): %.4f px\n", s.NoiseSigma)
	w("\n  iter %14s %11s %10s %10s %10s %7s %9s\n", "cost", "change", "|grad|∞", "|step|", "damping", "ratio", "time")
	for _, r := range s.Records {
		mark := " "
		if !r.Accepted {
			mark = "x"
		}
		w("  %3d%s %14.6g %11.3g %10.3g %10.3g %10.3g %7.3f %9s\n", r.Iteration, mark, r.Cost, r.CostChange, r.GradientMax, r.StepNorm, r.Damping, r.Ratio, r.Duration.Round(time.Microsecond))
	}
	w("  (x: step rejected)\n\n")
	w("  iterations %d (%d accepted, %d rejected)\n", s.Iterations, s.SuccessfulSteps, s.RejectedSteps)
	if s.LinearSolver == LinearPCG {
		w("  conjugate-gradient iterations: %d in all, %.1f per step\n", s.CGIterations, float64(s.CGIterations)/float64(max(1, s.Iterations)))
	}
	w("  termination: %s — %s\n", s.Termination, s.Message)
	t := s.Timing
	w("  time: linearize %s, factorize %s, back-substitute %s, evaluate %s, uncertainty %s, total %s\n",
		t.Linearize.Round(time.Millisecond), t.Factorize.Round(time.Millisecond), t.BackSubstitute.Round(time.Millisecond),
		t.Evaluate.Round(time.Millisecond), t.Uncertainty.Round(time.Millisecond), t.Total.Round(time.Millisecond))
	if s.Usable() {
		w("  usable: yes\n")
	} else {
		w("  usable: no\n")
	}
	return b.String()
}
