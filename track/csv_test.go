package track

import (
	"bytes"
	"math"
	"math/rand"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestCSVRoundTrip writes a Set and reads it back: every position must
// survive within 1e-4 px (the brief's round-trip budget; 6 decimals give
// 5e-7) and quality within 5e-5 (4 decimals). Invented data.
func TestCSVRoundTrip(t *testing.T) {
	rng := rand.New(rand.NewSource(3))
	set := &Set{Width: 640, Height: 480}
	for id := 0; id < 50; id++ {
		tr := Track{ID: id * 3}
		f0 := rng.Intn(10)
		for f := f0; f < f0+2+rng.Intn(20); f++ {
			tr.Obs = append(tr.Obs, Observation{Frame: f, X: rng.Float64() * 639.4, Y: rng.Float64() * 479.4, Quality: rng.Float64()})
		}
		set.Tracks = append(set.Tracks, tr)
	}
	for _, withQ := range []bool{false, true} {
		var buf bytes.Buffer
		if err := WriteCSV(&buf, set, withQ); err != nil {
			t.Fatal(err)
		}
		head := strings.SplitN(buf.String(), "\n", 2)[0]
		want := map[bool]string{false: "track,frame,x,y", true: "track,frame,x,y,quality"}[withQ]
		if head != want {
			t.Fatalf("header %q, want %q", head, want)
		}
		got, err := ReadCSV(&buf, ReadCSVOptions{Width: 640, Height: 480})
		if err != nil {
			t.Fatal(err)
		}
		if len(got.Tracks) != len(set.Tracks) {
			t.Fatalf("%d tracks back, want %d", len(got.Tracks), len(set.Tracks))
		}
		var worst, worstQ float64
		for i, tr := range set.Tracks {
			g := got.Tracks[i]
			if g.ID != tr.ID || len(g.Obs) != len(tr.Obs) {
				t.Fatalf("track %d: got id %d with %d obs, want %d obs", tr.ID, g.ID, len(g.Obs), len(tr.Obs))
			}
			for k, o := range tr.Obs {
				h := g.Obs[k]
				if h.Frame != o.Frame {
					t.Fatalf("track %d obs %d: frame %d, want %d", tr.ID, k, h.Frame, o.Frame)
				}
				worst = math.Max(worst, math.Max(math.Abs(h.X-o.X), math.Abs(h.Y-o.Y)))
				if withQ {
					worstQ = math.Max(worstQ, math.Abs(h.Quality-o.Quality))
				}
			}
		}
		if worst > 1e-4 || worstQ > 5e-5 {
			t.Errorf("round trip error %.2g px (limit 1e-4), quality %.2g (limit 5e-5)", worst, worstQ)
		}
		if n := len(got.Frames); n != 10+20 && n < 2 {
			t.Errorf("frames %d", n)
		}
		if got.Frames[0] != "frame-0" {
			t.Errorf("frame name %q, want frame-0", got.Frames[0])
		}
	}
}

// TestReadCSVFixtures reads the hand-written fixtures of testdata/tracks.
func TestReadCSVFixtures(t *testing.T) {
	open := func(name string) *os.File {
		f, err := os.Open(filepath.Join("..", "testdata", "tracks", name))
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { f.Close() })
		return f
	}
	set, err := ReadCSV(open("small.csv"), ReadCSVOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if len(set.Tracks) != 3 || len(set.Frames) != 3 || set.Tracks[2].ID != 7 || set.Tracks[0].Obs[1].Quality != 0.95 {
		t.Errorf("small.csv read as %+v", set)
	}
	set, err = ReadCSV(open("reordered.csv"), ReadCSVOptions{Frames: []string{"a.png", "b.png"}})
	if err != nil {
		t.Fatal(err)
	}
	if len(set.Tracks) != 2 || set.Tracks[0].ID != 3 || set.Tracks[0].Obs[1].X != 11 || set.Tracks[0].Obs[1].Y != 20.5 || set.Frames[1] != "b.png" {
		t.Errorf("reordered.csv read as %+v", set)
	}
	for name, frag := range map[string]string{
		"duplicate.csv": "line 5: track 0 frame 1 already given on line 3",
		"nan.csv":       "line 3: x:",
		"badheader.csv": "line 1: header lacks column(s) y",
	} {
		_, err := ReadCSV(open(name), ReadCSVOptions{})
		if err == nil || !strings.Contains(err.Error(), frag) {
			t.Errorf("%s: error %v, want it to contain %q", name, err, frag)
		}
	}
}

// TestReadCSVErrors checks every malformed-file case gives its message
// with the right line number.
func TestReadCSVErrors(t *testing.T) {
	sized := ReadCSVOptions{Width: 100, Height: 50}
	cases := []struct {
		name, in string
		opts     ReadCSVOptions
		frag     string
	}{
		{"empty", "", ReadCSVOptions{}, "CSV is empty"},
		{"no header columns", "a,b,c\n", ReadCSVOptions{}, "line 1: header lacks column(s) track,frame,x,y"},
		{"header twice", "track,frame,x,y,x\n", ReadCSVOptions{}, `line 1: column "x" appears twice`},
		{"short row", "track,frame,x,y\n0,0,1,2\n0,1,1\n", ReadCSVOptions{}, "line 3: 3 fields, the header needs 4"},
		{"bad track", "track,frame,x,y\nA,0,1,2\n", ReadCSVOptions{}, `line 2: track "A"`},
		{"negative track", "track,frame,x,y\n-1,0,1,2\n", ReadCSVOptions{}, `line 2: track "-1"`},
		{"bad frame", "track,frame,x,y\n0,1.5,1,2\n", ReadCSVOptions{}, `line 2: frame "1.5" is not an integer`},
		{"negative frame", "track,frame,x,y\n0,0,1,2\n0,-3,1,2\n", ReadCSVOptions{}, "line 3: frame -3 is negative"},
		{"frame past names", "track,frame,x,y\n0,2,1,2\n", ReadCSVOptions{Frames: []string{"a", "b"}}, "line 2: frame 2 but only 2 frames are named"},
		{"frame past limit", "track,frame,x,y\n0,2000000,1,2\n", ReadCSVOptions{}, "line 2: frame 2000000 is above the limit"},
		{"bad x", "track,frame,x,y\n0,0,one,2\n", ReadCSVOptions{}, `line 2: x: "one" is not a number`},
		{"nan y", "track,frame,x,y\n0,0,1,NaN\n", ReadCSVOptions{}, `line 2: y: "NaN" is not a finite number`},
		{"inf x", "track,frame,x,y\n0,0,+Inf,1\n", ReadCSVOptions{}, `line 2: x: "+Inf" is not a finite number`},
		{"bad quality", "track,frame,x,y,quality\n0,0,1,1,q\n", ReadCSVOptions{}, `line 2: quality: "q"`},
		{"duplicate", "track,frame,x,y\n4,0,1,1\n4,1,1,1\n5,1,1,1\n\n4,0,2,2\n", ReadCSVOptions{}, "line 6: track 4 frame 0 already given on line 2"},
		{"outside right", "track,frame,x,y\n0,0,1,1\n0,1,99.5,1\n", sized, "line 3: position (99.5, 1) is outside the 100x50 image"},
		{"outside top", "track,frame,x,y\n0,0,1,-0.6\n", sized, "line 2: position (1, -0.6) is outside"},
		{"bad quote", "track,frame,x,y\n0,0,\"1,1\n", ReadCSVOptions{}, "line 2:"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			_, err := ReadCSV(strings.NewReader(tc.in), tc.opts)
			if err == nil {
				t.Fatalf("no error, want one containing %q", tc.frag)
			}
			if !strings.Contains(err.Error(), tc.frag) || !strings.HasPrefix(err.Error(), "track: ") || strings.Contains(err.Error(), "\n") {
				t.Errorf("error %q, want a one-line track: error containing %q", err, tc.frag)
			}
		})
	}
	// Inside the pixel areas: -0.5 and Width−0.5−ε are valid.
	if _, err := ReadCSV(strings.NewReader("track,frame,x,y\n0,0,-0.5,49.49\n"), sized); err != nil {
		t.Errorf("edge positions rejected: %v", err)
	}
}

