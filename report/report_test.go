package report

import (
	"bytes"
	"encoding/base64"
	"encoding/xml"
	"errors"
	"image"
	"image/color"
	"image/jpeg"
	"io"
	"math"
	"regexp"
	"strings"
	"testing"

	"trackfactor/export"
	"trackfactor/factor"
)

// testDoc is a small reconstruction: a ring of points seen by 6 cameras
// turning about the image y axis, with the given warnings.
func testDoc(codes ...string) *export.Document {
	doc := &export.Document{
		Schema:   export.SchemaID,
		Producer: export.Producer{Version: "test", Command: "trackfactor run -o out captures/part7"},
		Input:    export.Input{Source: "captures/part7", Width: 64, Height: 48},
		Settings: map[string]any{"track": map[string]any{"window": 21, "detect": map[string]any{"max_corners": 1000}}, "ply_ascii": false},
		Model:    "orthographic",
		Units:    "px",
	}
	for f := 0; f < 6; f++ {
		a := float64(f) * 2 * math.Pi / 180
		doc.Input.Frames = append(doc.Input.Frames, "f"+string(rune('0'+f))+".png")
		doc.Cameras = append(doc.Cameras, export.Camera{Frame: f, Rotation: [3][3]float64{
			{math.Cos(a), 0, -math.Sin(a)}, {0, 1, 0}, {math.Sin(a), 0, math.Cos(a)}}, Scale: 1, RMSPx: 0.1 + 0.01*float64(f)})
	}
	for i := 0; i < 40; i++ {
		a := float64(i) * 2 * math.Pi / 40
		doc.Points = append(doc.Points, export.Point{Track: i, XYZ: [3]float64{10 * math.Cos(a), float64(i%5) - 2, 10 * math.Sin(a)},
			RGB: [3]uint8{uint8(100 + i), 120, 90}, Views: 6, RMSPx: 0.08 + 0.004*float64(i%10)})
	}
	gap := 150.0
	doc.Diagnostics = export.Diagnostics{SingularValues: []float64{900, 300, 120, 0.8, 0.7, 0.6}, RMSPx: 0.11, ExpectedRMSPx: 0.1,
		RankGap: &gap, Warnings: []export.Warning{}}
	for _, c := range codes {
		doc.Diagnostics.Warnings = append(doc.Diagnostics.Warnings, export.Warning{Code: c, Message: "message for " + c})
	}
	return doc
}

// The verdict rule of the package documentation, case by case.
func TestJudge(t *testing.T) {
	few := testDoc()
	few.Cameras = few.Cameras[:2]
	nan := testDoc()
	nan.Diagnostics.RMSPx = math.NaN()
	cases := []struct {
		name string
		doc  *export.Document
		want Verdict
	}{
		{"no warnings", testDoc(), Good},
		{"informational only", testDoc(factor.WarnMirror, factor.WarnIncompleteDropped, factor.WarnOutliersRejected), Good},
		{"high residual", testDoc(factor.WarnMirror, factor.WarnHighResidual), Warnings},
		{"unknown code", testDoc("a-code-from-the-future"), Warnings},
		{"planar", testDoc(factor.WarnPlanar, factor.WarnHighResidual), Failed},
		{"metric upgrade failed", testDoc(factor.WarnMetricFailed), Failed},
		{"two cameras", few, Failed},
		{"residual not a number", nan, Failed},
		{"no document", nil, Failed},
	}
	for _, c := range cases {
		j := Judge(c.doc)
		if j.Verdict != c.want {
			t.Errorf("%s: verdict %q, want %q (reasons %v)", c.name, j.Verdict, c.want, j.Reasons)
		}
		if c.want != Good && len(j.Reasons) == 0 {
			t.Errorf("%s: verdict %q without a reason", c.name, j.Verdict)
		}
	}
}

