package main

import (
	"github.com/urfave/cli/v2"

	"trackfactor/pipeline"
)

func refineCommand() *cli.Command {
	var common commonFlags
	var ff factorFlags
	var rf refineFlags
	var of outFlags
	flags := append(common.flags(), ff.flags()...)
	flags = append(flags, rf.flags()...)
	flags = append(flags, of.flags()...)
	return &cli.Command{
		Name:      "refine",
		Usage:     "refine an earlier result (bundle adjustment, turntable, scale) into a new output folder",
		ArgsUsage: "RESULT_FOLDER",
		Description: "Reads RESULT_FOLDER/reconstruction.json and tracks.csv (as written by run or\n" +
			"factor), refines them and writes a complete result into -o. Give --intrinsics\n" +
			"again for a perspective result or to let a perspective refinement decide the\n" +
			"depth order of an affine one.\n\n" +
			"Example: trackfactor refine --turntable --pixel-size 0.02 -o out/part42-mm out/part42",
		Flags: flags,
		Action: func(c *cli.Context) error {
			if err := rejectFlagsAfterArgs(c, 1); err != nil {
				return err
			}
			if err := of.validate(); err != nil {
				return err
			}
			ff.model = "orthographic" // the model comes from the result; only the intrinsics are used
			fo, err := ff.options()
			if err != nil {
				return err
			}
			rc, err := rf.config()
			if err != nil {
				return err
			}
			cfg := pipeline.Config{Factor: fo, Refine: rc, Out: of.dir, Force: of.force, PLYASCII: of.plyASCII, PLYSigma: of.plySigma,
				Timing: of.timing, Producer: producer(c), Progress: common.progress(c.App.ErrWriter),
				Settings: map[string]any{"config": configOf(c).asSettings(), "refined_from": c.Args().First()}}
			res, err := pipeline.RefineExisting(c.Context, c.Args().First(), cfg)
			if err != nil {
				return err
			}
			if !common.quiet {
				printSummary(c.App.Writer, res, cfg.Out)
			}
			return nil
		},
	}
}
