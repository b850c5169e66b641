package report

import (
	"bufio"
	_ "embed"
	"encoding/json"
	"errors"
	"fmt"
	"html/template"
	"image"
	"io"
	"math"
	"path"
	"path/filepath"
	"sort"
	"strconv"
	"strings"

	"trackfactor/export"
	"trackfactor/factor"
)

//go:embed assets/report.html.tmpl
var pageTemplate string

//go:embed assets/style.css
var styleCSS string

//go:embed assets/view3d.js
var viewJS string

// Extras is what a report can show beyond reconstruction.json. Every field
// is optional; the zero value gives a report from the document alone.
type Extras struct {
	// Kept are the tracks the reconstruction used (the rows of
	// tracks.csv); nil when unknown (the track-length plot then uses
	// points[].views and the frames show no tracks).
	Kept []Track
	// Rejected are the tracks not used, each with its Reason
	// (ReasonOutlier for tracks the reconstruction rejected).
	Rejected []Track
	// Frame returns input frame i (an index into doc.Input.Frames); nil
	// when the frames are not available. FolderFrames makes one for a
	// folder of images.
	Frame func(i int) (image.Image, error)
	// ShowFrames are the frame indices to show; nil means the first,
	// middle and last frame that has a camera.
	ShowFrames []int
	// TurntableDeg is the turntable angle of each camera (in the order of
	// doc.Cameras); nil means diagnostics.turntable from the document,
	// when it has one.
	TurntableDeg []float64
	// Name is the title of the report; "" means the last element of
	// doc.Input.Source.
	Name string
	// Files are the result files beside the report, linked from its
	// footer (names relative to the report).
	Files []string
}

// FailureInfo describes a capture that gave no reconstruction, for
// WriteFailure.
type FailureInfo struct {
	Name     string // title; "" means the last element of Input
	Input    string // the frames folder or video
	Err      error  // what went wrong (its message is shown as is)
	Kind     FailureKind
	Do       []string // what to do; nil means the advice for Kind
	Settings map[string]any
	Producer export.Producer
}

// FailureKind classifies a failure for its advice.
type FailureKind string

// Failure kinds (the CLI maps its exit codes onto them).
const (
	FailInput       FailureKind = "input"       // bad or unusable input
	FailUnsolvable  FailureKind = "unsolvable"  // the data allow no reconstruction
	FailInterrupted FailureKind = "interrupted" // the run was stopped
	FailInternal    FailureKind = "internal"    // a fault of the program
)

func (k FailureKind) advice() []string {
	switch k {
	case FailInput:
		return []string{
			"Read the message above: it names the file or setting at fault.",
			"Check that the folder holds at least 3 frames of one size (PNG, JPEG, TIFF or BMP) or a video OpenCV can read.",
			"If too few tracks were found, track more corners (--corners, lower --quality) or use frames closer together (--step).",
		}
	case FailUnsolvable:
		return []string{
			"Make sure the part turns between frames (at least about 10° over the sequence) and has depth relief.",
			"Keep the background out of the picture (--mask or --roi) so that only the part is tracked.",
			"Use more frames or frames closer together, so that tracks last longer.",
		}
	case FailInterrupted:
		return []string{"Run the capture again; nothing of the interrupted run was kept."}
	}
	return []string{"This is a fault of trackfactor, not of the capture: run it again, and report the message above if it repeats."}
}

// Write writes the report of a reconstruction to w as one self-contained
// HTML page: no network access, no external scripts, styles or fonts.
func Write(w io.Writer, doc *export.Document, extras Extras) error {
	if doc == nil {
		return errors.New("report: Write given no document; use WriteFailure for a capture without a reconstruction")
	}
	p, err := buildPage(doc, extras)
	if err != nil {
		return err
	}
	return render(w, p)
}

// WriteFailure writes the report of a capture that gave no reconstruction:
// the verdict "failed", the error and what to do.
func WriteFailure(w io.Writer, info FailureInfo) error {
	name := info.Name
	if name == "" {
		name = baseName(info.Input)
	}
	msg := "unknown error"
	if info.Err != nil {
		msg = info.Err.Error()
	}
	kind := info.Kind
	if kind == "" {
		kind = FailInternal
	}
	do := info.Do
	if do == nil {
		do = kind.advice()
	}
	p := &page{
		Name:         name,
		Version:      info.Producer.Version,
		VerdictWord:  string(Failed),
		VerdictClass: "failed",
		Badge:        badge(Failed),
		Reasons:      []string{failureHeadline(kind)},
		Failure:      &failureView{Error: msg, Do: do},
		Inputs: []kv{
			{"input", info.Input},
			{"command", info.Producer.Command},
		},
		Settings: flatten(info.Settings),
	}
	return render(w, p)
}