// Every code the project emits has its own explanation (not the generic
// text for unknown codes), with something to do.
func TestEveryCodeExplained(t *testing.T) {
	codes := []string{factor.WarnPlanar, factor.WarnLittleRotation, factor.WarnTooFew, factor.WarnMetricFallback,
		factor.WarnMetricFailed, factor.WarnHighResidual, factor.WarnMirror, factor.WarnIncompleteDropped,
		factor.WarnOutliersRejected, factor.WarnDefaultIntrinsics, factor.WarnNotConverged, factor.WarnWeakPerspective,
		factor.WarnDisconnectedViews, factor.WarnFramesUnrecovered, factor.WarnOptimumUnverified,
		// Codes of the refinement and turntable stages (pipeline, factor/turntable).
		"depth-order-by-convention", "not-single-axis", "uneven-steps", "camera-moved",
		"refinement-unusable", "turntable-fit-failed",
		// Codes of the tracking stage (pipeline).
		"input-stopped", "tracking-option-changed", "uncertainty-not-computed"}
	generic := Explain("no-such-code")
	for _, c := range codes {
		a := Explain(c)
		if a.Title == generic.Title || a.Do == "" || a.Means == "" {
			t.Errorf("code %s has no explanation of its own: %+v", c, a)
		}
	}
	if len(KnownCodes()) != len(codes) {
		t.Errorf("%d explained codes, the test lists %d: keep them in step", len(KnownCodes()), len(codes))
	}
}

func writeReport(t *testing.T, doc *export.Document, ex Extras) string {
	t.Helper()
	var b bytes.Buffer
	if err := Write(&b, doc, ex); err != nil {
		t.Fatal(err)
	}
	return b.String()
}

// svgs returns every inline <svg>…</svg> element of the page.
func svgs(page string) []string {
	var out []string
	for {
		i := strings.Index(page, "<svg")
		if i < 0 {
			return out
		}
		j := strings.Index(page[i:], "</svg>")
		if j < 0 {
			return append(out, page[i:])
		}
		out = append(out, page[i:i+j+6])
		page = page[i+j+6:]
	}
}

// wellFormed checks a fragment against the XML 1.0 well-formedness rules
// with encoding/xml (SVG is XML).
func wellFormed(frag string) error {
	d := xml.NewDecoder(strings.NewReader(frag))
	d.Strict = true
	for {
		_, err := d.Token()
		if err == io.EOF {
			return nil
		}
		if err != nil {
			return err
		}
	}
}

// checkSelfContained fails on anything that makes a browser fetch: a src or
// href that is not a data: URL or a plain relative file name, a <link>, an
// @import or a url() pointing outside the page.
func checkSelfContained(t *testing.T, page string) {
	t.Helper()
	for _, m := range regexp.MustCompile(`(?i)\b(src|href)\s*=\s*"([^"]*)"`).FindAllStringSubmatch(page, -1) {
		v := m[2]
		if strings.HasPrefix(v, "data:") || strings.HasPrefix(v, "#") {
			continue
		}
		if strings.Contains(v, ":") || strings.HasPrefix(v, "//") || strings.HasPrefix(v, "/") {
			t.Errorf("%s=%q points outside the page", m[1], v)
		}
	}
	for _, bad := range []string{"<link", "@import", "url(http", "url(//", "<script src", "<iframe"} {
		if strings.Contains(strings.ToLower(page), bad) {
			t.Errorf("the page contains %q", bad)
		}
	}
}

