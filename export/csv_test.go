package export

import (
	"bytes"
	"encoding/csv"
	"errors"
	"fmt"
	"math"
	"strings"
	"testing"

	"trackfactor/track"
)

func sampleTracks() []track.Track {
	return []track.Track{
		{ID: 17, Obs: []track.Observation{{Frame: 0, X: 10.5, Y: 20.25}, {Frame: 1, X: 11.1234567, Y: -1e-9}}},
		{ID: 3, Obs: []track.Observation{{Frame: 1, X: 639, Y: 0}}},
		{ID: 40}, // no observations: no rows
	}
}

func TestWriteTracksCSV(t *testing.T) {
	var b bytes.Buffer
	if err := WriteTracksCSV(&b, sampleTracks()); err != nil {
		t.Fatal(err)
	}
	// Reference rows made with fmt's "%.6f" verb, the format the output
	// contract names; a coordinate that rounds to zero must not carry a
	// minus sign.
	want := "track,frame,x,y\n" +
		fmt.Sprintf("17,0,%.6f,%.6f\n", 10.5, 20.25) +
		fmt.Sprintf("17,1,%.6f,%.6f\n", 11.1234567, 0.0) +
		fmt.Sprintf("3,1,%.6f,%.6f\n", 639.0, 0.0)
	if b.String() != want {
		t.Errorf("got\n%s\nwant\n%s", b.String(), want)
	}
	// Common practice for CSV (RFC 4180): every record has the header's
	// number of fields and no quoting is needed.
	recs, err := csv.NewReader(strings.NewReader(b.String())).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if len(recs) != 4 || strings.Join(recs[0], ",") != TracksCSVHeader {
		t.Errorf("records %q", recs)
	}
}

func TestWriteTracksCSVRefusesNonFinite(t *testing.T) {
	tr := sampleTracks()
	tr[1].Obs[0].Y = math.NaN()
	err := WriteTracksCSV(&bytes.Buffer{}, tr)
	if err == nil || !strings.Contains(err.Error(), "track 3 frame 1") {
		t.Errorf("error %v should name track 3 frame 1", err)
	}
}

type failingWriter struct{ after int }

func (w *failingWriter) Write(p []byte) (int, error) {
	if len(p) > w.after {
		return w.after, errors.New("disk full")
	}
	w.after -= len(p)
	return len(p), nil
}

func TestWriteTracksCSVReportsWriteError(t *testing.T) {
	err := WriteTracksCSV(&failingWriter{after: 5}, sampleTracks())
	if err == nil || !strings.Contains(err.Error(), "disk full") {
		t.Errorf("error %v should report the write failure", err)
	}
}
