package main

import (
	"fmt"
	"io"
	"sort"
	"strings"

	"github.com/urfave/cli/v2"

	"trackfactor/factor"
	"trackfactor/pipeline"
)

// runOptions are the flags of `trackfactor run`.
type runOptions struct {
	common  commonFlags
	trackF  trackFlags
	factorF factorFlags
	out     outFlags
}

func runCommand() *cli.Command {
	o := &runOptions{}
	flags := append(o.common.flags(), o.trackF.flags()...)
	flags = append(flags, o.factorF.flags()...)
	flags = append(flags, o.out.flags()...)
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

func (o *runOptions) config(c *cli.Context, input string) (pipeline.Config, error) {
	cfg := pipeline.Config{
		Input:    input,
		Out:      o.out.dir,
		Force:    o.out.force,
		PLYASCII: o.out.plyASCII,
		Producer: producer(c),
		Progress: o.common.progress(c.App.ErrWriter),
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
	fmt.Fprintf(w, "rotation    views span %.1f°; rank gap σ3/σ4 = %.3g\n", d.RotationSpreadDeg, d.RankGap)
	verdict := "good"
	for _, wn := range d.Warnings {
		if !factor.Informational(wn.Code) {
			verdict = "usable with warnings"
		}
	}
	fmt.Fprintf(w, "verdict     %s\n", verdict)
	for _, wn := range d.Warnings {
		fmt.Fprintf(w, "warning     [%s] %s\n", wn.Code, wn.Message)
	}
	if out != "" {
		fmt.Fprintf(w, "written     %s: %s\n", out, strings.Join(res.Files, ", "))
	}
}
