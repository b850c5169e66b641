package pipeline

import (
	"bytes"
	"context"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"trackfactor/export"
	"trackfactor/factor"
	"trackfactor/track"
)

// FuzzReconstructCSV feeds track files to what `trackfactor factor` does
// with them: ReadCSV, then Reconstruct (model choice, complete or
// missing-data path, rejection, refinement). It must never panic; a file
// the reader accepts either reconstructs into a document that WriteJSON
// writes and the schema accepts, or fails as bad input or as "no
// reconstruction possible" (the CLI's exit codes 3 and 4), with one line —
// never as an internal error. The memory guard is set to 256 MiB and frame
// numbers are limited to 2000, so that a hostile file is refused quickly
// instead of running for long.
//
// Seeds: the track files of testdata/tracks, small synthetic sets (complete
// and incomplete tracks, written by WriteCSV), and the regression inputs in
// testdata/fuzz/FuzzReconstructCSV.
func FuzzReconstructCSV(f *testing.F) {
	files, _ := filepath.Glob(filepath.Join("..", "testdata", "tracks", "*.csv"))
	for _, p := range files {
		b, err := os.ReadFile(p)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b)
	}
	for _, incomplete := range []bool{false, true} {
		var buf bytes.Buffer
		if err := track.WriteCSV(&buf, syntheticTracks(16, 12, incomplete, 4), false); err != nil {
			f.Fatal(err)
		}
		f.Add(buf.Bytes())
	}
	v, err := export.NewValidator()
	if err != nil {
		f.Fatal(err)
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		set, err := track.ReadCSV(bytes.NewReader(data), track.ReadCSVOptions{MaxFrame: 2000})
		if err != nil {
			return // FuzzReadCSV checks the reader's errors
		}
		res, err := Reconstruct(context.Background(), set, Config{MaxMemory: 256 << 20})
		if err != nil {
			var ie *InputError
			if !errors.As(err, &ie) && !errors.Is(err, factor.ErrTooFew) && !errors.Is(err, factor.ErrLittleRotation) &&
				!errors.Is(err, factor.ErrMetricUpgrade) && !errors.Is(err, factor.ErrIncomplete) && !errors.Is(err, factor.ErrDisconnected) {
				t.Fatalf("an accepted track file fails as an internal error: %v", err)
			}
			if strings.ContainsAny(err.Error(), "\n\r") {
				t.Fatalf("error is not one line: %q", err)
			}
			return
		}
		var doc bytes.Buffer
		if err := export.WriteJSON(&doc, res.Doc); err != nil {
			t.Fatalf("the reconstruction cannot be written: %v", err)
		}
		if err := v.Validate(doc.Bytes()); err != nil {
			t.Fatalf("the reconstruction written is not valid: %v", err)
		}
	})
}
