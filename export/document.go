package export

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"reflect"
	"sort"
	"strconv"
	"strings"

	"trackfactor/factor"
)

// SchemaID is the value of the "schema" field of reconstruction.json
// written and read by this package.
const SchemaID = "trackfactor/reconstruction@1"

// schemaPrefix is what every version of the format starts with.
const schemaPrefix = "trackfactor/reconstruction@"

// DefaultUnits is the unit written when none is given: image pixels.
const DefaultUnits = "px"

// defaultRGB is the colour given to a point whose track has no colour: a
// mid grey (128,128,128), visible on dark and light backgrounds alike.
func defaultRGB() [3]uint8 { return [3]uint8{128, 128, 128} }

// Document is the content of reconstruction.json. Field names and meanings
// are the output contract (v1); see the schema in schema/.
type Document struct {
	Schema   string   `json:"schema"` // always SchemaID
	Producer Producer `json:"producer"`
	Input    Input    `json:"input"`
	// Settings holds every parameter used, defaults included. Values must
	// be JSON-encodable (numbers, strings, booleans, lists, maps, structs).
	// ReadJSON decodes numbers in it as json.Number, so that a document
	// read and written again is byte-identical.
	Settings    map[string]any `json:"settings"`
	Model       string         `json:"model"` // a factor.Model string
	Units       string         `json:"units"` // unit of xyz and translation, "px" unless a scale was given
	Cameras     []Camera       `json:"cameras"`
	Points      []Point        `json:"points"`
	Diagnostics Diagnostics    `json:"diagnostics"`
}

// Producer names the program and the command that wrote the file.
type Producer struct {
	Version string `json:"version"`
	Command string `json:"command"`
}

// Input describes the frames the reconstruction was made from.
type Input struct {
	Source string   `json:"source"` // folder, video file or synthetic scene
	Frames []string `json:"frames"` // frame names; Camera.Frame indexes this list
	Width  int      `json:"width"`  // image width, px
	Height int      `json:"height"` // image height, px
}

// Camera is one view. Rotation is world→camera with rows image x axis,
// image y axis and viewing direction (the factor.Camera convention).
type Camera struct {
	Frame       int           `json:"frame"`
	Image       string        `json:"image"`
	Rotation    [3][3]float64 `json:"rotation"`
	Translation [3]float64    `json:"translation"`
	Scale       float64       `json:"scale"`
	RMSPx       float64       `json:"rms_px"`
}

// Point is one 3D point, identified by the track it was made from.
type Point struct {
	Track int        `json:"track"`
	XYZ   [3]float64 `json:"xyz"`
	RGB   [3]uint8   `json:"rgb"`
	Views int        `json:"views"`
	RMSPx float64    `json:"rms_px"`
	// Sigma is the point's standard deviation from the refinement's
	// covariance, √(trace Σ/3), in Units; omitted when unknown.
	Sigma *float64 `json:"sigma,omitempty"`
}

// Warning is a diagnostic with a stable code (the factor.Warn* constants)
// and a plain message.
type Warning struct {
	Code    string `json:"code"`
	Message string `json:"message"`
}

