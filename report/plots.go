package report

import (
	"encoding/json"
	"fmt"
	"math"
	"sort"

	"trackfactor/export"
)

// figure is one plot with a caption telling how to read it.
type figure struct {
	ID      string
	SVG     string
	Caption string
}

func plots(doc *export.Document, ex Extras) []figure {
	return []figure{
		spectrumPlot(doc),
		residualHistogram(doc),
		frameResidualPlot(doc),
		trackResidualPlot(doc),
		trackLengthPlot(doc, ex),
		turntablePlot(doc, ex),
	}
}

// highLimit is the level above which a residual counts as high, the rule
// of factor's high-residual warning with its default factor 2: above both
// 2 × expected and expected + 0.05 px.
func highLimit(expected float64) float64 {
	return math.Max(2*expected, expected+0.05)
}

func spectrumPlot(doc *export.Document) figure {
	sv := doc.Diagnostics.SingularValues
	f := figure{ID: "plot-spectrum", Caption: "Singular values of the measurement matrix, largest first, on a log scale. " +
		"A rigid part seen by an affine camera gives three large values and then a sharp drop to the noise level: the bigger the drop after the third, the better the data fit the model."}
	var xs, ys []float64
	for i, v := range sv {
		if v > 0 && !math.IsInf(v, 0) {
			xs = append(xs, float64(i+1))
			ys = append(ys, v)
		}
	}
	if len(xs) == 0 {
		f.SVG = emptyPlot("Singular-value spectrum", "no singular values in the file")
		return f
	}
	c := newChart("Singular-value spectrum", "index", "singular value")
	c.logY = true
	lo, hi, _ := finiteRange(ys)
	c.setRange(1, math.Max(float64(len(sv)), 4), lo, hi)
	c.open()
	if len(sv) >= 4 {
		c.vline(3.5, colOrange, "4 3", "model rank 3", 0)
	}
	c.polyline(xs, ys, colBlue, "")
	if len(xs) <= 60 {
		c.dots(xs, ys, colBlue, 2.6, nil)
	}
	if doc.Diagnostics.RankGap != nil {
		c.legend(legendEntry{"line", colBlue, "", fmt.Sprintf("σ₃/σ₄ = %s", num(*doc.Diagnostics.RankGap))})
	}
	f.SVG = c.close()
	return f
}

func residualHistogram(doc *export.Document) figure {
	f := figure{ID: "plot-residuals", Caption: "How many points have each RMS residual (the distance, in pixels, between where a point was tracked and where the model puts it). " +
		"Most points should sit near the dashed “expected” line, which is what the tracking noise alone would give; a long tail to the right means bad tracks."}
	var vals []float64
	for _, p := range doc.Points {
		vals = append(vals, p.RMSPx)
	}
	lo, hi, ok := finiteRange(vals)
	if !ok {
		f.SVG = emptyPlot("Residual per point", "no points")
		return f
	}
	exp := doc.Diagnostics.ExpectedRMSPx
	top := math.Max(quantile(vals, 0.99)*1.1, math.Max(highLimit(exp)*1.2, doc.Diagnostics.RMSPx*1.5))
	top = math.Min(top, hi*1.05+1e-9)
	if top <= 0 {
		top = 1
	}
	_ = lo
	edges, counts := histogram(vals, 0, top, 24)
	beyond := 0
	for _, v := range vals {
		if v > edges[len(edges)-1] {
			beyond++
		}
	}
	c := newChart("Residual per point", "RMS residual, px", "points")
	c.setRange(edges[0], edges[len(edges)-1], 0, float64(maxInt(counts)))
	c.open()
	c.bars(edges, counts, nil, colBlue, "")
	c.vline(exp, colGreen, "5 3", "expected "+num(exp), 0)
	c.vline(doc.Diagnostics.RMSPx, colVermilion, "", "overall "+num(doc.Diagnostics.RMSPx), 1)
	if beyond > 0 {
		c.legend(legendEntry{"box", colBlue, "", fmt.Sprintf("%d above %s px in the last bar", beyond, num(edges[len(edges)-1]))})
	}
	f.SVG = c.close()
	return f
}

