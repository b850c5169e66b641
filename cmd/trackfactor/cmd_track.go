package main

import (
	"fmt"

	"github.com/urfave/cli/v2"

	"trackfactor/pipeline"
)

func trackCommand() *cli.Command {
	var common commonFlags
	var tf trackFlags
	var out string
	var force, quality bool
	flags := append(common.flags(), tf.flags()...)
	flags = append(flags,
		&cli.StringFlag{Name: "out", Aliases: []string{"o"}, Usage: "track file to write (CSV: track,frame,x,y)", Destination: &out},
		&cli.BoolFlag{Name: "force", Usage: "replace the track file if it exists", Destination: &force},
		&cli.BoolFlag{Name: "with-quality", Usage: "add a quality column (appearance match against the track's first frame, 0..1)", Destination: &quality},
	)
	return &cli.Command{
		Name:        "track",
		Usage:       "track corners through the frames and write the tracks alone",
		ArgsUsage:   "FRAMES",
		Description: "Example: trackfactor track -o part42.csv captures/part42",
		Flags:       flags,
		Action: func(c *cli.Context) error {
			if err := rejectFlagsAfterArgs(c, 1); err != nil {
				return err
			}
			if out == "" {
				return usagef("no track file: give one with -o, e.g. -o tracks.csv")
			}
			r, err := tf.rangeOf()
			if err != nil {
				return err
			}
			opts, err := tf.options()
			if err != nil {
				return err
			}
			mask, roi, err := tf.maskSpec()
			if err != nil {
				return err
			}
			set, err := pipeline.TrackOnly(c.Context, pipeline.Config{
				Input: c.Args().First(), Range: r, Track: opts, MaskFile: mask, ROI: roi,
				Progress: common.progress(c.App.ErrWriter),
			})
			if err != nil {
				return err
			}
			if err := pipeline.WriteTrackFile(out, set, quality, force); err != nil {
				return err
			}
			if !common.quiet {
				fmt.Fprintf(c.App.Writer, "tracks      %d over %d frames (%d corners detected)\nwritten     %s\n", len(set.Tracks), len(set.Frames), set.Stats.Detected, out)
			}
			return nil
		},
	}
}