// Diagnostics say how far to trust the reconstruction. The first five
// fields are the v1 contract; the others are extra and optional for
// readers.
type Diagnostics struct {
	SingularValues  []float64 `json:"singular_values"`
	RMSPx           float64   `json:"rms_px"`
	ExpectedRMSPx   float64   `json:"expected_rms_px"`
	MirrorAmbiguous bool      `json:"mirror_ambiguous"`
	Warnings        []Warning `json:"warnings"`

	// RankGap is σ3/σ4; nil (written as null) when it is not finite.
	RankGap *float64 `json:"rank_gap"`
	// NoiseSigmaPx is the noise level the residual implies; nil (null)
	// when it is not finite (no redundant measurements).
	NoiseSigmaPx   *float64 `json:"noise_sigma_px"`
	Measurements   int      `json:"measurements"`
	Parameters     int      `json:"parameters"`
	MetricFallback bool     `json:"metric_fallback"`
	// Tracks counts what the tracker found and kept; nil when unknown
	// (the caller fills it in, the reconstruction does not know it).
	Tracks *TrackCounts `json:"tracks,omitempty"`
	// TimingS is wall-clock seconds by stage name; omitted when empty.
	TimingS map[string]float64 `json:"timing_s,omitempty"`

	// Extra reports of later stages, each a JSON object written by the
	// stage (finite numbers only) and omitted when the stage did not run:
	// Refinement is the bundle adjustment summary, Turntable the
	// turntable axis and angles, Mirror the depth-order decision, Scale
	// the metric scale, MissingData the missing-data solver's report and
	// Model the candidates of automatic model choice and the convergence
	// of iterative models.
	Refinement  json.RawMessage `json:"refinement,omitempty"`
	Turntable   json.RawMessage `json:"turntable,omitempty"`
	Mirror      json.RawMessage `json:"mirror,omitempty"`
	Scale       json.RawMessage `json:"scale,omitempty"`
	MissingData json.RawMessage `json:"missing_data,omitempty"`
	Loop        json.RawMessage `json:"loop_closure,omitempty"`
	Model       json.RawMessage `json:"model,omitempty"`
}

// TrackCounts summarise tracking.
type TrackCounts struct {
	Detected int `json:"detected"` // corners detected, all rounds
	Kept     int `json:"kept"`     // tracks used by the reconstruction
	// DroppedByReason counts tracks not used, by the track.Drop* reason
	// that removed them.
	DroppedByReason map[string]int `json:"dropped_by_reason"`
}

// NewDocument builds the document for rec. colours maps track ids to the
// point colour (tracks missing from it, or a nil map, give mid grey
// 128,128,128); in, settings and prod are copied in as given; units "" means
// DefaultUnits. Camera.Image is in.Frames[frame] when the frame is in range,
// "" otherwise. Non-finite rank gap and noise level become nil. rec must not
// be nil.
func NewDocument(rec *factor.Reconstruction, colours map[int][3]uint8, in Input, settings map[string]any, prod Producer, units string) *Document {
	if rec == nil {
		panic("export: NewDocument called with a nil reconstruction")
	}
	if units == "" {
		units = DefaultUnits
	}
	doc := &Document{
		Schema:   SchemaID,
		Producer: prod,
		Input: Input{
			Source: in.Source,
			Frames: append([]string{}, in.Frames...),
			Width:  in.Width,
			Height: in.Height,
		},
		Settings: make(map[string]any, len(settings)),
		Model:    string(rec.Model),
		Units:    units,
		Cameras:  make([]Camera, 0, len(rec.Cameras)),
		Points:   make([]Point, 0, len(rec.Points)),
	}
	for k, v := range settings {
		doc.Settings[k] = v
	}
	for _, c := range rec.Cameras {
		image := ""
		if c.Frame >= 0 && c.Frame < len(in.Frames) {
			image = in.Frames[c.Frame]
		}
		doc.Cameras = append(doc.Cameras, Camera{
			Frame: c.Frame, Image: image, Rotation: c.R, Translation: c.T,
			Scale: c.Scale, RMSPx: c.RMS,
		})
	}
	for _, p := range rec.Points {
		rgb, ok := colours[p.Track]
		if !ok {
			rgb = defaultRGB()
		}
		doc.Points = append(doc.Points, Point{
			Track: p.Track, XYZ: p.X, RGB: rgb, Views: p.Views, RMSPx: p.RMS,
		})
	}
	d := rec.Diagnostics
	doc.Diagnostics = Diagnostics{
		SingularValues:  append([]float64{}, d.SingularValues...),
		RMSPx:           d.RMS,
		ExpectedRMSPx:   d.ExpectedRMS,
		MirrorAmbiguous: d.MirrorAmbiguous,
		Warnings:        make([]Warning, 0, len(d.Warnings)),
		RankGap:         finiteOrNil(d.RankGap),
		NoiseSigmaPx:    finiteOrNil(d.NoiseSigma),
		Measurements:    d.Measurements,
		Parameters:      d.Parameters,
		MetricFallback:  d.MetricFallback,
	}
	for _, w := range d.Warnings {
		doc.Diagnostics.Warnings = append(doc.Diagnostics.Warnings, Warning{Code: w.Code, Message: w.Message})
	}
	return doc
}

