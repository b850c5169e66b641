package track

import (
	"bufio"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"sort"
	"strconv"
	"strings"
)

// CSV track files: a header line, then one row per observation.
//
//	track,frame,x,y[,quality]
//	0,0,101.2500,57.0000
//
// Positions are written with 6 decimals (1e-6 px; a round trip keeps
// positions to 5e-7 px) and quality with 4.

// WriteCSV writes set's observations as CSV, sorted by track id then
// frame (the order of set.Tracks and their Obs). withQuality adds the
// quality column.
func WriteCSV(w io.Writer, set *Set, withQuality bool) error {
	bw := bufio.NewWriter(w)
	if withQuality {
		bw.WriteString("track,frame,x,y,quality\n")
	} else {
		bw.WriteString("track,frame,x,y\n")
	}
	var buf []byte
	for _, t := range set.Tracks {
		for _, o := range t.Obs {
			buf = buf[:0]
			buf = strconv.AppendInt(buf, int64(t.ID), 10)
			buf = append(buf, ',')
			buf = strconv.AppendInt(buf, int64(o.Frame), 10)
			buf = append(buf, ',')
			buf = strconv.AppendFloat(buf, o.X, 'f', 6, 64)
			buf = append(buf, ',')
			buf = strconv.AppendFloat(buf, o.Y, 'f', 6, 64)
			if withQuality {
				buf = append(buf, ',')
				buf = strconv.AppendFloat(buf, o.Quality, 'f', 4, 64)
			}
			buf = append(buf, '\n')
			if _, err := bw.Write(buf); err != nil {
				return fmt.Errorf("track: write CSV: %w", err)
			}
		}
	}
	if err := bw.Flush(); err != nil {
		return fmt.Errorf("track: write CSV: %w", err)
	}
	return nil
}

// ReadCSVOptions configures ReadCSV. The zero value reads any valid file.
type ReadCSVOptions struct {
	// Width and Height, when both positive, are the image size: positions
	// outside [-0.5, Width−0.5) × [-0.5, Height−0.5) (the pixel areas of
	// the image) are errors. Zero means unknown: no check, and the Set's
	// size stays 0.
	Width, Height int
	// Frames, when not nil, names the frames; frame numbers in the file
	// must then be below len(Frames). Otherwise frames are named
	// "frame-N" for N = 0 .. the largest frame number in the file.
	Frames []string
	// MaxFrame rejects frame numbers above it (a guard against files that
	// would make huge frame lists). Default 1_000_000.
	MaxFrame int
}

const defaultMaxFrame = 1_000_000

