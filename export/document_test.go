package export

import (
	"bytes"
	"encoding/json"
	"flag"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"sort"
	"strconv"
	"strings"
	"testing"

	"trackfactor/factor"
)

var update = flag.Bool("update", false, "rewrite golden files in testdata")

// sampleReconstruction is a small hand-made reconstruction: two
// orthographic views (identity and a 30° turn about the y axis) and three
// points, with diagnostics that exercise every field.
func sampleReconstruction() *factor.Reconstruction {
	c, s := math.Cos(math.Pi/6), math.Sin(math.Pi/6)
	return &factor.Reconstruction{
		Model: factor.Orthographic,
		Cameras: []factor.Camera{
			{Frame: 0, R: [3][3]float64{{1, 0, 0}, {0, 1, 0}, {0, 0, 1}}, T: [3]float64{320, 240, 0}, Scale: 1, RMS: 0.2},
			{Frame: 1, R: [3][3]float64{{c, 0, -s}, {0, 1, 0}, {s, 0, c}}, T: [3]float64{321.5, 239.25, 0}, Scale: 1, RMS: 0.1875},
		},
		Points: []factor.Point{
			{Track: 17, X: [3]float64{0.1, 2.0, -3.5}, Views: 2, RMS: 0.21},
			{Track: 3, X: [3]float64{-12.25, 1e-7, 4.75}, Views: 2, RMS: 0.05},
			{Track: 40, X: [3]float64{1.0 / 3, -2.0 / 3, 1e21}, Views: 2, RMS: 0},
		},
		Diagnostics: factor.Diagnostics{
			SingularValues:  []float64{812.5, 301.25, 97.125, 0.5},
			RankGap:         194.25,
			RMS:             0.19,
			NoiseSigma:      0.23,
			ExpectedRMS:     0.18,
			Measurements:    12,
			Parameters:      4,
			MirrorAmbiguous: true,
			Warnings:        []factor.Warning{{Code: factor.WarnMirror, Message: "the mirror image fits equally well"}},
		},
	}
}

func sampleSettings() map[string]any {
	return map[string]any{
		"model":        "orthographic",
		"noise_sigma":  0.0,
		"max_corners":  500,
		"fb_threshold": 0.75,
		"refine":       true,
		"pyramid":      map[string]any{"levels": 3, "window": []int{21, 21}},
		"frames":       []string{"000.png", "001.png"},
	}
}

func goldenDocument() *Document {
	doc := NewDocument(sampleReconstruction(),
		map[int][3]uint8{17: {128, 120, 99}, 3: {0, 255, 7}}, // track 40 gets the default grey
		Input{Source: "scene/turntable", Frames: []string{"000.png", "001.png"}, Width: 640, Height: 480},
		sampleSettings(),
		Producer{Version: "0.1.0", Command: "trackfactor run --model orthographic scene <out> & more"},
		"mm")
	doc.Diagnostics.Tracks = &TrackCounts{Detected: 120, Kept: 3, DroppedByReason: map[string]int{"forward-backward": 7, "left-image": 2}}
	doc.Diagnostics.TimingS = map[string]float64{"track": 1.5, "factor": 0.25}
	return doc
}

func writeJSON(t *testing.T, doc *Document) []byte {
	t.Helper()
	var b bytes.Buffer
	if err := WriteJSON(&b, doc); err != nil {
		t.Fatalf("WriteJSON: %v", err)
	}
	return b.Bytes()
}

