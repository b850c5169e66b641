package main

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/csv"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
	"runtime"
	"sort"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/urfave/cli/v2"

	"trackfactor/export"
	"trackfactor/factor"
	"trackfactor/pipeline"
	"trackfactor/report"
)

// Batch runs: every sub-folder or video file of ROOT is one capture,
// reconstructed into OUT/<name>/ as `run` would. Files of the batch:
//
//	OUT/<name>/…            the capture's results and report.html (a failure
//	                        report when it failed)
//	OUT/<name>/.done        what the batch knows about the capture: status,
//	                        hashes of the settings and of the input listing,
//	                        its summary row
//	OUT/summary.csv, .json  one row per capture
//	OUT/index.html          the rows as a page linking every report
//
// With --shard K/N only the captures whose index in the name-sorted list
// (0-based) is K-1 modulo N are run, and the summary goes to
// OUT/summary-shard-K-of-N.json and .csv; `batch --merge` joins the shards'
// summaries into summary.csv, summary.json and index.html.

// Names of the batch's own files.
const (
	fileDone        = ".done"
	fileSummaryJSON = "summary.json"
	fileSummaryCSV  = "summary.csv"
	fileIndex       = "index.html"
	summarySchema   = "trackfactor/batch-summary@1"
	doneSchema      = "trackfactor/batch-done@1"
)

// Row statuses.
const (
	statusDone   = "done"
	statusFailed = "failed"
)

type batchOptions struct {
	runOptions
	jobs  int
	shard string
	merge bool
}

// defaultJobs is half the cores, at least 1: each capture's tracking already
// keeps two cores busy, so more parallel captures only contend for them.
func defaultJobs() int { return max(1, runtime.NumCPU()/2) }

func batchCommand() *cli.Command {
	o := &batchOptions{}
	flags := []cli.Flag{
		&cli.IntFlag{Name: "jobs", Aliases: []string{"j"}, Category: "batch", Usage: "captures reconstructed at once (default: half the cores, at least 1, as each capture's tracking uses two)", Value: defaultJobs(), Destination: &o.jobs},
		&cli.StringFlag{Name: "shard", Category: "batch", Usage: "run only share K of N (K/N, 1 ≤ K ≤ N): the captures whose index in name order, from 0, is K-1 modulo N", Destination: &o.shard},
		&cli.BoolFlag{Name: "merge", Category: "batch", Usage: "join the shard summaries in the folders given as arguments into summary.csv, summary.json and index.html (in -o, or in the one folder given)", Destination: &o.merge},
	}
	flags = append(flags, o.runOptions.flags()...)
	return &cli.Command{
		Name:      "batch",
		Usage:     "reconstruct every capture (sub-folder or video) of a folder, resumably, in parallel or in shards",
		ArgsUsage: "ROOT",
		Description: "Every sub-folder of ROOT (a folder of frames) and every video file in it is one\n" +
			"capture, written to OUT/<name>/ as by run, report.html included. A capture that\n" +
			"fails gets a failure report and never stops the others. OUT/summary.csv,\n" +
			"OUT/summary.json and OUT/index.html list every capture with its verdict.\n\n" +
			"Resumable: a capture whose OUT/<name>/reconstruction.json was made with the\n" +
			"same settings from the same input (names, sizes and times of its files,\n" +
			"recorded in OUT/<name>/.done) is skipped; --force runs it again.\n\n" +
			"--shard K/N runs a deterministic share for array jobs (Slurm, Kubernetes\n" +
			"Indexed Jobs; see docs/): the summaries go to OUT/summary-shard-K-of-N.*;\n" +
			"then trackfactor batch --merge OUT writes the joined summary and index.\n\n" +
			"Exit code 3 when any capture failed.\n\n" +
			"Examples: trackfactor batch -o out/today captures/today\n" +
			"          trackfactor batch --shard 2/8 -o out/today captures/today\n" +
			"          trackfactor batch --merge out/today",
		Flags: flags,
		Action: func(c *cli.Context) error {
			if o.merge {
				return o.runMerge(c)
			}
			if err := rejectFlagsAfterArgs(c, 1); err != nil {
				return err
			}
			if err := o.out.validate(); err != nil {
				return err
			}
			if o.jobs < 1 {
				return usagef("--jobs %d: give 1 or more, e.g. --jobs 2", o.jobs)
			}
			k, n, err := parseShard(o.shard)
			if err != nil {
				return err
			}
			return o.runBatch(c, c.Args().First(), k, n)
		},
	}
}