func failureHeadline(k FailureKind) string {
	switch k {
	case FailInput:
		return "No reconstruction: the input could not be used."
	case FailUnsolvable:
		return "No reconstruction: the frames do not contain enough information for one."
	case FailInterrupted:
		return "No reconstruction: the run was interrupted."
	}
	return "No reconstruction: trackfactor stopped with an internal error."
}

type kv struct{ K, V string }

type tile struct{ K, V, S string }

type warnView struct {
	Class, Kind, Title, Code, Means, Do, Message string
}

type failureView struct {
	Error string
	Do    []string
}

type page struct {
	Name, Version             string
	VerdictWord, VerdictClass string
	Headline                  string
	Badge                     template.HTML
	Reasons                   []string
	Failure                   *failureView
	Tiles                     []tile
	Warnings                  []warnView
	NPoints, NCameras         int
	FirstFrame                int
	Legend                    template.HTML
	FrameNote                 string
	Frames                    []frameViewHTML
	Plots                     []figureHTML
	Inputs                    []kv
	Settings                  []kv
	Files                     []string
	CSS                       template.CSS
	JS                        template.JS
	Data                      template.JS
}

type frameViewHTML struct {
	Frame, Kept, Outlier, Other int
	Name                        string
	SVG                         template.HTML
}

type figureHTML struct {
	ID, Caption string
	SVG         template.HTML
}

func buildPage(doc *export.Document, ex Extras) (*page, error) {
	j := Judge(doc)
	name := ex.Name
	if name == "" {
		name = baseName(doc.Input.Source)
	}
	p := &page{
		Name:         name,
		Version:      doc.Producer.Version,
		VerdictWord:  string(j.Verdict),
		VerdictClass: verdictClass(j.Verdict),
		Badge:        badge(j.Verdict),
		NPoints:      len(doc.Points),
		NCameras:     len(doc.Cameras),
		Files:        ex.Files,
	}
	switch j.Verdict {
	case Good:
		p.Headline = "The model fits the tracks as well as the noise allows and nothing points to a problem."
	case Warnings:
		p.Reasons = j.Reasons
	case Failed:
		p.Reasons = j.Reasons
	}
	if len(doc.Cameras) > 0 {
		p.FirstFrame = doc.Cameras[0].Frame
	}
	p.Tiles = tiles(doc)
	for _, w := range doc.Diagnostics.Warnings {
		a := Explain(w.Code)
		v := warnView{Code: w.Code, Title: a.Title, Means: a.Means, Do: a.Do, Message: sentence(w.Message)}
		switch {
		case Severe(w.Code):
			v.Class, v.Kind = "severe", "makes the result unusable"
		case isInfo(w.Code):
			v.Class, v.Kind = "info", "for information"
		default:
			v.Class, v.Kind = "lowering", "lowers the verdict"
		}
		p.Warnings = append(p.Warnings, v)
	}
	// Most serious first, in the order found within each group.
	rank := map[string]int{"severe": 0, "lowering": 1, "info": 2}
	sort.SliceStable(p.Warnings, func(a, b int) bool { return rank[p.Warnings[a].Class] < rank[p.Warnings[b].Class] })

	views, note := frameViews(doc, ex)
	for _, v := range views {
		p.Frames = append(p.Frames, frameViewHTML{Frame: v.Frame, Kept: v.Kept, Outlier: v.Outlier, Other: v.Other, Name: v.Name, SVG: template.HTML(v.SVG)})
	}
	p.FrameNote = note
	if ex.Kept == nil && note == "" {
		p.FrameNote = "The tracks are not available to this report (no tracks.csv), so the frames show no tracks."
	}
	p.Legend = template.HTML(frameLegend(ex))
	for _, f := range plots(doc, ex) {
		p.Plots = append(p.Plots, figureHTML{ID: f.ID, Caption: f.Caption, SVG: template.HTML(f.SVG)})
	}
	p.Inputs = inputs(doc)
	p.Settings = flatten(doc.Settings)
	data, err := viewData(doc)
	if err != nil {
		return nil, err
	}
	p.Data = template.JS(data)
	return p, nil
}

func isInfo(code string) bool { return !Severe(code) && factor.Informational(code) }

func verdictClass(v Verdict) string {
	switch v {
	case Good:
		return "good"
	case Warnings:
		return "warnings"
	}
	return "failed"
}