func finiteOrNil(v float64) *float64 {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return nil
	}
	return &v
}

// WriteJSON writes doc as indented JSON. The output is deterministic: the
// same document gives the same bytes. Layout: two-space indentation; each
// camera, point and warning on one line; lists of numbers on one line.
// A NaN or infinite number anywhere (settings included) is an error that
// names the field by its JSON pointer; nothing is written then. Nil slices
// and maps of the contract are written as [] and {}.
func WriteJSON(w io.Writer, doc *Document) error {
	if doc == nil {
		return errors.New("export: WriteJSON given no document; build one with NewDocument")
	}
	d := *doc
	if d.Settings == nil {
		d.Settings = map[string]any{}
	}
	if d.Input.Frames == nil {
		d.Input.Frames = []string{}
	}
	if d.Cameras == nil {
		d.Cameras = []Camera{}
	}
	if d.Points == nil {
		d.Points = []Point{}
	}
	if d.Diagnostics.SingularValues == nil {
		d.Diagnostics.SingularValues = []float64{}
	}
	if d.Diagnostics.Warnings == nil {
		d.Diagnostics.Warnings = []Warning{}
	}
	if t := d.Diagnostics.Tracks; t != nil && t.DroppedByReason == nil {
		tc := *t
		tc.DroppedByReason = map[string]int{}
		d.Diagnostics.Tracks = &tc
	}
	if err := checkFinite(reflect.ValueOf(d), nil); err != nil {
		return err
	}
	var compact bytes.Buffer
	enc := json.NewEncoder(&compact)
	enc.SetEscapeHTML(false)
	if err := enc.Encode(d); err != nil {
		return fmt.Errorf("export: cannot encode the reconstruction as JSON: %v; settings may hold only numbers, strings, booleans, lists and maps", err)
	}
	out, err := layoutJSON(bytes.TrimSpace(compact.Bytes()))
	if err != nil {
		return fmt.Errorf("export: internal JSON layout failed: %v; please report this", err)
	}
	out = append(out, '\n')
	if _, err := w.Write(out); err != nil {
		return fmt.Errorf("export: writing reconstruction JSON: %w", err)
	}
	return nil
}

// checkFinite walks v and returns an error naming the first NaN or
// infinite float by JSON pointer. path holds the reference tokens so far
// (the pointer is only built on error). Struct fields are named by their
// json tag; map keys are visited in sorted order so the error is
// deterministic.
func checkFinite(v reflect.Value, path []string) error {
	switch v.Kind() {
	case reflect.Float32, reflect.Float64:
		f := v.Float()
		if math.IsNaN(f) || math.IsInf(f, 0) {
			ptr := ""
			for _, tok := range path {
				ptr += "/" + escapePointer(tok)
			}
			return fmt.Errorf("export: %s is %v, which JSON cannot hold; check the stage that produced it for a numerical failure", pointerText(ptr), f)
		}
	case reflect.Pointer, reflect.Interface:
		if !v.IsNil() {
			return checkFinite(v.Elem(), path)
		}
	case reflect.Slice, reflect.Array:
		if !holdsFloats(v.Type().Elem()) {
			return nil
		}
		for i := 0; i < v.Len(); i++ {
			if err := checkFinite(v.Index(i), append(path, strconv.Itoa(i))); err != nil {
				return err
			}
		}
	case reflect.Map:
		if !holdsFloats(v.Type().Elem()) {
			return nil
		}
		keys := v.MapKeys()
		names := make([]string, len(keys))
		for i, k := range keys {
			names[i] = fmt.Sprint(k.Interface())
		}
		idx := make([]int, len(keys))
		for i := range idx {
			idx[i] = i
		}
		sort.Slice(idx, func(a, b int) bool { return names[idx[a]] < names[idx[b]] })
		for _, i := range idx {
			if err := checkFinite(v.MapIndex(keys[i]), append(path, names[i])); err != nil {
				return err
			}
		}
	case reflect.Struct:
		t := v.Type()
		for i := 0; i < t.NumField(); i++ {
			f := t.Field(i)
			if !f.IsExported() || !holdsFloats(f.Type) {
				continue
			}
			name := f.Name
			if tag, ok := f.Tag.Lookup("json"); ok {
				tn, _, _ := strings.Cut(tag, ",")
				if tn == "-" {
					continue
				}
				if tn != "" {
					name = tn
				}
			}
			if err := checkFinite(v.Field(i), append(path, name)); err != nil {
				return err
			}
		}
	}
	return nil
}

