package main

import (
	"fmt"
	"os"

	"github.com/urfave/cli/v2"

	"trackfactor/export"
	"trackfactor/pipeline"
)

func validateCommand() *cli.Command {
	return &cli.Command{
		Name:        "validate",
		Usage:       "check a reconstruction.json against the schema of the output contract",
		ArgsUsage:   "FILE",
		Description: "Example: trackfactor validate out/part42/reconstruction.json",
		Action: func(c *cli.Context) error {
			if err := rejectFlagsAfterArgs(c, 1); err != nil {
				return err
			}
			path := c.Args().First()
			data, err := os.ReadFile(path)
			if err != nil {
				return &pipeline.InputError{Err: fmt.Errorf("validate: %w", err)}
			}
			if err := export.Validate(data); err != nil {
				return &pipeline.InputError{Err: fmt.Errorf("validate: %s: %w", path, err)}
			}
			fmt.Fprintf(c.App.Writer, "%s: valid %s\n", path, export.SchemaID)
			return nil
		},
	}
}