// badge is the verdict's symbol: a tick in a circle, an exclamation mark
// in a triangle or a cross in an octagon, so the verdict reads by shape as
// well as by colour.
func badge(v Verdict) template.HTML {
	switch v {
	case Good:
		return `<svg class="badge" viewBox="0 0 64 64" aria-hidden="true"><circle cx="32" cy="32" r="29" fill="#009E73"/><path d="M18 33l10 10l18 -21" fill="none" stroke="#fff" stroke-width="7" stroke-linecap="round" stroke-linejoin="round"/></svg>`
	case Warnings:
		return `<svg class="badge" viewBox="0 0 64 64" aria-hidden="true"><path d="M32 4l29 52h-58z" fill="#E69F00" stroke-linejoin="round"/><path d="M32 22v18" stroke="#1b1f24" stroke-width="7" stroke-linecap="round"/><circle cx="32" cy="49" r="4" fill="#1b1f24"/></svg>`
	}
	return `<svg class="badge" viewBox="0 0 64 64" aria-hidden="true"><path d="M20 3h24l17 17v24l-17 17h-24l-17 -17v-24z" fill="#D55E00"/><path d="M21 21l22 22m0 -22l-22 22" stroke="#fff" stroke-width="7" stroke-linecap="round"/></svg>`
}

func frameLegend(ex Extras) string {
	item := func(svg, label string) string {
		return `<span><svg width="22" height="16" viewBox="0 0 22 16" aria-hidden="true">` + svg + `</svg>` + template.HTMLEscapeString(label) + `</span>`
	}
	var b strings.Builder
	b.WriteString(item(`<path d="M1 12L8 9" stroke="#000" stroke-width="3.2"/><path d="M1 12L8 9" stroke="`+colSky+`" stroke-width="1.6"/><circle cx="13" cy="8" r="4" fill="`+colSky+`" stroke="#000" stroke-width="1"/>`,
		"used: position and recent path"))
	b.WriteString(item(`<path d="M3 3l10 10m0 -10l-10 10" stroke="#000" stroke-width="3.4"/><path d="M3 3l10 10m0 -10l-10 10" stroke="`+colVermilion+`" stroke-width="1.8"/>`,
		"rejected as an outlier (did not move with the part)"))
	b.WriteString(item(`<rect x="3" y="3" width="10" height="10" fill="none" stroke="#000" stroke-width="3.2"/><rect x="3" y="3" width="10" height="10" fill="none" stroke="`+colYellow+`" stroke-width="1.6"/>`,
		"not used (not seen in every frame used, or ended early)"))
	if ex.Kept != nil && ex.Rejected == nil {
		b.WriteString(`<span class="none">(only the used tracks are known to this report)</span>`)
	}
	return b.String()
}

func tiles(doc *export.Document) []tile {
	d := doc.Diagnostics
	var t []tile
	nIn := len(doc.Input.Frames)
	t = append(t, tile{"frames used", fmt.Sprintf("%d of %d", len(doc.Cameras), nIn), fmt.Sprintf("%d×%d px", doc.Input.Width, doc.Input.Height)})
	pts := tile{"3D points", strconv.Itoa(len(doc.Points)), ""}
	if d.Tracks != nil {
		pts.S = fmt.Sprintf("from %d corners detected", d.Tracks.Detected)
	}
	t = append(t, pts)
	ratio := ""
	if d.ExpectedRMSPx > 0 {
		ratio = fmt.Sprintf("%.2f× the %s px expected from noise", d.RMSPx/d.ExpectedRMSPx, num(d.ExpectedRMSPx))
	}
	t = append(t, tile{"residual (RMS)", fmtPx(d.RMSPx), ratio})
	if d.NoiseSigmaPx != nil {
		t = append(t, tile{"tracking noise σ", fmtPx(*d.NoiseSigmaPx), "per coordinate, estimated"})
	}
	if d.RankGap != nil {
		t = append(t, tile{"rank gap σ₃/σ₄", num(*d.RankGap), "large is good: the data are rank 3"})
	}
	t = append(t, tile{"model", doc.Model, "units: " + doc.Units})
	if d.Tracks != nil && len(d.Tracks.DroppedByReason) > 0 {
		keys := make([]string, 0, len(d.Tracks.DroppedByReason))
		total := 0
		for k, v := range d.Tracks.DroppedByReason {
			keys = append(keys, k)
			total += v
		}
		sort.Strings(keys)
		var parts []string
		for _, k := range keys {
			if v := d.Tracks.DroppedByReason[k]; v > 0 {
				parts = append(parts, fmt.Sprintf("%s %d", k, v))
			}
		}
		t = append(t, tile{"tracks not used", strconv.Itoa(total), strings.Join(parts, ", ")})
	}
	if len(d.TimingS) > 0 {
		keys := make([]string, 0, len(d.TimingS))
		total := 0.0
		for k, v := range d.TimingS {
			keys = append(keys, k)
			total += v
		}
		sort.Strings(keys)
		var parts []string
		for _, k := range keys {
			parts = append(parts, fmt.Sprintf("%s %.1f s", k, d.TimingS[k]))
		}
		t = append(t, tile{"time", fmt.Sprintf("%.1f s", total), strings.Join(parts, ", ")})
	}
	return t
}