func TestNewDocumentCopiesReconstruction(t *testing.T) {
	rec := sampleReconstruction()
	doc := goldenDocument()
	if doc.Schema != SchemaID || doc.Model != "orthographic" || doc.Units != "mm" {
		t.Fatalf("header fields: schema %q model %q units %q", doc.Schema, doc.Model, doc.Units)
	}
	for i, c := range doc.Cameras {
		rc := rec.Cameras[i]
		if c.Frame != rc.Frame || c.Rotation != rc.R || c.Translation != rc.T || c.Scale != rc.Scale || c.RMSPx != rc.RMS {
			t.Errorf("camera %d = %+v, reconstruction has %+v", i, c, rc)
		}
		if want := doc.Input.Frames[rc.Frame]; c.Image != want {
			t.Errorf("camera %d image %q, want %q", i, c.Image, want)
		}
	}
	wantRGB := [][3]uint8{{128, 120, 99}, {0, 255, 7}, {128, 128, 128}}
	for i, p := range doc.Points {
		rp := rec.Points[i]
		if p.Track != rp.Track || p.XYZ != rp.X || p.Views != rp.Views || p.RMSPx != rp.RMS || p.RGB != wantRGB[i] {
			t.Errorf("point %d = %+v, reconstruction has %+v and colour %v", i, p, rp, wantRGB[i])
		}
	}
	d := doc.Diagnostics
	if *d.RankGap != 194.25 || *d.NoiseSigmaPx != 0.23 || d.Measurements != 12 || d.Parameters != 4 || !d.MirrorAmbiguous {
		t.Errorf("diagnostics not copied: %+v", d)
	}
	if len(d.Warnings) != 1 || d.Warnings[0].Code != factor.WarnMirror {
		t.Errorf("warnings = %+v", d.Warnings)
	}
}

func TestNewDocumentDefaults(t *testing.T) {
	rec := sampleReconstruction()
	rec.Diagnostics.RankGap = math.Inf(1)   // σ4 = 0: exactly rank 3
	rec.Diagnostics.NoiseSigma = math.NaN() // n = d: no redundancy
	rec.Cameras[1].Frame = 7                // no frame name for it
	doc := NewDocument(rec, nil, Input{Frames: []string{"a.png"}, Width: 4, Height: 3}, nil, Producer{}, "")
	if doc.Units != DefaultUnits {
		t.Errorf("units %q, want %q", doc.Units, DefaultUnits)
	}
	if doc.Diagnostics.RankGap != nil || doc.Diagnostics.NoiseSigmaPx != nil {
		t.Errorf("non-finite ratios should become nil, got %v %v", doc.Diagnostics.RankGap, doc.Diagnostics.NoiseSigmaPx)
	}
	if doc.Cameras[1].Image != "" {
		t.Errorf("out-of-range frame got image %q", doc.Cameras[1].Image)
	}
	if doc.Settings == nil {
		t.Error("settings must be an empty map, not nil")
	}
	for _, p := range doc.Points {
		if p.RGB != [3]uint8{128, 128, 128} {
			t.Errorf("point %d colour %v, want the documented grey", p.Track, p.RGB)
		}
	}
	out := writeJSON(t, doc)
	if !bytes.Contains(out, []byte(`"rank_gap": null`)) || !bytes.Contains(out, []byte(`"noise_sigma_px": null`)) {
		t.Errorf("undefined ratios not written as null:\n%s", out)
	}
	if err := Validate(out); err != nil {
		t.Errorf("document with null ratios does not validate: %v", err)
	}
}

// The field names of the output contract, copied from DESIGN.md
// ("Output contract (v1)"). The written file must use exactly these for
// the contract's objects (diagnostics may hold more).
func TestWriteJSONUsesContractFieldNames(t *testing.T) {
	var m map[string]any
	if err := json.Unmarshal(writeJSON(t, goldenDocument()), &m); err != nil {
		t.Fatal(err)
	}
	keys := func(v any) []string {
		var ks []string
		for k := range v.(map[string]any) {
			ks = append(ks, k)
		}
		sort.Strings(ks)
		return ks
	}
	sorted := func(s ...string) []string { sort.Strings(s); return s }
	checks := []struct {
		what string
		got  []string
		want []string
	}{
		{"top level", keys(m), sorted("schema", "producer", "input", "settings", "model", "units", "cameras", "points", "diagnostics")},
		{"producer", keys(m["producer"]), sorted("version", "command")},
		{"input", keys(m["input"]), sorted("source", "frames", "width", "height")},
		{"cameras[0]", keys(m["cameras"].([]any)[0]), sorted("frame", "image", "rotation", "translation", "scale", "rms_px")},
		{"points[0]", keys(m["points"].([]any)[0]), sorted("track", "xyz", "rgb", "views", "rms_px")},
		{"warnings[0]", keys(m["diagnostics"].(map[string]any)["warnings"].([]any)[0]), sorted("code", "message")},
	}
	for _, c := range checks {
		if !reflect.DeepEqual(c.got, c.want) {
			t.Errorf("%s keys = %v, contract says %v", c.what, c.got, c.want)
		}
	}
	diag := m["diagnostics"].(map[string]any)
	for _, k := range []string{"singular_values", "rms_px", "expected_rms_px", "mirror_ambiguous", "warnings"} {
		if _, ok := diag[k]; !ok {
			t.Errorf("diagnostics lacks contract field %q", k)
		}
	}
	if m["schema"] != "trackfactor/reconstruction@1" {
		t.Errorf("schema = %v", m["schema"])
	}
}