func TestReportSections(t *testing.T) {
	doc := testDoc(factor.WarnHighResidual, factor.WarnMirror, "a-code-from-the-future")
	doc.Diagnostics.Warnings[0].Message = "residual <b>high</b> & more"
	page := writeReport(t, doc, Extras{})
	for _, id := range []string{`id="verdict"`, `id="summary"`, `id="warnings"`, `id="view"`, `id="view3d"`, `id="frames"`, `id="plots"`, `id="inputs"`,
		`id="plot-spectrum"`, `id="plot-residuals"`, `id="plot-frames"`, `id="plot-tracks"`, `id="plot-lengths"`, `id="plot-turntable"`} {
		if !strings.Contains(page, id) {
			t.Errorf("the report lacks %s", id)
		}
	}
	if !strings.Contains(page, `data-verdict="usable with warnings"`) {
		t.Error("the verdict is not 'usable with warnings'")
	}
	for _, w := range doc.Diagnostics.Warnings {
		a := Explain(w.Code)
		if !strings.Contains(page, `data-code="`+w.Code+`"`) {
			t.Errorf("warning %s is not listed", w.Code)
		}
		for _, want := range []string{a.Title, a.Do} {
			if !strings.Contains(page, esc(want)) {
				t.Errorf("warning %s: the report lacks %q", w.Code, want)
			}
		}
	}
	// The tool's message is shown, escaped.
	if !strings.Contains(page, "Residual &lt;b&gt;high&lt;/b&gt; &amp; more.") || strings.Contains(page, "<b>high</b>") {
		t.Error("the warning message is missing or not escaped")
	}
	// The most serious warning comes first.
	if strings.Index(page, `data-code="high-residual"`) > strings.Index(page, `data-code="mirror-ambiguity"`) {
		t.Error("an informational warning is listed before one that lowers the verdict")
	}
	for _, s := range []string{"captures/part7", "max_corners", "track.detect.max_corners", "orthographic"} {
		if !strings.Contains(page, s) {
			t.Errorf("inputs and settings lack %q", s)
		}
	}
	for i, s := range svgs(page) {
		if err := wellFormed(s); err != nil {
			t.Errorf("inline SVG %d is not well-formed XML: %v", i, err)
		}
	}
	checkSelfContained(t, page)
	if !strings.Contains(page, "no turntable fit in this result") {
		t.Error("a result without a turntable fit should say so in its plot")
	}
}

// esc escapes a string as html/template does for text, for
// comparisons with the page.
func esc(s string) string {
	r := strings.NewReplacer("&", "&amp;", "<", "&lt;", ">", "&gt;", `"`, "&#34;", "'", "&#39;")
	return r.Replace(s)
}

func TestVerdictWords(t *testing.T) {
	for _, c := range []struct {
		doc  *export.Document
		want string
	}{
		{testDoc(factor.WarnMirror), `data-verdict="good"`},
		{testDoc(factor.WarnPlanar), `data-verdict="failed"`},
	} {
		page := writeReport(t, c.doc, Extras{})
		if !strings.Contains(page, c.want) {
			t.Errorf("want %s", c.want)
		}
	}
}

// A turntable angle per frame, given by the extras or found in the
// document's diagnostics, is plotted.
func TestTurntablePlot(t *testing.T) {
	page := writeReport(t, testDoc(), Extras{TurntableDeg: []float64{0, 2, 4, 6, 8, 10}})
	i := strings.Index(page, `id="plot-turntable"`)
	if i < 0 || !strings.Contains(page[i:i+4000], "<polyline") {
		t.Error("the turntable plot has no line")
	}
	if strings.Contains(page, "no turntable fit in this result") {
		t.Error("the turntable plot says there is no fit")
	}
}

func TestFramesOverlay(t *testing.T) {
	doc := testDoc()
	W, H := 1280, 960 // wider than frameMaxWidth, so it is scaled down
	kept := []Track{{ID: 1, Obs: []Obs{{0, 10, 10}, {1, 11, 10}, {2, 12, 10}, {3, 13, 10}, {4, 14, 10}, {5, 15, 10}}}}
	rejected := []Track{
		{ID: 2, Reason: ReasonOutlier, Obs: []Obs{{0, 30, 30}, {5, 31, 30}}},
		{ID: 3, Reason: "incomplete", Obs: []Obs{{0, 50, 20}}},
	}
	asked := map[int]bool{}
	ex := Extras{Kept: kept, Rejected: rejected, Frame: func(i int) (image.Image, error) {
		asked[i] = true
		im := image.NewRGBA(image.Rect(0, 0, W, H))
		for y := 0; y < H; y++ {
			for x := 0; x < W; x++ {
				im.Set(x, y, color.RGBA{uint8(x), uint8(y), 100, 255})
			}
		}
		return im, nil
	}}
	page := writeReport(t, doc, ex)
	if !asked[0] || !asked[3] || !asked[5] || len(asked) != 3 {
		t.Errorf("frames shown %v, want the first, middle and last (0, 3, 5)", asked)
	}
	m := regexp.MustCompile(`href="data:image/jpeg;base64,([^"]+)"`).FindAllStringSubmatch(page, -1)
	if len(m) != 3 {
		t.Fatalf("%d embedded frames, want 3", len(m))
	}
	raw, err := base64.StdEncoding.DecodeString(m[0][1])
	if err != nil {
		t.Fatal(err)
	}
	im, err := jpeg.Decode(bytes.NewReader(raw))
	if err != nil {
		t.Fatalf("the embedded frame is not a JPEG: %v", err)
	}
	if b := im.Bounds(); b.Dx() != frameMaxWidth || b.Dy() != frameMaxWidth*H/W {
		t.Errorf("embedded frame is %v, want %d×%d", b, frameMaxWidth, frameMaxWidth*H/W)
	}
	// frame 0: one used, one outlier, one not used; frame 5: one used, one outlier.
	for _, want := range []string{"frame 0 · f0.png · 1 used, 1 rejected, 1 not used", "frame 5 · f5.png · 1 used, 1 rejected"} {
		if !strings.Contains(page, want) {
			t.Errorf("the report lacks the caption %q", want)
		}
	}
	for _, col := range []string{colSky, colVermilion, colYellow} {
		if !strings.Contains(page, `stroke="`+col+`"`) {
			t.Errorf("no overlay drawn in %s", col)
		}
	}
	for i, s := range svgs(page) {
		if err := wellFormed(s); err != nil {
			t.Errorf("inline SVG %d is not well-formed XML: %v", i, err)
		}
	}
	checkSelfContained(t, page)
}