// holdsFloats reports whether a value of type t can contain a float (an
// interface can hold anything); it lets checkFinite skip strings and
// integers without visiting them.
func holdsFloats(t reflect.Type) bool {
	return holdsFloatsSeen(t, map[reflect.Type]bool{})
}

func holdsFloatsSeen(t reflect.Type, seen map[reflect.Type]bool) bool {
	if seen[t] {
		return false // already being looked at (recursive type)
	}
	seen[t] = true
	switch t.Kind() {
	case reflect.Float32, reflect.Float64, reflect.Interface:
		return true
	case reflect.Pointer, reflect.Slice, reflect.Array:
		return holdsFloatsSeen(t.Elem(), seen)
	case reflect.Map:
		return holdsFloatsSeen(t.Elem(), seen)
	case reflect.Struct:
		for i := 0; i < t.NumField(); i++ {
			if t.Field(i).IsExported() && holdsFloatsSeen(t.Field(i).Type, seen) {
				return true
			}
		}
	}
	return false
}

// escapePointer escapes a reference token (RFC 6901 section 3).
func escapePointer(s string) string {
	return strings.ReplaceAll(strings.ReplaceAll(s, "~", "~0"), "/", "~1")
}

func pointerText(ptr string) string {
	if ptr == "" {
		return "the document root"
	}
	return ptr
}

// ReadJSON reads a reconstruction.json. It is strict: the schema string must
// be SchemaID, the document must satisfy the embedded JSON Schema (which
// admits no unknown fields outside settings) and nothing may follow it.
// Numbers inside settings are returned as json.Number.
func ReadJSON(r io.Reader) (*Document, error) {
	data, err := io.ReadAll(r)
	if err != nil {
		return nil, fmt.Errorf("export: reading reconstruction JSON: %w", err)
	}
	var head struct {
		Schema *string `json:"schema"`
	}
	if err := json.Unmarshal(data, &head); err != nil {
		return nil, fmt.Errorf("export: reconstruction JSON cannot be parsed (%v); the file is damaged or not a trackfactor reconstruction", err)
	}
	switch {
	case head.Schema == nil:
		return nil, errors.New(`export: reconstruction JSON has no "schema" field; it is not a trackfactor reconstruction`)
	case *head.Schema == SchemaID:
	case strings.HasPrefix(*head.Schema, schemaPrefix):
		return nil, fmt.Errorf("export: reconstruction JSON has schema %q but this build reads %q; use the trackfactor version that wrote it", *head.Schema, SchemaID)
	default:
		return nil, fmt.Errorf("export: reconstruction JSON has schema %q, not %q; it is not a trackfactor reconstruction", *head.Schema, SchemaID)
	}
	if err := Validate(data); err != nil {
		return nil, err
	}
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.UseNumber()
	dec.DisallowUnknownFields()
	var doc Document
	if err := dec.Decode(&doc); err != nil {
		return nil, fmt.Errorf("export: decoding reconstruction JSON: %v; the file does not match this build's document type", err)
	}
	if doc.Settings == nil {
		doc.Settings = map[string]any{}
	}
	return &doc, nil
}