// parseShard reads K/N; "" is 1/1.
func parseShard(s string) (k, n int, err error) {
	if s == "" {
		return 1, 1, nil
	}
	a, b, ok := strings.Cut(s, "/")
	k, err1 := strconv.Atoi(strings.TrimSpace(a))
	n, err2 := strconv.Atoi(strings.TrimSpace(b))
	if !ok || err1 != nil || err2 != nil || n < 1 || k < 1 || k > n {
		return 0, 0, usagef("--shard %q: want K/N with 1 ≤ K ≤ N, e.g. --shard 3/8 for the third of eight shares", s)
	}
	return k, n, nil
}

// capture is one input of a batch.
type capture struct {
	Name  string // OUT/<Name>
	Input string // ROOT/<entry>
}

// findCaptures lists the captures of root in name order. out is left out
// when it lies inside root.
func findCaptures(root, out string) ([]capture, error) {
	entries, err := os.ReadDir(root)
	if err != nil {
		return nil, &pipeline.InputError{Err: fmt.Errorf("batch: %w; give the folder that holds one sub-folder or video per capture", err)}
	}
	absOut, _ := filepath.Abs(out)
	var caps []capture
	seen := map[string]string{}
	for _, e := range entries {
		name := e.Name()
		if strings.HasPrefix(name, ".") {
			continue
		}
		p := filepath.Join(root, name)
		if abs, _ := filepath.Abs(p); abs == absOut {
			continue
		}
		info, err := os.Stat(p) // follows links
		if err != nil {
			continue
		}
		capName := name
		switch {
		case info.IsDir():
		case info.Mode().IsRegular() && isVideo(name):
			capName = strings.TrimSuffix(name, filepath.Ext(name))
		default:
			continue
		}
		if prev, dup := seen[capName]; dup {
			return nil, &pipeline.InputError{Err: fmt.Errorf("batch: %s and %s would both be written to %s; rename one of them", prev, p, capName)}
		}
		seen[capName] = p
		caps = append(caps, capture{Name: capName, Input: p})
	}
	sort.Slice(caps, func(i, j int) bool { return caps[i].Name < caps[j].Name })
	if len(caps) == 0 {
		return nil, &pipeline.InputError{Err: fmt.Errorf("batch: %s holds no sub-folders or videos; put each capture in a folder of its own (for one folder of frames use trackfactor run)", root)}
	}
	return caps, nil
}

// isVideo tells the files of a batch root taken as videos, by extension.
func isVideo(name string) bool {
	switch strings.ToLower(filepath.Ext(name)) {
	case ".avi", ".m4v", ".mkv", ".mov", ".mp4", ".mpeg", ".mpg", ".webm", ".wmv":
		return true
	}
	return false
}

// shardOf picks the captures of share k of n: index mod n == k-1.
func shardOf(caps []capture, k, n int) []capture {
	var out []capture
	for i, c := range caps {
		if i%n == k-1 {
			out = append(out, c)
		}
	}
	return out
}

// summaryRow is one capture in summary.csv and summary.json.
type summaryRow struct {
	Capture  string   `json:"capture"`
	Input    string   `json:"input"`
	Status   string   `json:"status"`
	Verdict  string   `json:"verdict"`
	Frames   int      `json:"frames"`
	FramesIn int      `json:"frames_input"`
	Points   int      `json:"points"`
	RMSPx    *float64 `json:"rms_px"`
	Warnings []string `json:"warnings"`
	Error    string   `json:"error"`
	TimeS    float64  `json:"time_s"`
	Resumed  bool     `json:"resumed"`
	Report   string   `json:"report"` // relative to the summary's folder
}

