package main

import (
	"github.com/urfave/cli/v2"

	"trackfactor/pipeline"
)

func factorCommand() *cli.Command {
	var common commonFlags
	var ff factorFlags
	var of outFlags
	var width, height int
	flags := append(common.flags(), ff.flags()...)
	flags = append(flags, of.flags()...)
	flags = append(flags,
		&cli.IntFlag{Name: "width", Usage: "image width, px, to check coordinates against (0 = unknown)", Destination: &width},
		&cli.IntFlag{Name: "height", Usage: "image height, px, to check coordinates against (0 = unknown)", Destination: &height},
	)
	return &cli.Command{
		Name:      "factor",
		Usage:     "reconstruct from a track file (track,frame,x,y columns) written by this or another tracker",
		ArgsUsage: "TRACKS.csv",
		Description: "Reads a CSV with a header naming at least the columns track, frame, x, y\n" +
			"(any order, extra columns ignored) and writes the same results as run.\n\n" +
			"Example: trackfactor factor -o out/part42 part42.csv",
		Flags: flags,
		Action: func(c *cli.Context) error {
			if err := rejectFlagsAfterArgs(c, 1); err != nil {
				return err
			}
			if err := of.validate(); err != nil {
				return err
			}
			fo, err := ff.options()
			if err != nil {
				return err
			}
			cfg := pipeline.Config{
				Input: c.Args().First(), Factor: fo, Out: of.dir, Force: of.force, PLYASCII: of.plyASCII, PLYSigma: of.plySigma, MaxMemory: of.maxBytes,
				Producer: producer(c), Progress: common.progress(c.App.ErrWriter),
			}
			res, err := pipeline.FromTrackFile(c.Context, cfg, width, height)
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