// FuzzReadCSV: ReadCSV must never panic, and whatever it accepts must
// satisfy the Set invariants and survive a write/read round trip.
func FuzzReadCSV(f *testing.F) {
	files, _ := filepath.Glob(filepath.Join("..", "testdata", "tracks", "*.csv"))
	for _, p := range files {
		b, err := os.ReadFile(p)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b)
	}
	f.Add([]byte("track,frame,x,y\n0,0,1e308,1\n"))
	f.Fuzz(func(t *testing.T, b []byte) {
		set, err := ReadCSV(bytes.NewReader(b), ReadCSVOptions{MaxFrame: 10000})
		if err != nil {
			if strings.Contains(err.Error(), "\n") || !strings.HasPrefix(err.Error(), "track: ") {
				t.Fatalf("error not one track: line: %q", err)
			}
			return
		}
		for i, tr := range set.Tracks {
			if i > 0 && tr.ID <= set.Tracks[i-1].ID {
				t.Fatalf("ids not increasing")
			}
			for k := 1; k < len(tr.Obs); k++ {
				if tr.Obs[k].Frame <= tr.Obs[k-1].Frame {
					t.Fatalf("frames not increasing in track %d", tr.ID)
				}
			}
		}
		var buf bytes.Buffer
		if err := WriteCSV(&buf, set, true); err != nil {
			t.Fatal(err)
		}
		back, err := ReadCSV(&buf, ReadCSVOptions{MaxFrame: 10000})
		if err != nil {
			t.Fatalf("written file does not read back: %v", err)
		}
		if len(back.Tracks) != len(set.Tracks) {
			t.Fatalf("round trip changed the track count")
		}
	})
}