// layoutJSON re-indents whitespace-free JSON as produced by encoding/json,
// copying every scalar verbatim so that the layout cannot change a number
// or a string. Containers are written on one line when they are empty, an
// array of non-string scalars (rotation rows, xyz, singular values) or an
// element of an array (each camera, point and warning); all others are
// indented by two spaces per level.
func layoutJSON(src []byte) ([]byte, error) {
	l := layout{src: src, out: make([]byte, 0, len(src)+len(src)/4)}
	i, err := l.value(0, 0, false)
	if err != nil {
		return nil, err
	}
	if i != len(src) {
		return nil, fmt.Errorf("unexpected byte at offset %d", i)
	}
	return l.out, nil
}

type layout struct {
	src []byte
	out []byte
}

func (l *layout) newline(depth int) {
	l.out = append(l.out, '\n')
	for k := 0; k < depth; k++ {
		l.out = append(l.out, ' ', ' ')
	}
}

// value writes the value starting at src[i] and returns the offset after it.
func (l *layout) value(i, depth int, inline bool) (int, error) {
	if i >= len(l.src) {
		return i, errors.New("unexpected end")
	}
	switch c := l.src[i]; c {
	case '{', '[':
		return l.container(i, depth, inline)
	case '"':
		end, err := l.skipString(i)
		if err != nil {
			return i, err
		}
		l.out = append(l.out, l.src[i:end]...)
		return end, nil
	default:
		end := i
		for end < len(l.src) && !strings.ContainsRune(",]}:", rune(l.src[end])) {
			end++
		}
		if end == i {
			return i, fmt.Errorf("empty value at offset %d", i)
		}
		l.out = append(l.out, l.src[i:end]...)
		return end, nil
	}
}

func (l *layout) skipString(i int) (int, error) {
	for j := i + 1; j < len(l.src); j++ {
		switch l.src[j] {
		case '\\':
			j++
		case '"':
			return j + 1, nil
		}
	}
	return i, fmt.Errorf("unterminated string at offset %d", i)
}

// scalarArray reports whether the array opening at src[i] holds only
// numbers, booleans and nulls. It stops at the first string or container,
// so no bracket inside a string is ever looked at.
func (l *layout) scalarArray(i int) bool {
	for j := i + 1; j < len(l.src); j++ {
		switch l.src[j] {
		case '"', '{', '[':
			return false
		case ']':
			return true
		}
	}
	return false
}

func (l *layout) container(i, depth int, inline bool) (int, error) {
	open := l.src[i]
	closer := byte('}')
	if open == '[' {
		closer = ']'
	}
	l.out = append(l.out, open)
	i++
	if i < len(l.src) && l.src[i] == closer {
		l.out = append(l.out, closer)
		return i + 1, nil
	}
	inline = inline || (open == '[' && l.scalarArray(i-1))
	for first := true; ; first = false {
		if !first {
			l.out = append(l.out, ',')
			if inline {
				l.out = append(l.out, ' ')
			}
		}
		if !inline {
			l.newline(depth + 1)
		}
		if open == '{' {
			if i >= len(l.src) || l.src[i] != '"' {
				return i, fmt.Errorf("expected key at offset %d", i)
			}
			end, err := l.skipString(i)
			if err != nil {
				return i, err
			}
			if end >= len(l.src) || l.src[end] != ':' {
				return i, fmt.Errorf("expected ':' at offset %d", end)
			}
			l.out = append(l.out, l.src[i:end]...)
			l.out = append(l.out, ':', ' ')
			i = end + 1
		}
		var err error
		if i, err = l.value(i, depth+1, inline || open == '['); err != nil {
			return i, err
		}
		if i >= len(l.src) {
			return i, errors.New("unexpected end")
		}
		switch l.src[i] {
		case ',':
			i++
		case closer:
			if !inline {
				l.newline(depth)
			}
			l.out = append(l.out, closer)
			return i + 1, nil
		default:
			return i, fmt.Errorf("unexpected %q at offset %d", l.src[i], i)
		}
	}
}
