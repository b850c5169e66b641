package export

import (
	"bufio"
	"fmt"
	"io"
	"math"
	"strconv"

	"trackfactor/track"
)

// TracksCSVHeader is the first line of tracks.csv.
const TracksCSVHeader = "track,frame,x,y"

// WriteTracksCSV writes tracks as tracks.csv: the header line
// "track,frame,x,y", then one row per observation in the order given
// (tracks in slice order, observations in frame order), coordinates in
// pixels with six decimals ("%.6f"; a value that rounds to zero is written
// as 0.000000, never -0.000000). Pass exactly the observations the
// reconstruction used. A NaN or infinite coordinate is an error naming the
// track and frame.
func WriteTracksCSV(w io.Writer, tracks []track.Track) error {
	bw := bufio.NewWriter(w)
	bw.WriteString(TracksCSVHeader)
	bw.WriteByte('\n')
	var line []byte
	for _, t := range tracks {
		for _, o := range t.Obs {
			for _, v := range [2]float64{o.X, o.Y} {
				if math.IsNaN(v) || math.IsInf(v, 0) {
					return fmt.Errorf("export: track %d frame %d has coordinate %v; drop the observation before writing tracks.csv", t.ID, o.Frame, v)
				}
			}
			line = line[:0]
			line = strconv.AppendInt(line, int64(t.ID), 10)
			line = append(line, ',')
			line = strconv.AppendInt(line, int64(o.Frame), 10)
			line = append(line, ',')
			line = appendFixed6(line, o.X)
			line = append(line, ',')
			line = appendFixed6(line, o.Y)
			line = append(line, '\n')
			if _, err := bw.Write(line); err != nil {
				return fmt.Errorf("export: writing tracks.csv: %w", err)
			}
		}
	}
	if err := bw.Flush(); err != nil {
		return fmt.Errorf("export: writing tracks.csv: %w", err)
	}
	return nil
}

// appendFixed6 appends v as "%.6f", writing negative zero as 0.000000.
func appendFixed6(b []byte, v float64) []byte {
	start := len(b)
	b = strconv.AppendFloat(b, v, 'f', 6, 64)
	if string(b[start:]) == "-0.000000" {
		b = append(b[:start], "0.000000"...)
	}
	return b
}
