package main

import (
	"encoding/json"
	"fmt"
	"io"
	"sync"
	"time"

	"github.com/schollz/progressbar/v3"
	"golang.org/x/term"
)

// Progress output. The core packages report (stage, done, total) through
// callbacks; this file turns those calls into what a person or a program
// reading stderr wants:
//
//   - a progress bar per stage when stderr is a terminal;
//   - plain lines otherwise ("track     12/24  50%  3.1 s"), at most one
//     every two seconds per stage plus the stage's last step;
//   - with --log-format json, one JSON object per line per event,
//     {"event":"progress","stage":…,"done":…,"total":…,"elapsed_s":…}
//     (plus "capture" in a batch), at most ten a second per stage plus the
//     first and last step of each stage;
//   - nothing with --quiet.

// Log formats of --log-format.
const (
	logText = "text"
	logJSON = "json"
)

// Minimum time between two outputs of the same stage, by mode.
const (
	lineEvery = 2 * time.Second
	jsonEvery = 100 * time.Millisecond
)

type progressMode int

const (
	modeNone progressMode = iota
	modeBar
	modeLines
	modeJSON
)

// progressSink writes progress events to one writer. It is safe for
// concurrent use (a batch reports from several captures at once).
type progressSink struct {
	mu    sync.Mutex
	w     io.Writer
	mode  progressMode
	start time.Time
	now   func() time.Time // time.Now; replaced in tests

	bar               *progressbar.ProgressBar
	barStage          string
	barTotal          int
	last              map[string]time.Time
	lastDone, lastTot map[string]int
}

// fdWriter is a writer backed by a file descriptor (an *os.File, or the
// line-tracking wrapper of main), for the terminal check.
type fdWriter interface {
	io.Writer
	Fd() uintptr
}

// isTerminal reports whether w is a terminal.
func isTerminal(w io.Writer) bool {
	f, ok := w.(fdWriter)
	return ok && term.IsTerminal(int(f.Fd()))
}

// newProgressSink chooses the mode from the flags and the writer.
func newProgressSink(w io.Writer, quiet bool, format string) *progressSink {
	s := &progressSink{w: w, start: time.Now(), now: time.Now,
		last: map[string]time.Time{}, lastDone: map[string]int{}, lastTot: map[string]int{}}
	switch {
	case quiet:
		s.mode = modeNone
	case format == logJSON:
		s.mode = modeJSON
	case isTerminal(w):
		s.mode = modeBar
	default:
		s.mode = modeLines
	}
	return s
}

// callback returns the function to hand to the core packages, or nil when
// nothing is to be shown. capture, when not empty, names the capture the
// events belong to (JSON mode only; the text modes of a batch show the
// batch's own progress).
func (s *progressSink) callback(capture string) func(stage string, done, total int) {
	if s == nil || s.mode == modeNone {
		return nil
	}
	return func(stage string, done, total int) { s.event(capture, stage, done, total) }
}

// progressEvent is one line of --log-format json.
type progressEvent struct {
	Event    string  `json:"event"`
	Capture  string  `json:"capture,omitempty"`
	Stage    string  `json:"stage"`
	Done     int     `json:"done"`
	Total    int     `json:"total"`
	ElapsedS float64 `json:"elapsed_s"`
}

func (s *progressSink) event(capture, stage string, done, total int) {
	s.mu.Lock()
	defer s.mu.Unlock()
	key := capture + "\x00" + stage
	// The same step reported twice (a stage that ends more than once)
	// is shown once.
	if d, ok := s.lastDone[key]; ok && d == done && s.lastTot[key] == total {
		return
	}
	now := s.now()
	end := done >= total
	switch s.mode {
	case modeJSON:
		if !end && done != 0 && now.Sub(s.last[key]) < jsonEvery {
			return
		}
		b, _ := json.Marshal(progressEvent{Event: "progress", Capture: capture, Stage: stage, Done: done, Total: total,
			ElapsedS: roundMs(now.Sub(s.start).Seconds())})
		fmt.Fprintf(s.w, "%s\n", b)
	case modeLines:
		if !end && now.Sub(s.last[key]) < lineEvery {
			return
		}
		pct := ""
		if total > 0 {
			pct = fmt.Sprintf("  %3d%%", 100*done/total)
		}
		name := stage
		if capture != "" {
			name = capture + ": " + stage
		}
		fmt.Fprintf(s.w, "%-9s %d/%d%s  %.1f s\n", name, done, total, pct, now.Sub(s.start).Seconds())
	case modeBar:
		s.barEvent(stage, done, total)
	}
	s.last[key] = now
	s.lastDone[key] = done
	s.lastTot[key] = total
}

func (s *progressSink) barEvent(stage string, done, total int) {
	if s.bar == nil || s.barStage != stage || s.barTotal != total {
		s.endBar()
		s.bar = progressbar.NewOptions(total,
			progressbar.OptionSetWriter(s.w),
			progressbar.OptionSetDescription(fmt.Sprintf("%-9s", stage)),
			progressbar.OptionShowCount(),
			progressbar.OptionSetWidth(30),
			progressbar.OptionThrottle(80*time.Millisecond),
			progressbar.OptionSetPredictTime(true),
			progressbar.OptionSetTheme(progressbar.Theme{Saucer: "#", SaucerPadding: "·", BarStart: "[", BarEnd: "]"}),
			progressbar.OptionOnCompletion(func() { fmt.Fprint(s.w, "\n") }),
		)
		s.barStage, s.barTotal = stage, total
	}
	s.bar.Set(done)
	if done >= total {
		s.bar = nil
	}
}

// endBar ends an unfinished bar's line, so that what follows starts on a
// line of its own.
func (s *progressSink) endBar() {
	if s.bar != nil {
		if !s.bar.IsFinished() {
			fmt.Fprint(s.w, "\n")
		}
		s.bar = nil
	}
}

// finish ends any bar still on screen.
func (s *progressSink) finish() {
	if s == nil {
		return
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	s.endBar()
}

func roundMs(v float64) float64 {
	return float64(int64(v*1000+0.5)) / 1000
}

// progress returns the progress callback for the command's flags on w (nil
// with --quiet); it replaces the plain-line printer the commands used
// before, so every command gets bars, lines or JSON alike.
func (f *commonFlags) progress(w io.Writer) func(stage string, done, total int) {
	f.sink = newProgressSink(w, f.quiet, f.logFormat)
	return f.sink.callback("")
}

// lineWriter passes writes through and remembers whether the last byte
// written ended a line, so that an error printed after an interrupted
// progress bar starts on a fresh line.
type lineWriter struct {
	mu      sync.Mutex
	w       io.Writer
	midLine bool
}

func (l *lineWriter) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	n, err := l.w.Write(p)
	if n > 0 {
		l.midLine = p[n-1] != '\n'
	}
	return n, err
}

// Fd exposes the underlying file's descriptor for the terminal check
// (an invalid descriptor when it is not a file).
func (l *lineWriter) Fd() uintptr {
	if f, ok := l.w.(fdWriter); ok {
		return f.Fd()
	}
	return ^uintptr(0)
}

// endLine writes a newline if the last write left a line open.
func (l *lineWriter) endLine() {
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.midLine {
		l.w.Write([]byte("\n"))
		l.midLine = false
	}
}