func TestFrameErrorsAreShown(t *testing.T) {
	page := writeReport(t, testDoc(), Extras{Frame: func(int) (image.Image, error) { return nil, errors.New("frame file gone") }})
	if !strings.Contains(page, "frame file gone") {
		t.Error("a frame that cannot be loaded is not explained")
	}
}

func TestFailureReport(t *testing.T) {
	var b bytes.Buffer
	err := WriteFailure(&b, FailureInfo{Input: "captures/broken", Kind: FailInput,
		Err: errors.New("track: folder captures/broken gives 1 frames; at least 3 are needed")})
	if err != nil {
		t.Fatal(err)
	}
	page := b.String()
	if !strings.Contains(page, `data-verdict="failed"`) {
		t.Error("the failure report's verdict is not failed")
	}
	for _, want := range []string{"What went wrong", "at least 3 are needed", "What to do", FailInput.advice()[1], "captures/broken"} {
		if !strings.Contains(page, esc(want)) {
			t.Errorf("the failure report lacks %q", want)
		}
	}
	if strings.Contains(page, `id="view3d"`) {
		t.Error("a failure report has a 3D view")
	}
	checkSelfContained(t, page)
}

func TestIndex(t *testing.T) {
	rms := 0.2
	var b bytes.Buffer
	rows := []IndexRow{
		{Capture: "a", Verdict: Good, Frames: 10, FramesIn: 10, Points: 100, RMSPx: &rms, Report: "a/report.html"},
		{Capture: "b", Verdict: Failed, Error: "too few frames", Report: "b/report.html"},
		{Capture: "c", Verdict: Warnings, Warnings: []string{"high-residual"}, RMSPx: &rms, Report: "c/report.html"},
	}
	if err := WriteIndex(&b, "today", rows); err != nil {
		t.Fatal(err)
	}
	page := b.String()
	ib, ic, ia := strings.Index(page, `href="b/report.html"`), strings.Index(page, `href="c/report.html"`), strings.Index(page, `href="a/report.html"`)
	if ib < 0 || ic < 0 || ia < 0 || !(ib < ic && ic < ia) {
		t.Errorf("want every capture linked, failed first, then warnings, then good (positions %d %d %d)", ib, ic, ia)
	}
	for _, want := range []string{"too few frames", "high-residual", "<b>1</b> good", "<b>1</b> failed"} {
		if !strings.Contains(page, want) {
			t.Errorf("the index lacks %q", want)
		}
	}
	checkSelfContained(t, page)
}

// niceStep follows the 1–2–5 rule.
func TestNiceStep(t *testing.T) {
	for _, c := range []struct{ span, want float64 }{{10, 2}, {1, 0.2}, {7, 1}, {100, 20}, {0.03, 0.005}} {
		if got := niceStep(c.span, 5); math.Abs(got-c.want) > 1e-12 {
			t.Errorf("niceStep(%g) = %g, want %g", c.span, got, c.want)
		}
	}
}
