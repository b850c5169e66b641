// Command trackfactor turns an image sequence into camera rotations and a
// sparse 3D point cloud: corners are tracked through the frames, the
// measurement matrix of the tracks is factorized (Tomasi–Kanade), and the
// result is written as PLY, JSON and CSV with diagnostics that say how far to
// trust it.
//
// Exit codes: 0 success; 1 internal error; 2 bad usage (flags, arguments);
// 3 bad input (missing or unreadable files, too few frames or tracks, an
// output folder that already holds results); 4 no reconstruction possible
// from the data (too little rotation, failed metric upgrade); 130
// interrupted (SIGINT or SIGTERM).
package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"os/signal"
	"strings"
	"syscall"

	"github.com/urfave/cli/v2"

	"trackfactor/factor"
	"trackfactor/pipeline"
)

// version is set at build time with -ldflags "-X main.version=…".
var version = "0.1.0-dev"

// Exit codes, documented in the package comment and in --help.
const (
	exitOK          = 0
	exitInternal    = 1
	exitUsage       = 2
	exitInput       = 3
	exitUnsolvable  = 4
	exitInterrupted = 130
)

// usageError is a mistake on the command line.
type usageError struct{ msg string }

func (e *usageError) Error() string { return e.msg }

func usagef(format string, a ...any) error { return &usageError{fmt.Sprintf(format, a...)} }

func main() {
	os.Exit(run(os.Args, os.Stdout, os.Stderr))
}

// run executes the CLI and returns the exit code; a separate function so
// tests can call it.
func run(args []string, stdout, stderr io.Writer) int {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	ew := &lineWriter{w: stderr} // an error after a progress bar starts a new line
	app := newApp(stdout, ew)
	err := app.RunContext(ctx, args)
	code := exitCode(err)
	if err != nil {
		ew.endLine()
		msg := oneLine(err.Error())
		if !strings.HasPrefix(msg, "trackfactor") {
			msg = "trackfactor: " + msg
		}
		fmt.Fprintln(stderr, msg)
		if code == exitInterrupted && !strings.Contains(msg, "interrupted") {
			fmt.Fprintln(stderr, "trackfactor: interrupted; no result files were written and temporary files were removed")
		}
	}
	return code
}

func oneLine(s string) string {
	return strings.Join(strings.Fields(strings.ReplaceAll(s, "\n", " ")), " ")
}

// exitCode maps an error to the documented exit codes, in one place.
func exitCode(err error) int {
	var ue *usageError
	var ie *pipeline.InputError
	switch {
	case err == nil:
		return exitOK
	case errors.Is(err, context.Canceled):
		return exitInterrupted
	case errors.As(err, &ue):
		return exitUsage
	case errors.As(err, &ie):
		return exitInput
	case errors.Is(err, factor.ErrTooFew), errors.Is(err, factor.ErrLittleRotation),
		errors.Is(err, factor.ErrMetricUpgrade), errors.Is(err, factor.ErrIncomplete), errors.Is(err, factor.ErrDisconnected):
		return exitUnsolvable
	}
	// urfave/cli reports unknown flags and the like as plain errors.
	if s := err.Error(); strings.HasPrefix(s, "flag provided but not defined") || strings.Contains(s, "invalid value") ||
		strings.HasPrefix(s, "Required flag") || strings.HasPrefix(s, "No help topic") {
		return exitUsage
	}
	return exitInternal
}

func newApp(stdout, stderr io.Writer) *cli.App {
	app := &cli.App{
		Name:    "trackfactor",
		Usage:   "camera rotations and a sparse 3D point cloud from an image sequence",
		Version: version,
		Description: "Tracks corners through a folder of frames or a video, factorizes the tracks'\n" +
			"measurement matrix and writes cameras and points with diagnostics.\n\n" +
			"Exit codes: 0 success, 1 internal error, 2 bad usage, 3 bad input,\n" +
			"4 no reconstruction possible from the data, 130 interrupted.",
		Writer:         stdout,
		ErrWriter:      stderr,
		ExitErrHandler: func(*cli.Context, error) {},
		OnUsageError: func(_ *cli.Context, err error, _ bool) error {
			return usagef("%v (see --help)", err)
		},
		Commands: []*cli.Command{
			runCommand(),
			demoCommand(),
			trackCommand(),
			factorCommand(),
			refineCommand(),
			validateCommand(),
			reportCommand(),
			batchCommand(),
		},
	}
	setupConfig(app)
	return app
}

// rejectFlagsAfterArgs catches flags given after the positional arguments,
// which the flag parser would otherwise silently take as arguments.
func rejectFlagsAfterArgs(c *cli.Context, want int) error {
	args := c.Args().Slice()
	for _, a := range args {
		if strings.HasPrefix(a, "-") && a != "-" {
			return usagef("%s: flag %q comes after the arguments, where it would be ignored; put every flag before them: trackfactor %s [flags] %s", c.Command.Name, a, c.Command.Name, c.Command.ArgsUsage)
		}
	}
	if len(args) != want {
		return usagef("%s: expected %d argument(s), got %d; usage: trackfactor %s %s", c.Command.Name, want, len(args), c.Command.Name, c.Command.ArgsUsage)
	}
	return nil
}