// Identical input must give identical bytes, and a file read back and
// written again must not change by a byte.
func TestWriteJSONRoundTripByteIdentical(t *testing.T) {
	first := writeJSON(t, goldenDocument())
	if again := writeJSON(t, goldenDocument()); !bytes.Equal(first, again) {
		t.Fatal("two writes of the same document differ")
	}
	doc, err := ReadJSON(bytes.NewReader(first))
	if err != nil {
		t.Fatalf("ReadJSON of a written file: %v", err)
	}
	second := writeJSON(t, doc)
	if !bytes.Equal(first, second) {
		t.Fatalf("round trip changed the file:\n--- first\n%s\n--- second\n%s", first, second)
	}
	// The typed part must come back exactly (float64 values too).
	want := goldenDocument()
	if !reflect.DeepEqual(doc.Cameras, want.Cameras) || !reflect.DeepEqual(doc.Points, want.Points) ||
		!reflect.DeepEqual(doc.Input, want.Input) || !reflect.DeepEqual(doc.Diagnostics, want.Diagnostics) {
		t.Errorf("round trip changed values:\n got %+v\nwant %+v", doc, want)
	}
}

// Numbers must read back to the same float64 (shortest round-trip form)
// and follow the JSON number grammar of RFC 8259 section 6.
func TestWriteJSONNumbersRoundTrip(t *testing.T) {
	values := []float64{0.1, 1.0 / 3, 1e-7, 1e21, 123456789.125, 5e-324, math.MaxFloat64, -2.5e-300, math.Copysign(0, -1)}
	doc := goldenDocument()
	doc.Diagnostics.SingularValues = nil
	doc.Points = nil
	for i, v := range values {
		doc.Points = append(doc.Points, Point{Track: i, XYZ: [3]float64{v, -v, v}, Views: 1})
	}
	out := writeJSON(t, doc)
	if !json.Valid(out) {
		t.Fatal("output is not valid JSON")
	}
	var raw struct {
		Points []struct {
			XYZ []json.Number `json:"xyz"`
		} `json:"points"`
	}
	if err := json.Unmarshal(out, &raw); err != nil {
		t.Fatal(err)
	}
	for i, v := range values {
		got, err := strconv.ParseFloat(string(raw.Points[i].XYZ[0]), 64)
		if err != nil || math.Float64bits(got) != math.Float64bits(v) {
			t.Errorf("value %v written as %q, reads back as %v", v, raw.Points[i].XYZ[0], got)
		}
	}
}

func TestWriteJSONRefusesNonFinite(t *testing.T) {
	cases := []struct {
		name    string
		mutate  func(d *Document)
		pointer string
	}{
		{"rotation NaN", func(d *Document) { d.Cameras[1].Rotation[1][2] = math.NaN() }, "/cameras/1/rotation/1/2"},
		{"point +Inf", func(d *Document) { d.Points[2].XYZ[0] = math.Inf(1) }, "/points/2/xyz/0"},
		{"rms -Inf", func(d *Document) { d.Diagnostics.RMSPx = math.Inf(-1) }, "/diagnostics/rms_px"},
		{"singular value", func(d *Document) { d.Diagnostics.SingularValues[3] = math.NaN() }, "/diagnostics/singular_values/3"},
		{"rank gap pointer", func(d *Document) { v := math.Inf(1); d.Diagnostics.RankGap = &v }, "/diagnostics/rank_gap"},
		{"settings nested", func(d *Document) { d.Settings["pyramid"] = map[string]any{"scale/x": math.NaN()} }, "/settings/pyramid/scale~1x"},
		{"timing", func(d *Document) { d.Diagnostics.TimingS["factor"] = math.NaN() }, "/diagnostics/timing_s/factor"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			doc := goldenDocument()
			c.mutate(doc)
			var b bytes.Buffer
			err := WriteJSON(&b, doc)
			if err == nil {
				t.Fatal("no error")
			}
			if !strings.Contains(err.Error(), c.pointer+" is ") || !strings.HasPrefix(err.Error(), "export: ") {
				t.Errorf("error %q does not name %s", err, c.pointer)
			}
			if b.Len() != 0 {
				t.Errorf("%d bytes written despite the error", b.Len())
			}
		})
	}
}