// batchSummary is summary.json (and summary-shard-K-of-N.json).
type batchSummary struct {
	Schema       string       `json:"schema"`
	Version      string       `json:"version"`
	Root         string       `json:"root"`
	Shard        string       `json:"shard"`    // "K/N"; "1/1" for a whole run
	Captures     int          `json:"captures"` // captures in ROOT, all shards
	SettingsHash string       `json:"settings_hash"`
	Rows         []summaryRow `json:"rows"`
}

// doneRecord is OUT/<name>/.done.
type doneRecord struct {
	Schema       string     `json:"schema"`
	Status       string     `json:"status"`
	SettingsHash string     `json:"settings_hash"`
	InputHash    string     `json:"input_hash"`
	Row          summaryRow `json:"row"`
}

func shardFiles(k, n int) (jsonName, csvName string) {
	if n == 1 {
		return fileSummaryJSON, fileSummaryCSV
	}
	base := fmt.Sprintf("summary-shard-%d-of-%d", k, n)
	return base + ".json", base + ".csv"
}

func (o *batchOptions) runBatch(c *cli.Context, root string, k, n int) error {
	ctx := c.Context
	all, err := findCaptures(root, o.out.dir)
	if err != nil {
		return err
	}
	mine := shardOf(all, k, n)
	if err := os.MkdirAll(o.out.dir, 0o777); err != nil {
		return &pipeline.InputError{Err: fmt.Errorf("batch: cannot create %s: %v; choose another output folder", o.out.dir, err)}
	}
	// The settings are those of run, checked once (a bad flag fails the
	// batch, not every capture).
	base, err := o.config(c, root)
	if err != nil {
		return err
	}
	shash := settingsHash(base)
	sink := newProgressSink(c.App.ErrWriter, o.common.quiet, o.common.logFormat)
	defer sink.finish()
	total := len(mine)
	rows := make([]summaryRow, len(mine))
	var mu sync.Mutex
	finished := 0
	step := sink.callback("")
	if step != nil {
		step("batch", 0, total)
	}
	jobs := make(chan int)
	var wg sync.WaitGroup
	for w := 0; w < min(o.jobs, max(total, 1)); w++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range jobs {
				row := o.processCapture(ctx, c, mine[i], base, shash, sink)
				mu.Lock()
				rows[i] = row
				if ctx.Err() == nil {
					finished++
					if step != nil {
						step("batch", finished, total)
					}
					sink.note(c, fmt.Sprintf("%-11s %s: %s", fmt.Sprintf("[%d/%d]", finished, total), row.Capture, rowLine(row)))
				}
				mu.Unlock()
			}
		}()
	}
	for i := range mine {
		if ctx.Err() != nil {
			break
		}
		jobs <- i
	}
	close(jobs)
	wg.Wait()
	sink.finish()
	if err := ctx.Err(); err != nil {
		return fmt.Errorf("batch: interrupted after %d of %d captures; the finished ones are kept (with their .done files), the unfinished one left no files; run the same command again to resume: %w", finished, total, err)
	}
	sum := batchSummary{Schema: summarySchema, Version: version, Root: root, Shard: fmt.Sprintf("%d/%d", k, n),
		Captures: len(all), SettingsHash: shash, Rows: rows}
	jsonName, csvName := shardFiles(k, n)
	if err := writeSummary(o.out.dir, jsonName, csvName, sum, n == 1); err != nil {
		return err
	}
	if !o.common.quiet {
		printBatchTable(c.App.Writer, rows)
		fmt.Fprintf(c.App.Writer, "written     %s: %s, %s", o.out.dir, jsonName, csvName)
		if n == 1 {
			fmt.Fprintf(c.App.Writer, ", %s", fileIndex)
		} else {
			fmt.Fprintf(c.App.Writer, " (shard %d of %d; join the shards with trackfactor batch --merge)", k, n)
		}
		fmt.Fprintln(c.App.Writer)
	}
	return failedError(rows, o.out.dir)
}

// failedError is the batch's error when captures failed (exit code 3).
func failedError(rows []summaryRow, dir string) error {
	var failed []string
	for _, r := range rows {
		if r.Status != statusDone {
			failed = append(failed, r.Capture)
		}
	}
	if len(failed) == 0 {
		return nil
	}
	return &pipeline.InputError{Err: fmt.Errorf("batch: %d of %d captures failed (%s); their reports in %s say why", len(failed), len(rows), strings.Join(failed, ", "), dir)}
}

