package main

import (
	"fmt"
	"io"
	"math"
	"sort"
	"strings"

	"github.com/urfave/cli/v2"

	"trackfactor/pipeline"
	"trackfactor/report"
)

// runOptions are the flags of `trackfactor run`.
type runOptions struct {
	common  commonFlags
	trackF  trackFlags
	factorF factorFlags
	refineF refineFlags
	out     outFlags
}

func runCommand() *cli.Command {
	o := &runOptions{}
	flags := o.flags()
	return &cli.Command{
		Name:      "run",
		Usage:     "track, reconstruct and write results for one capture",
		ArgsUsage: "FRAMES",
		Description: "FRAMES is a folder of images (PNG, JPEG, TIFF, BMP; sorted by name with\n" +
			"numbers in natural order) or a video file. Writes reconstruction.json,\n" +
			"points.ply, cameras.ply and tracks.csv into the -o folder.\n\n" +
			"Example: trackfactor run -o out/part42 captures/part42",
		Flags: flags,
		Action: func(c *cli.Context) error {
			if err := rejectFlagsAfterArgs(c, 1); err != nil {
				return err
			}
			if err := o.out.validate(); err != nil {
				return err
			}
			cfg, err := o.config(c, c.Args().First())
			if err != nil {
				return err
			}
			res, err := pipeline.Run(c.Context, cfg)
			if err != nil {
				return err
			}
			if !o.common.quiet {
				printSummary(c.App.Writer, res, cfg.Out)
			}
			return nil
		},
	}
}

// flags are every flag group of a reconstruction run, shared by run, demo
// and batch so the three accept the same settings.
func (o *runOptions) flags() []cli.Flag {
	var flags []cli.Flag
	for _, g := range [][]cli.Flag{o.common.flags(), o.trackF.flags(), o.factorF.flags(), o.refineF.flags(), o.out.flags()} {
		flags = append(flags, g...)
	}
	return flags
}

func (o *runOptions) config(c *cli.Context, input string) (pipeline.Config, error) {
	cfg := pipeline.Config{
		Input:     input,
		Out:       o.out.dir,
		Force:     o.out.force,
		PLYASCII:  o.out.plyASCII,
		PLYSigma:  o.out.plySigma,
		Timing:    o.out.timing,
		MaxMemory: o.out.maxBytes,
		Producer:  producer(c),
		Progress:  o.common.progress(c.App.ErrWriter),
		// Where the flag values came from (config.go).
		Settings: map[string]any{"config": configOf(c).asSettings()},
	}
	var err error
	if cfg.Range, err = o.trackF.rangeOf(); err != nil {
		return cfg, err
	}
	if cfg.Track, err = o.trackF.options(); err != nil {
		return cfg, err
	}
	if cfg.Factor, err = o.factorF.options(); err != nil {
		return cfg, err
	}
	if cfg.Refine, err = o.refineF.config(); err != nil {
		return cfg, err
	}
	if cfg.PLYSigma && cfg.Refine.Off {
		return cfg, usagef("--ply-sigma writes the refinement's point uncertainties, but --refine=false skips the refinement; drop one of the two")
	}
	if cfg.MaskFile, cfg.ROI, err = o.trackF.maskSpec(); err != nil {
		return cfg, err
	}
	return cfg, nil
}

// printSummary prints the short human summary of a run.
func printSummary(w io.Writer, res *pipeline.Result, out string) {
	set, rec := res.Set, res.Rec
	d := rec.Diagnostics
	fmt.Fprintf(w, "frames      %d used of %d (%d×%d px)\n", res.Window.Frames(), len(set.Frames), set.Width, set.Height)
	dropped := res.Doc.Diagnostics.Tracks.DroppedByReason
	var parts []string
	keys := make([]string, 0, len(dropped))
	for k := range dropped {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	for _, k := range keys {
		if dropped[k] > 0 {
			parts = append(parts, fmt.Sprintf("%s %d", k, dropped[k]))
		}
	}
	drop := "none"
	if len(parts) > 0 {
		drop = strings.Join(parts, ", ")
	}
	fmt.Fprintf(w, "tracks      %d kept of %d detected corners; ended or left out: %s\n", len(res.Window.Tracks), set.Stats.Detected, drop)
	fmt.Fprintf(w, "model       %s\n", rec.Model)
	fmt.Fprintf(w, "residual    %.3f px RMS (expected from noise %.3f px; noise σ ≈ %.3f px)\n", d.RMS, d.ExpectedRMS, d.NoiseSigma)
	if d.RankGap > 0 || d.RotationSpreadDeg > 0 {
		fmt.Fprintf(w, "rotation    views span %.1f°; rank gap σ3/σ4 = %.3g\n", d.RotationSpreadDeg, d.RankGap)
	}
	if r := res.Refinement; r != nil {
		switch {
		case r.Summary != nil:
			s := r.Summary
			fmt.Fprintf(w, "refinement  %s bundle adjustment: RMS %.3f → %.3f px in %d iterations (%s)\n", s.Motion, s.InitialRMS, s.FinalRMS, s.Iterations, s.Termination)
		case r.Skipped != "":
			fmt.Fprintf(w, "refinement  skipped: %s\n", r.Skipped)
		}
		if m := r.Mirror; m != nil {
			fmt.Fprintf(w, "depth order %s (cost ratio %.3g)\n", m.Choice, m.CostRatio)
		}
		if t := r.Turntable; t != nil {
			fmt.Fprintf(w, "turntable   step %.3f° ± %.3f° over %d frames (span %.2f°), camera elevation %.2f°, off-axis %.3f° RMS", math.Abs(t.MeanStepDeg), t.StepStdDeg, len(t.AnglesDeg), math.Abs(t.SpanDeg), t.ElevationDeg, t.OffAxisRMSDeg)
			if t.Closure.Kind != "none" && t.Closure.Kind != "" {
				fmt.Fprintf(w, "; closure %s %.3f°", t.Closure.Kind, t.Closure.ErrorDeg)
			}
			fmt.Fprintln(w)
		}
		if r.Scale != nil {
			fmt.Fprintf(w, "units       %s (scale factor %.6g", r.Units, r.Scale.Factor)
			if r.Scale.RelativeSigma > 0 {
				fmt.Fprintf(w, " ± %.2g %%", 100*r.Scale.RelativeSigma)
			}
			fmt.Fprintln(w, ")")
		}
	}
	// The same rule as the HTML report (report.Judge).
	fmt.Fprintf(w, "verdict     %s\n", report.Judge(res.Doc).Verdict)
	for _, wn := range d.Warnings {
		fmt.Fprintf(w, "warning     [%s] %s\n", wn.Code, wn.Message)
	}
	if out != "" {
		fmt.Fprintf(w, "written     %s: %s\n", out, strings.Join(res.Files, ", "))
	}
}