func TestWriteJSONNilSlicesAndNoHTMLEscaping(t *testing.T) {
	doc := &Document{Schema: SchemaID, Model: "perspective", Units: "px", Input: Input{Width: 1, Height: 1},
		Producer: Producer{Command: "a<b && c>d"}}
	out := writeJSON(t, doc)
	for _, want := range []string{`"cameras": []`, `"points": []`, `"settings": {}`, `"frames": []`, `"warnings": []`, `"command": "a<b && c>d"`} {
		if !bytes.Contains(out, []byte(want)) {
			t.Errorf("output lacks %s:\n%s", want, out)
		}
	}
	if err := Validate(out); err != nil {
		t.Errorf("empty document does not validate: %v", err)
	}
}

// The layout is part of the format people read and diff; the golden file
// pins it. Run with -update after an intended change.
func TestWriteJSONGolden(t *testing.T) {
	out := writeJSON(t, goldenDocument())
	path := filepath.Join("testdata", "reconstruction.golden.json")
	if *update {
		if err := os.WriteFile(path, out, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (run with -update to create it)", err)
	}
	if !bytes.Equal(out, want) {
		t.Errorf("output differs from %s (run with -update if intended):\n%s", path, out)
	}
	if err := Validate(want); err != nil {
		t.Errorf("golden file does not validate: %v", err)
	}
}

func TestReadJSONStrict(t *testing.T) {
	good := writeJSON(t, goldenDocument())
	replace := func(old, new string) []byte {
		if !bytes.Contains(good, []byte(old)) {
			t.Fatalf("sample lacks %q", old)
		}
		return bytes.Replace(good, []byte(old), []byte(new), 1)
	}
	cases := []struct {
		name string
		data []byte
		want string
	}{
		{"newer version", replace(`"trackfactor/reconstruction@1"`, `"trackfactor/reconstruction@2"`), `this build reads "trackfactor/reconstruction@1"`},
		{"foreign schema", replace(`"trackfactor/reconstruction@1"`, `"something/else"`), "not a trackfactor reconstruction"},
		{"no schema", replace(`"schema": "trackfactor/reconstruction@1",`, ``), `no "schema" field`},
		{"not json", []byte("ply\nformat ascii 1.0\n"), "cannot be parsed"},
		{"unknown field", replace(`"units": "mm",`, `"units": "mm", "colour": 1,`), "additionalProperties"},
		{"trailing data", append(append([]byte{}, good...), []byte("{}")...), "cannot be parsed"},
		{"short rotation", replace(`[[1, 0, 0], [0, 1, 0], [0, 0, 1]]`, `[[1, 0, 0], [0, 1, 0]]`), "/cameras/0/rotation"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			doc, err := ReadJSON(bytes.NewReader(c.data))
			if err == nil {
				t.Fatalf("accepted, got %+v", doc)
			}
			if !strings.Contains(err.Error(), c.want) || strings.Contains(err.Error(), "\n") {
				t.Errorf("error %q: want one line containing %q", err, c.want)
			}
		})
	}
}

func BenchmarkWriteJSON(b *testing.B) {
	doc := goldenDocument()
	pts := make([]Point, 10000)
	for i := range pts {
		pts[i] = Point{Track: i, XYZ: [3]float64{float64(i) / 7, -float64(i) / 3, 1}, Views: 20, RMSPx: 0.2}
	}
	doc.Points = pts
	var buf bytes.Buffer
	for b.Loop() {
		buf.Reset()
		if err := WriteJSON(&buf, doc); err != nil {
			b.Fatal(err)
		}
	}
}