func rowLine(r summaryRow) string {
	if r.Status != statusDone {
		return "failed: " + r.Error
	}
	s := fmt.Sprintf("%s, %d/%d frames, %d points", r.Verdict, r.Frames, r.FramesIn, r.Points)
	if r.RMSPx != nil {
		s += fmt.Sprintf(", %.3g px", *r.RMSPx)
	}
	if r.Resumed {
		return s + " (done before, skipped)"
	}
	return s + fmt.Sprintf(", %.1f s", r.TimeS)
}

// note prints one line about the batch: to stderr in the text modes
// (above any progress bar), as a JSON event in the JSON mode.
func (s *progressSink) note(c *cli.Context, line string) {
	if s == nil || s.mode == modeNone {
		return
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	switch s.mode {
	case modeJSON:
		b, _ := json.Marshal(map[string]any{"event": "note", "message": line, "elapsed_s": roundMs(s.now().Sub(s.start).Seconds())})
		fmt.Fprintf(s.w, "%s\n", b)
	case modeBar:
		if s.bar != nil {
			s.bar.Clear()
		}
		fmt.Fprintln(s.w, line)
		if s.bar != nil {
			s.bar.RenderBlank()
		}
	default:
		fmt.Fprintln(s.w, line)
	}
}

// settingsHash identifies the effective settings of a batch: the version
// and every stage's options, defaults resolved (the JSON's settings without
// the per-run entries).
func settingsHash(cfg pipeline.Config) string {
	cfg.Settings = nil
	b, _ := json.Marshal(map[string]any{"version": version, "settings": pipeline.Settings(cfg)})
	h := sha256.Sum256(b)
	return hex.EncodeToString(h[:])
}

// inputHash identifies a capture's input: the names, sizes and
// modification times of its files (the video file itself for a video).
func inputHash(input string) (string, error) {
	h := sha256.New()
	add := func(name string, info fs.FileInfo) {
		fmt.Fprintf(h, "%s\x00%d\x00%d\n", name, info.Size(), info.ModTime().UnixNano())
	}
	info, err := os.Stat(input)
	if err != nil {
		return "", err
	}
	if !info.IsDir() {
		add(filepath.Base(input), info)
	} else {
		entries, err := os.ReadDir(input)
		if err != nil {
			return "", err
		}
		for _, e := range entries { // ReadDir sorts by name
			fi, err := e.Info()
			if err != nil || !fi.Mode().IsRegular() {
				continue
			}
			add(e.Name(), fi)
		}
	}
	return hex.EncodeToString(h.Sum(nil)), nil
}

func readDone(dir string) (*doneRecord, bool) {
	b, err := os.ReadFile(filepath.Join(dir, fileDone))
	if err != nil {
		return nil, false
	}
	var d doneRecord
	if json.Unmarshal(b, &d) != nil || d.Schema != doneSchema {
		return nil, false
	}
	return &d, true
}

func writeDone(dir string, d doneRecord) error {
	d.Schema = doneSchema
	b, err := json.MarshalIndent(d, "", "  ")
	if err != nil {
		return err
	}
	return export.WriteFileAtomic(filepath.Join(dir, fileDone), append(b, '\n'), 0o644)
}

// processCapture reconstructs one capture (or finds it done) and returns
// its summary row. It never returns an error: a failure is a row.
func (o *batchOptions) processCapture(ctx context.Context, c *cli.Context, cp capture, base pipeline.Config, shash string, sink *progressSink) summaryRow {
	dir := filepath.Join(o.out.dir, cp.Name)
	row := summaryRow{Capture: cp.Name, Input: cp.Input, Status: statusFailed, Verdict: string(report.Failed),
		Warnings: []string{}, Report: filepath.ToSlash(filepath.Join(cp.Name, export.FileReport))}
	ihash, err := inputHash(cp.Input)
	if err != nil {
		row.Error = oneLine(fmt.Sprintf("cannot list the input: %v", err))
		return row
	}
	prev, hasPrev := readDone(dir)
	if hasPrev && !o.out.force && prev.Status == statusDone && prev.SettingsHash == shash && prev.InputHash == ihash {
		if _, err := os.Stat(filepath.Join(dir, export.FileReconstruction)); err == nil {
			r := prev.Row
			r.Resumed = true
			return r
		}
	}
	cfg := base
	cfg.Input = cp.Input
	cfg.Out = dir
	// Results of an earlier run of this batch (a failure report, or a run
	// with other settings whose .done we wrote) may be replaced; anything
	// else only with --force.
	cfg.Force = o.out.force || (hasPrev && prev.Status == statusFailed)
	if sink.mode == modeJSON || (sink.mode == modeLines && o.jobs == 1) {
		cfg.Progress = sink.callback(cp.Name)
	} else {
		cfg.Progress = nil
	}
	t0 := time.Now()
	res, err := pipeline.Run(ctx, cfg)
	row.TimeS = roundMs(time.Since(t0).Seconds())
	if err != nil {
		if ctx.Err() != nil {
			return row // interrupted: no row, no files
		}
		row.Error = oneLine(err.Error())
		o.writeFailure(dir, cp, cfg, err, hasPrev && prev.Status == statusFailed)
		writeDone(dir, doneRecord{Status: statusFailed, SettingsHash: shash, InputHash: ihash, Row: row})
		return row
	}
	doc := res.Doc
	j := report.Judge(doc)
	row.Status = statusDone
	row.Verdict = string(j.Verdict)
	row.Frames = len(doc.Cameras)
	row.FramesIn = len(doc.Input.Frames)
	row.Points = len(doc.Points)
	rms := doc.Diagnostics.RMSPx
	row.RMSPx = &rms
	for _, w := range j.Lowering {
		row.Warnings = append(row.Warnings, w.Code)
	}
	for _, w := range j.Info {
		row.Warnings = append(row.Warnings, w.Code)
	}
	if err := writeDone(dir, doneRecord{Status: statusDone, SettingsHash: shash, InputHash: ihash, Row: row}); err != nil {
		row.Error = "results written, but the resume record could not be: " + oneLine(err.Error())
	}
	return row
}

// writeFailure writes the failure report of a capture, unless the folder
// holds a report that is not ours and --force was not given.
func (o *batchOptions) writeFailure(dir string, cp capture, cfg pipeline.Config, runErr error, ours bool) {
	target := filepath.Join(dir, export.FileReport)
	if _, err := os.Stat(target); err == nil && !ours && !o.out.force {
		return
	}
	if err := os.MkdirAll(dir, 0o777); err != nil {
		return
	}
	var buf bytes.Buffer
	info := report.FailureInfo{Name: cp.Name, Input: cp.Input, Err: runErr, Kind: failureKind(runErr),
		Settings: pipeline.Settings(cfg), Producer: cfg.Producer}
	if report.WriteFailure(&buf, info) == nil {
		export.WriteFileAtomic(target, buf.Bytes(), 0o644)
	}
}

func failureKind(err error) report.FailureKind {
	switch exitCode(err) {
	case exitInput, exitUsage:
		return report.FailInput
	case exitUnsolvable:
		return report.FailUnsolvable
	case exitInterrupted:
		return report.FailInterrupted
	}
	if errors.Is(err, factor.ErrTooFew) {
		return report.FailUnsolvable
	}
	return report.FailInternal
}

// writeSummary writes the summary JSON and CSV (and, for a whole batch,
// the index page) atomically.
func writeSummary(dir, jsonName, csvName string, sum batchSummary, index bool) error {
	sort.Slice(sum.Rows, func(i, j int) bool { return sum.Rows[i].Capture < sum.Rows[j].Capture })
	for i := range sum.Rows {
		if sum.Rows[i].Warnings == nil {
			sum.Rows[i].Warnings = []string{}
		}
	}
	b, err := json.MarshalIndent(sum, "", "  ")
	if err != nil {
		return fmt.Errorf("batch: encoding the summary: %w", err)
	}
	if err := export.WriteFileAtomic(filepath.Join(dir, jsonName), append(b, '\n'), 0o644); err != nil {
		return fmt.Errorf("batch: %w", err)
	}
	var cb bytes.Buffer
	cw := csv.NewWriter(&cb)
	cw.Write([]string{"capture", "status", "verdict", "frames", "frames_input", "points", "rms_px", "warnings", "time_s", "resumed", "report", "error"})
	for _, r := range sum.Rows {
		rms := ""
		if r.RMSPx != nil {
			rms = strconv.FormatFloat(*r.RMSPx, 'g', 6, 64)
		}
		cw.Write([]string{r.Capture, r.Status, r.Verdict, strconv.Itoa(r.Frames), strconv.Itoa(r.FramesIn), strconv.Itoa(r.Points),
			rms, strings.Join(r.Warnings, ";"), strconv.FormatFloat(r.TimeS, 'f', 3, 64), strconv.FormatBool(r.Resumed), r.Report, r.Error})
	}
	cw.Flush()
	if err := export.WriteFileAtomic(filepath.Join(dir, csvName), cb.Bytes(), 0o644); err != nil {
		return fmt.Errorf("batch: %w", err)
	}
	if !index {
		return nil
	}
	var ib bytes.Buffer
	rows := make([]report.IndexRow, 0, len(sum.Rows))
	for _, r := range sum.Rows {
		rows = append(rows, report.IndexRow{Capture: r.Capture, Verdict: report.Verdict(r.Verdict), Frames: r.Frames, FramesIn: r.FramesIn,
			Points: r.Points, RMSPx: r.RMSPx, Warnings: r.Warnings, Error: r.Error, TimeS: r.TimeS, Report: r.Report})
	}
	if err := report.WriteIndex(&ib, filepath.Base(filepath.Clean(sum.Root)), rows); err != nil {
		return err
	}
	if err := export.WriteFileAtomic(filepath.Join(dir, fileIndex), ib.Bytes(), 0o644); err != nil {
		return fmt.Errorf("batch: %w", err)
	}
	return nil
}

func printBatchTable(w interface{ Write([]byte) (int, error) }, rows []summaryRow) {
	fmt.Fprintf(w, "%-24s %-21s %9s %7s %9s %8s  %s\n", "capture", "verdict", "frames", "points", "residual", "time", "warnings / error")
	for _, r := range rows {
		rms := "—"
		if r.RMSPx != nil {
			rms = fmt.Sprintf("%.3g px", *r.RMSPx)
		}
		extra := strings.Join(r.Warnings, ", ")
		if r.Error != "" {
			extra = r.Error
		}
		t := fmt.Sprintf("%.1f s", r.TimeS)
		if r.Resumed {
			t = "skipped"
		}
		fmt.Fprintf(w, "%-24s %-21s %9s %7d %9s %8s  %s\n", r.Capture, r.Verdict, fmt.Sprintf("%d/%d", r.Frames, r.FramesIn), r.Points, rms, t, extra)
	}
}

// runMerge joins shard summaries: every summary-shard-K-of-N.json in the
// folders given. All N shards must be there, with the same root, settings
// and capture count; the joined rows must cover every capture once.
func (o *batchOptions) runMerge(c *cli.Context) error {
	dirs := c.Args().Slice()
	for _, a := range dirs {
		if strings.HasPrefix(a, "-") {
			return usagef("batch --merge: flag %q comes after the folders; put every flag before them: trackfactor batch --merge [-o DEST] OUT...", a)
		}
	}
	if len(dirs) == 0 {
		return usagef("batch --merge: give the folder(s) holding the shard summaries, e.g. trackfactor batch --merge out/today")
	}
	dest := o.out.dir
	if dest == "" {
		if len(dirs) > 1 {
			return usagef("batch --merge: with several folders, say where the joined summary goes with -o, e.g. -o out/all")
		}
		dest = dirs[0]
	}
	var shards []batchSummary
	var shardDirs []string
	for _, d := range dirs {
		matches, _ := filepath.Glob(filepath.Join(d, "summary-shard-*-of-*.json"))
		sort.Strings(matches)
		for _, m := range matches {
			b, err := os.ReadFile(m)
			if err != nil {
				return &pipeline.InputError{Err: fmt.Errorf("batch --merge: %w", err)}
			}
			var s batchSummary
			if err := json.Unmarshal(b, &s); err != nil || s.Schema != summarySchema {
				return &pipeline.InputError{Err: fmt.Errorf("batch --merge: %s is not a trackfactor batch summary; remove it or write it again with batch --shard", m)}
			}
			shards = append(shards, s)
			shardDirs = append(shardDirs, d)
		}
	}
	if len(shards) == 0 {
		return &pipeline.InputError{Err: fmt.Errorf("batch --merge: no summary-shard-K-of-N.json in %s; run the shards (batch --shard K/N) first", strings.Join(dirs, ", "))}
	}
	merged, err := mergeShards(shards, shardDirs, dest)
	if err != nil {
		return err
	}
	if err := os.MkdirAll(dest, 0o777); err != nil {
		return &pipeline.InputError{Err: fmt.Errorf("batch --merge: cannot create %s: %v", dest, err)}
	}
	if err := writeSummary(dest, fileSummaryJSON, fileSummaryCSV, merged, true); err != nil {
		return err
	}
	if !o.common.quiet {
		printBatchTable(c.App.Writer, merged.Rows)
		fmt.Fprintf(c.App.Writer, "written     %s: %s, %s, %s (%d shards joined)\n", dest, fileSummaryJSON, fileSummaryCSV, fileIndex, len(shards))
	}
	return failedError(merged.Rows, dest)
}

func mergeShards(shards []batchSummary, dirs []string, dest string) (batchSummary, error) {
	first := shards[0]
	_, n, err := parseShard(first.Shard)
	if err != nil {
		return batchSummary{}, &pipeline.InputError{Err: fmt.Errorf("batch --merge: a summary has shard %q; write it again with batch --shard", first.Shard)}
	}
	have := map[int]bool{}
	out := batchSummary{Schema: summarySchema, Version: first.Version, Root: first.Root, Shard: "1/1", Captures: first.Captures, SettingsHash: first.SettingsHash}
	seen := map[string]bool{}
	for i, s := range shards {
		k, sn, err := parseShard(s.Shard)
		if err != nil || sn != n {
			return out, &pipeline.InputError{Err: fmt.Errorf("batch --merge: shards of different splits (%s and %s); merge the shards of one run", first.Shard, s.Shard)}
		}
		if s.Root != first.Root || s.SettingsHash != first.SettingsHash || s.Captures != first.Captures {
			return out, &pipeline.InputError{Err: fmt.Errorf("batch --merge: shard %s was run on %s with other settings or captures than shard %s; run every shard with the same command", s.Shard, s.Root, first.Shard)}
		}
		if have[k] {
			return out, &pipeline.InputError{Err: fmt.Errorf("batch --merge: shard %d/%d appears twice; give each shard's folder once", k, n)}
		}
		have[k] = true
		for _, r := range s.Rows {
			if seen[r.Capture] {
				return out, &pipeline.InputError{Err: fmt.Errorf("batch --merge: capture %s is in two shards", r.Capture)}
			}
			seen[r.Capture] = true
			if rel, err := filepath.Rel(dest, filepath.Join(dirs[i], filepath.FromSlash(r.Report))); err == nil {
				r.Report = filepath.ToSlash(rel)
			}
			out.Rows = append(out.Rows, r)
		}
	}
	var missing []string
	for k := 1; k <= n; k++ {
		if !have[k] {
			missing = append(missing, fmt.Sprintf("%d/%d", k, n))
		}
	}
	if len(missing) > 0 {
		return out, &pipeline.InputError{Err: fmt.Errorf("batch --merge: shard(s) %s missing; run them (batch --shard K/N) and merge again", strings.Join(missing, ", "))}
	}
	if len(out.Rows) != out.Captures {
		return out, &pipeline.InputError{Err: fmt.Errorf("batch --merge: the shards hold %d captures but the root had %d; a shard was interrupted — run it again", len(out.Rows), out.Captures)}
	}
	return out, nil
}