func frameResidualPlot(doc *export.Document) figure {
	f := figure{ID: "plot-frames", Caption: "RMS residual of each frame. A flat line near the expected level is good; a peak points to a frame with motion blur, a jump or a lighting change."}
	var xs, ys []float64
	for _, c := range doc.Cameras {
		xs = append(xs, float64(c.Frame))
		ys = append(ys, c.RMSPx)
	}
	lo, hi, ok := finiteRange(ys)
	if !ok {
		f.SVG = emptyPlot("Residual per frame", "no cameras")
		return f
	}
	exp := doc.Diagnostics.ExpectedRMSPx
	x0, x1, _ := finiteRange(xs)
	c := newChart("Residual per frame", "frame", "RMS residual, px")
	c.setRange(x0, x1, 0, math.Max(math.Max(hi, highLimit(exp)), lo))
	c.open()
	c.hline(exp, colGreen, "5 3", "expected")
	c.hline(highLimit(exp), colVermilion, "2 3", "high")
	c.polyline(xs, ys, colBlue, "")
	if len(xs) <= 120 {
		hiMask := make([]bool, len(ys))
		for i, y := range ys {
			hiMask[i] = y > highLimit(exp)
		}
		c.dots(xs, ys, colBlue, 2.4, hiMask)
	}
	f.SVG = c.close()
	return f
}

func trackResidualPlot(doc *export.Document) figure {
	f := figure{ID: "plot-tracks", Caption: "RMS residual of each track (one dot per 3D point, by track number). Diamonds are tracks above the “high” line, twice the expected level: a few are normal, many mean the model or the tracking is off."}
	pts := append([]export.Point(nil), doc.Points...)
	sort.Slice(pts, func(i, j int) bool { return pts[i].Track < pts[j].Track })
	var xs, ys []float64
	var hiMask []bool
	exp := doc.Diagnostics.ExpectedRMSPx
	nHigh := 0
	for _, p := range pts {
		xs = append(xs, float64(p.Track))
		ys = append(ys, p.RMSPx)
		h := p.RMSPx > highLimit(exp)
		hiMask = append(hiMask, h)
		if h {
			nHigh++
		}
	}
	_, hi, ok := finiteRange(ys)
	if !ok {
		f.SVG = emptyPlot("Residual per track", "no points")
		return f
	}
	x0, x1, _ := finiteRange(xs)
	c := newChart("Residual per track", "track", "RMS residual, px")
	c.setRange(x0, x1, 0, math.Max(hi, highLimit(exp)))
	c.open()
	c.hline(exp, colGreen, "5 3", "expected")
	c.hline(highLimit(exp), colVermilion, "2 3", "high")
	r := 2.0
	if len(xs) > 600 {
		r = 1.3
	}
	c.dots(xs, ys, colBlue, r, hiMask)
	c.legend(legendEntry{"diamond", colVermilion, "", fmt.Sprintf("%d high", nHigh)})
	f.SVG = c.close()
	return f
}

