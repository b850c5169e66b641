package main

import (
	"bytes"
	"encoding/json"
	"strings"
	"testing"
	"time"
)

// fakeClock advances only when told.
type fakeClock struct{ t time.Time }

func (c *fakeClock) now() time.Time      { return c.t }
func (c *fakeClock) add(d time.Duration) { c.t = c.t.Add(d) }
func newFake() *fakeClock                { return &fakeClock{t: time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)} }
func sinkAt(c *fakeClock, s *progressSink) *progressSink {
	s.now, s.start = c.now, c.t
	return s
}

func TestProgressQuiet(t *testing.T) {
	var b bytes.Buffer
	if cb := newProgressSink(&b, true, logJSON).callback(""); cb != nil {
		t.Error("--quiet still gives a progress callback")
	}
}

// Not a terminal: plain lines, at most one per stage every two seconds,
// plus each stage's last step; a repeated step is shown once.
func TestProgressLines(t *testing.T) {
	var b bytes.Buffer
	clk := newFake()
	s := sinkAt(clk, newProgressSink(&b, false, logText))
	if s.mode != modeLines {
		t.Fatalf("a buffer is not a terminal, yet mode %v", s.mode)
	}
	cb := s.callback("")
	for i := 1; i <= 10; i++ {
		cb("track", i, 10)
		clk.add(500 * time.Millisecond)
	}
	cb("track", 10, 10)
	lines := strings.Split(strings.TrimSpace(b.String()), "\n")
	// steps 1 (t=0), 5 (t=2 s), 9 (t=4 s) and the last one, 10.
	if len(lines) != 4 || !strings.HasPrefix(lines[0], "track     1/10") || !strings.HasPrefix(lines[3], "track     10/10  100%") {
		t.Errorf("lines:\n%s", b.String())
	}
}

// --log-format json: one object per line with the documented fields.
func TestProgressJSON(t *testing.T) {
	var b bytes.Buffer
	clk := newFake()
	s := sinkAt(clk, newProgressSink(&b, false, logJSON))
	cb := s.callback("part1")
	cb("track", 0, 3)
	for i := 1; i <= 3; i++ {
		clk.add(time.Second)
		cb("track", i, 3)
	}
	cb("track", 3, 3) // repeated: shown once
	lines := strings.Split(strings.TrimSpace(b.String()), "\n")
	if len(lines) != 4 {
		t.Fatalf("%d lines, want 4:\n%s", len(lines), b.String())
	}
	for i, l := range lines {
		var ev map[string]any
		if err := json.Unmarshal([]byte(l), &ev); err != nil {
			t.Fatalf("line %d is not JSON: %q", i, l)
		}
		for _, k := range []string{"event", "stage", "done", "total", "elapsed_s", "capture"} {
			if _, ok := ev[k]; !ok {
				t.Errorf("line %d lacks %q: %s", i, k, l)
			}
		}
		if ev["done"].(float64) != float64(i) || ev["elapsed_s"].(float64) != float64(i) || ev["capture"] != "part1" {
			t.Errorf("line %d: %s", i, l)
		}
	}
}

// The bar mode (what a terminal gets) draws a bar with the stage and the
// count, and ends the line when the stage is done.
func TestProgressBar(t *testing.T) {
	var b bytes.Buffer
	s := newProgressSink(&b, false, logText)
	s.mode = modeBar // as on a terminal
	cb := s.callback("")
	for i := 0; i <= 5; i++ {
		cb("track", i, 5)
	}
	out := b.String()
	if !strings.Contains(out, "track") || !strings.Contains(out, "5/5") || !strings.HasSuffix(out, "\n") {
		t.Errorf("bar output %q", out)
	}
}

// An error after a bar left its line open starts on a new line.
func TestLineWriter(t *testing.T) {
	var b bytes.Buffer
	lw := &lineWriter{w: &b}
	lw.Write([]byte("\rtrack [###···] 3/6"))
	lw.endLine()
	lw.endLine()
	if b.String() != "\rtrack [###···] 3/6\n" {
		t.Errorf("%q", b.String())
	}
	if isTerminal(lw) {
		t.Error("a buffer behind the line writer is taken for a terminal")
	}
}