func fmtPx(v float64) string {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return "not a number"
	}
	return num(v) + " px"
}

func inputs(doc *export.Document) []kv {
	fr := doc.Input.Frames
	list := ""
	switch {
	case len(fr) == 0:
		list = "none"
	case len(fr) <= 4:
		list = strings.Join(fr, ", ")
	default:
		list = fmt.Sprintf("%s, %s … %s (%d)", fr[0], fr[1], fr[len(fr)-1], len(fr))
	}
	return []kv{
		{"source", doc.Input.Source},
		{"frames", list},
		{"image size", fmt.Sprintf("%d × %d px", doc.Input.Width, doc.Input.Height)},
		{"model", doc.Model},
		{"units", doc.Units},
		{"schema", doc.Schema},
		{"producer", strings.TrimSpace("trackfactor " + doc.Producer.Version)},
		{"command", doc.Producer.Command},
	}
}

// flatten turns the nested settings into sorted "a.b.c" = value rows.
func flatten(m map[string]any) []kv {
	var out []kv
	var walk func(prefix string, v any)
	walk = func(prefix string, v any) {
		if mm, ok := v.(map[string]any); ok && len(mm) > 0 {
			for k, vv := range mm {
				key := k
				if prefix != "" {
					key = prefix + "." + k
				}
				walk(key, vv)
			}
			return
		}
		b, err := json.Marshal(v)
		s := string(b)
		if err != nil {
			s = fmt.Sprint(v)
		}
		out = append(out, kv{prefix, s})
	}
	for k, v := range m {
		walk(k, v)
	}
	sort.Slice(out, func(i, j int) bool { return out[i].K < out[j].K })
	return out
}

// viewData is the JSON the 3D view reads: points as a flat list of
// x, y, z, r, g, b and cameras with their rotation rows.
func viewData(doc *export.Document) (string, error) {
	type cam struct {
		F int       `json:"f"`
		R []float64 `json:"r"`
	}
	d := struct {
		Points  []float64 `json:"points"`
		Cameras []cam     `json:"cameras"`
		Units   string    `json:"units"`
	}{Points: make([]float64, 0, 6*len(doc.Points)), Cameras: []cam{}, Units: doc.Units}
	for _, p := range doc.Points {
		ok := true
		for _, v := range p.XYZ {
			ok = ok && !math.IsNaN(v) && !math.IsInf(v, 0)
		}
		if !ok {
			continue
		}
		d.Points = append(d.Points, round6(p.XYZ[0]), round6(p.XYZ[1]), round6(p.XYZ[2]), float64(p.RGB[0]), float64(p.RGB[1]), float64(p.RGB[2]))
	}
	for _, c := range doc.Cameras {
		r := make([]float64, 0, 9)
		for _, row := range c.Rotation {
			for _, v := range row {
				r = append(r, round6(v))
			}
		}
		d.Cameras = append(d.Cameras, cam{F: c.Frame, R: r})
	}
	// json.Marshal escapes <, > and &, so the text cannot end the script
	// element it is placed in.
	b, err := json.Marshal(d)
	if err != nil {
		return "", fmt.Errorf("report: encoding the 3D view data: %w", err)
	}
	return string(b), nil
}

// round6 keeps six significant digits, plenty for a view and a third of
// the size.
func round6(v float64) float64 {
	if v == 0 || math.IsNaN(v) || math.IsInf(v, 0) {
		return v
	}
	f, _ := strconv.ParseFloat(strconv.FormatFloat(v, 'g', 6, 64), 64)
	return f
}

// baseName names a capture by the last two elements of its path
// ("captures/part42"), enough to tell captures apart without the whole
// path of the machine it ran on.
func baseName(p string) string {
	p = strings.TrimRight(filepath.ToSlash(p), "/")
	if p == "" {
		return "capture"
	}
	base := path.Base(p)
	if dir := path.Base(path.Dir(p)); dir != "." && dir != "/" && dir != "" && dir != ".." {
		return dir + "/" + base
	}
	return base
}

func render(w io.Writer, p *page) error {
	tmpl, err := template.New("report").Parse(pageTemplate)
	if err != nil {
		panic("report: the embedded page template does not parse: " + err.Error())
	}
	p.CSS = template.CSS(styleCSS)
	p.JS = template.JS(viewJS)
	bw := bufio.NewWriter(w)
	if err := tmpl.Execute(bw, p); err != nil {
		return fmt.Errorf("report: writing the page: %w", err)
	}
	if err := bw.Flush(); err != nil {
		return fmt.Errorf("report: writing the page: %w", err)
	}
	return nil
}