func trackLengthPlot(doc *export.Document, ex Extras) figure {
	f := figure{ID: "plot-lengths", Caption: "How many frames each track lasted. Long tracks constrain the shape best; a pile of short ones means corners were lost quickly (blur, too little texture, too large a step between frames)."}
	var kept, other []float64
	source := "points' views"
	if ex.Kept != nil {
		source = "tracks"
		for _, t := range ex.Kept {
			kept = append(kept, float64(len(t.Obs)))
		}
		for _, t := range ex.Rejected {
			other = append(other, float64(len(t.Obs)))
		}
	} else {
		for _, p := range doc.Points {
			kept = append(kept, float64(p.Views))
		}
	}
	all := append(append([]float64(nil), kept...), other...)
	_, hi, ok := finiteRange(all)
	if !ok {
		f.SVG = emptyPlot("Track length", "no tracks")
		return f
	}
	edges, ck := histogram(kept, 0, hi+1, 20)
	var co []int
	if len(other) > 0 {
		co = make([]int, len(ck))
		step := edges[1] - edges[0]
		for _, v := range other {
			k := int((v - edges[0]) / step)
			if k >= len(co) {
				k = len(co) - 1
			}
			co[k]++
		}
	}
	total := make([]int, len(ck))
	for i := range ck {
		total[i] = ck[i]
		if co != nil {
			total[i] += co[i]
		}
	}
	c := newChart("Track length", "frames observed ("+source+")", "tracks")
	c.setRange(edges[0], edges[len(edges)-1], 0, float64(maxInt(total)))
	c.hatchDef("hatch-left-out", colPurple)
	c.open()
	c.bars(edges, ck, nil, colBlue, "")
	entries := []legendEntry{{"box", colBlue, "", fmt.Sprintf("used (%d)", len(kept))}}
	if co != nil {
		c.bars(edges, co, ck, colPurple, "hatch-left-out")
		entries = append(entries, legendEntry{"hatch", colPurple, "hatch-left-out", fmt.Sprintf("not used (%d)", len(other))})
	}
	c.legend(entries...)
	f.SVG = c.close()
	return f
}

// turntableAngles returns the turntable angle of each camera, from the
// extras or from diagnostics.turntable in the document. The latter is
// looked up by name so that the report works with documents that have it
// and with those that do not: it accepts an array of numbers named
// "angles_deg" (one per camera, in camera order), or an array "frames" of
// objects with "frame" and "angle_deg".
func turntableAngles(doc *export.Document, ex Extras) (frames, angles []float64) {
	if ex.TurntableDeg != nil {
		for i, a := range ex.TurntableDeg {
			fr := float64(i)
			if i < len(doc.Cameras) {
				fr = float64(doc.Cameras[i].Frame)
			}
			frames, angles = append(frames, fr), append(angles, a)
		}
		return frames, angles
	}
	raw, err := json.Marshal(doc.Diagnostics)
	if err != nil {
		return nil, nil
	}
	var d map[string]json.RawMessage
	if json.Unmarshal(raw, &d) != nil {
		return nil, nil
	}
	tt, ok := d["turntable"]
	if !ok {
		return nil, nil
	}
	// The turntable fit writes the angles and, beside them, the frame
	// numbers they belong to (factor/turntable.Fit).
	var t struct {
		AnglesDeg []float64 `json:"angles_deg"`
		Frames    []float64 `json:"frames"`
	}
	if json.Unmarshal(tt, &t) != nil {
		return nil, nil
	}
	for i, a := range t.AnglesDeg {
		fr := float64(i)
		switch {
		case i < len(t.Frames):
			fr = t.Frames[i]
		case i < len(doc.Cameras):
			fr = float64(doc.Cameras[i].Frame)
		}
		frames, angles = append(frames, fr), append(angles, a)
	}
	return frames, angles
}

func turntablePlot(doc *export.Document, ex Extras) figure {
	f := figure{ID: "plot-turntable", Caption: "Turntable angle of each frame. Even steps give a straight line; a kink shows a slipped or uneven turn."}
	xs, ys := turntableAngles(doc, ex)
	lo, hi, ok := finiteRange(ys)
	if !ok {
		f.SVG = emptyPlot("Turntable angle", "no turntable fit in this result")
		f.Caption = "Turntable angle of each frame: this result has no turntable fit, so there is nothing to show."
		return f
	}
	x0, x1, _ := finiteRange(xs)
	c := newChart("Turntable angle", "frame", "angle, degrees")
	c.setRange(x0, x1, lo, hi)
	c.open()
	c.polyline(xs, ys, colBlue, "")
	if len(xs) <= 120 {
		c.dots(xs, ys, colBlue, 2.4, nil)
	}
	f.SVG = c.close()
	return f
}
