package pipeline

import (
	"bytes"
	"context"
	"os"
	"path/filepath"
	"runtime"
	"testing"

	"trackfactor/export"
	"trackfactor/track/synth"
)

// The same input and settings give byte-identical files (issue 8), on the
// complete-track path and on the missing-data path (random restarts are
// seeded), whatever the number of threads: every run here uses a
// different GOMAXPROCS.
func TestDeterministicOutputs(t *testing.T) {
	cases := []struct {
		name string
		opts synth.Options
	}{
		{"arc", synth.Options{Width: 320, Height: 240, Frames: 12, StepDeg: 2, NoiseSigma: 1, Seed: 11}},
		{"turn", synth.Options{Width: 320, Height: 240, Frames: 36, StepDeg: 10, NoiseSigma: 1, Seed: 12}},
	}
	if testing.Short() {
		cases = cases[:1]
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, dir := renderScene(t, c.opts)
			var outs []string
			for i, procs := range []int{2, 1} {
				prev := runtime.GOMAXPROCS(procs)
				out := filepath.Join(t.TempDir(), "out")
				_, err := Run(context.Background(), Config{Input: dir, Out: out, Producer: export.Producer{Version: "test", Command: "same"}})
				runtime.GOMAXPROCS(prev)
				if err != nil {
					t.Fatalf("run %d: %v", i, err)
				}
				outs = append(outs, out)
			}
			for _, f := range export.ResultFiles() {
				a, errA := os.ReadFile(filepath.Join(outs[0], f))
				b, errB := os.ReadFile(filepath.Join(outs[1], f))
				if errA != nil || errB != nil {
					t.Fatalf("%s: %v %v", f, errA, errB)
				}
				if !bytes.Equal(a, b) {
					t.Errorf("%s differs between two runs (%d and %d bytes): %s", f, len(a), len(b), firstDiff(a, b))
				}
			}
		})
	}
}

// firstDiff shows the first differing line of two files.
func firstDiff(a, b []byte) string {
	la, lb := bytes.Split(a, []byte("\n")), bytes.Split(b, []byte("\n"))
	for i := 0; i < len(la) && i < len(lb); i++ {
		if !bytes.Equal(la[i], lb[i]) {
			return string(la[i]) + " | " + string(lb[i])
		}
	}
	return "(one is a prefix of the other)"
}
