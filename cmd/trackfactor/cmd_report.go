package main

import (
	"bytes"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"

	"github.com/urfave/cli/v2"

	"trackfactor/export"
	"trackfactor/pipeline"
	"trackfactor/report"
	"trackfactor/track"
)

func reportCommand() *cli.Command {
	var out string
	var force, quiet bool
	var frames string
	return &cli.Command{
		Name:      "report",
		Usage:     "(re)write the HTML report of a result folder",
		ArgsUsage: "OUT",
		Description: "Reads OUT/reconstruction.json, and OUT/tracks.csv and the frames when they\n" +
			"are there, and writes OUT/report.html (replacing it: the report is made from\n" +
			"the other files). The frames are looked for in the input folder recorded in\n" +
			"the JSON, as given or relative to OUT, or in --frames; PNG, JPEG and GIF\n" +
			"frames are shown.\n\n" +
			"Example: trackfactor report out/part42",
		Flags: []cli.Flag{
			&cli.StringFlag{Name: "out", Aliases: []string{"o"}, Usage: "write the report to this file instead of OUT/report.html (refused if it exists, unless --force)", Destination: &out},
			&cli.BoolFlag{Name: "force", Usage: "replace the -o file if it exists", Destination: &force},
			&cli.StringFlag{Name: "frames", Usage: "folder holding the input frames (default: the input recorded in the JSON)", Destination: &frames},
			&cli.BoolFlag{Name: "quiet", Aliases: []string{"q"}, Usage: "print nothing but errors", Destination: &quiet},
		},
		Action: func(c *cli.Context) error {
			if err := rejectFlagsAfterArgs(c, 1); err != nil {
				return err
			}
			dir := c.Args().First()
			target := filepath.Join(dir, export.FileReport)
			if out != "" {
				target = out
				if _, err := os.Stat(out); err == nil && !force {
					return &pipeline.InputError{Err: fmt.Errorf("report: %s already exists; use --force to replace it", out)}
				}
			}
			data, notes, err := buildReport(dir, frames)
			if err != nil {
				return err
			}
			if err := export.WriteFileAtomic(target, data, 0o644); err != nil {
				return fmt.Errorf("report: %w", err)
			}
			if !quiet {
				for _, n := range notes {
					fmt.Fprintf(c.App.ErrWriter, "note        %s\n", n)
				}
				fmt.Fprintf(c.App.Writer, "written     %s\n", target)
			}
			return nil
		},
	}
}

// buildReport makes the report of a result folder from its files. notes
// say what could not be included.
func buildReport(dir, framesDir string) ([]byte, []string, error) {
	jsonPath := filepath.Join(dir, export.FileReconstruction)
	f, err := os.Open(jsonPath)
	if err != nil {
		if errors.Is(err, fs.ErrNotExist) {
			return nil, nil, &pipeline.InputError{Err: fmt.Errorf("report: %s has no %s; give a folder written by trackfactor run", dir, export.FileReconstruction)}
		}
		return nil, nil, &pipeline.InputError{Err: fmt.Errorf("report: %w", err)}
	}
	doc, err := export.ReadJSON(f)
	f.Close()
	if err != nil {
		return nil, nil, &pipeline.InputError{Err: fmt.Errorf("report: %s: %w", jsonPath, err)}
	}
	ex := report.Extras{Files: []string{export.FileReconstruction}}
	for _, name := range []string{export.FilePoints, export.FileCameras} {
		if _, err := os.Stat(filepath.Join(dir, name)); err == nil {
			ex.Files = append(ex.Files, name)
		}
	}
	var notes []string
	tracksPath := filepath.Join(dir, export.FileTracks)
	if tf, err := os.Open(tracksPath); err == nil {
		set, err := track.ReadCSV(tf, track.ReadCSVOptions{Width: doc.Input.Width, Height: doc.Input.Height})
		tf.Close()
		if err != nil {
			notes = append(notes, fmt.Sprintf("%s could not be read (%v); the report shows no tracks", tracksPath, err))
		} else {
			ex.Kept = pipeline.ReportTracks(set.Tracks)
			ex.Files = append(ex.Files, export.FileTracks)
		}
	} else {
		notes = append(notes, fmt.Sprintf("no %s; the report shows no tracks", tracksPath))
	}
	if fd := findFrames(dir, framesDir, doc); fd != "" {
		ex.Frame = report.FolderFrames(fd, doc.Input.Frames)
	} else {
		notes = append(notes, fmt.Sprintf("the frames (%s) were not found; give their folder with --frames to show them", doc.Input.Source))
	}
	var buf bytes.Buffer
	if err := report.Write(&buf, doc, ex); err != nil {
		return nil, nil, err
	}
	return buf.Bytes(), notes, nil
}

// findFrames looks for the folder of input frames: --frames, the recorded
// source as given (relative to the current folder) and relative to the
// result folder, and a folder of the source's name inside the result
// folder. A candidate counts when it holds the first frame.
func findFrames(dir, given string, doc *export.Document) string {
	if len(doc.Input.Frames) == 0 {
		return ""
	}
	src := doc.Input.Source
	cands := []string{given}
	if given == "" {
		cands = []string{src}
		if !filepath.IsAbs(src) {
			cands = append(cands, filepath.Join(dir, src))
		}
		cands = append(cands, filepath.Join(dir, filepath.Base(src)))
	}
	for _, c := range cands {
		if c == "" {
			continue
		}
		if st, err := os.Stat(filepath.Join(c, doc.Input.Frames[0])); err == nil && !st.IsDir() {
			return c
		}
	}
	return ""
}