// ReadCSV reads a track file written by WriteCSV or by hand. The header
// must name the columns track, frame, x and y in any order; other columns
// (quality is used when present) are ignored. Errors name the line:
// malformed rows, a missing column, duplicate (track, frame) pairs, NaN or
// infinite values, negative frames or track ids, and positions outside the
// image when its size is known. Tracks come out sorted by id, their
// observations by frame; Stats.Detected is the number of tracks.
func ReadCSV(r io.Reader, opts ReadCSVOptions) (*Set, error) {
	maxFrame := opts.MaxFrame
	if maxFrame <= 0 {
		maxFrame = defaultMaxFrame
	}
	if opts.Frames != nil {
		maxFrame = len(opts.Frames) - 1
	}
	checkSize := opts.Width > 0 && opts.Height > 0
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1
	cr.ReuseRecord = true
	cr.TrimLeadingSpace = true
	cr.Comment = 0
	head, err := cr.Read()
	if err == io.EOF {
		return nil, errors.New("track: CSV is empty; expected a header line track,frame,x,y")
	}
	if err != nil {
		return nil, csvErr(err)
	}
	col := map[string]int{"track": -1, "frame": -1, "x": -1, "y": -1, "quality": -1}
	for i, h := range head {
		h = strings.ToLower(strings.TrimSpace(strings.TrimPrefix(h, "\ufeff")))
		if c, ok := col[h]; ok {
			if c >= 0 {
				return nil, fmt.Errorf("track: CSV line 1: column %q appears twice", h)
			}
			col[h] = i
		}
	}
	var missing []string
	for _, k := range []string{"track", "frame", "x", "y"} {
		if col[k] < 0 {
			missing = append(missing, k)
		}
	}
	if len(missing) > 0 {
		return nil, fmt.Errorf("track: CSV line 1: header lacks column(s) %s; it must name track,frame,x,y (in any order)", strings.Join(missing, ","))
	}
	need := max(col["track"], col["frame"], col["x"], col["y"], col["quality"]) + 1
	type row struct {
		o    Observation
		line int
	}
	byID := map[int][]row{}
	maxSeen := -1
	for {
		rec, err := cr.Read()
		if err == io.EOF {
			break
		}
		if err != nil {
			return nil, csvErr(err)
		}
		line, _ := cr.FieldPos(0)
		if len(rec) == 1 && strings.TrimSpace(rec[0]) == "" {
			continue
		}
		if len(rec) < need {
			return nil, fmt.Errorf("track: CSV line %d: %d fields, the header needs %d", line, len(rec), need)
		}
		id, err := strconv.Atoi(strings.TrimSpace(rec[col["track"]]))
		if err != nil || id < 0 {
			return nil, fmt.Errorf("track: CSV line %d: track %q is not a non-negative integer", line, rec[col["track"]])
		}
		fr, err := strconv.Atoi(strings.TrimSpace(rec[col["frame"]]))
		if err != nil {
			return nil, fmt.Errorf("track: CSV line %d: frame %q is not an integer", line, rec[col["frame"]])
		}
		if fr < 0 {
			return nil, fmt.Errorf("track: CSV line %d: frame %d is negative; frames are numbered from 0", line, fr)
		}
		if fr > maxFrame {
			if opts.Frames != nil {
				return nil, fmt.Errorf("track: CSV line %d: frame %d but only %d frames are named", line, fr, len(opts.Frames))
			}
			return nil, fmt.Errorf("track: CSV line %d: frame %d is above the limit %d (ReadCSVOptions.MaxFrame)", line, fr, maxFrame)
		}
		x, err := parseFinite(rec[col["x"]])
		if err != nil {
			return nil, fmt.Errorf("track: CSV line %d: x: %v", line, err)
		}
		y, err := parseFinite(rec[col["y"]])
		if err != nil {
			return nil, fmt.Errorf("track: CSV line %d: y: %v", line, err)
		}
		q := 0.0
		if c := col["quality"]; c >= 0 {
			if q, err = parseFinite(rec[c]); err != nil {
				return nil, fmt.Errorf("track: CSV line %d: quality: %v", line, err)
			}
		}
		if checkSize && (x < -0.5 || y < -0.5 || x >= float64(opts.Width)-0.5 || y >= float64(opts.Height)-0.5) {
			return nil, fmt.Errorf("track: CSV line %d: position (%g, %g) is outside the %dx%d image", line, x, y, opts.Width, opts.Height)
		}
		byID[id] = append(byID[id], row{Observation{Frame: fr, X: x, Y: y, Quality: q}, line})
		maxSeen = max(maxSeen, fr)
	}
	set := &Set{}
	if checkSize {
		set.Width, set.Height = opts.Width, opts.Height
	}
	ids := make([]int, 0, len(byID))
	for id := range byID {
		ids = append(ids, id)
	}
	sort.Ints(ids)
	for _, id := range ids {
		rows := byID[id]
		sort.SliceStable(rows, func(i, j int) bool { return rows[i].o.Frame < rows[j].o.Frame })
		t := Track{ID: id, Obs: make([]Observation, len(rows))}
		for i, rw := range rows {
			if i > 0 && rw.o.Frame == rows[i-1].o.Frame {
				first, second := min(rw.line, rows[i-1].line), max(rw.line, rows[i-1].line)
				return nil, fmt.Errorf("track: CSV line %d: track %d frame %d already given on line %d; each (track, frame) pair may appear once", second, id, rw.o.Frame, first)
			}
			t.Obs[i] = rw.o
		}
		set.Tracks = append(set.Tracks, t)
	}
	if opts.Frames != nil {
		set.Frames = append([]string(nil), opts.Frames...)
	} else {
		set.Frames = make([]string, maxSeen+1)
		for i := range set.Frames {
			set.Frames[i] = "frame-" + strconv.Itoa(i)
		}
	}
	set.Stats.Detected = len(set.Tracks)
	set.Stats.Ended = map[string]int{}
	return set, nil
}

func parseFinite(s string) (float64, error) {
	v, err := strconv.ParseFloat(strings.TrimSpace(s), 64)
	if err != nil {
		return 0, fmt.Errorf("%q is not a number", s)
	}
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return 0, fmt.Errorf("%q is not a finite number", s)
	}
	return v, nil
}

func csvErr(err error) error {
	var pe *csv.ParseError
	if errors.As(err, &pe) {
		return fmt.Errorf("track: CSV line %d: %v", pe.StartLine, pe.Err)
	}
	return fmt.Errorf("track: read CSV: %w", err)
}
