package report

import (
	"fmt"
	"html"
	"math"
	"sort"
	"strconv"
	"strings"
)

// Palette: Okabe & Ito, "Color Universal Design" (2008), a set of colours
// that stay distinct under the common forms of colour-vision deficiency.
// Every meaning carried by colour is also carried by shape, dash or text.
const (
	colBlue      = "#0072B2" // kept tracks, data series
	colOrange    = "#E69F00" // "usable with warnings"
	colVermilion = "#D55E00" // rejected tracks, "failed", values above the limit
	colGreen     = "#009E73" // "good", expected level
	colSky       = "#56B4E9" // second series
	colPurple    = "#CC79A7" // tracks left out
	colGrey      = "#6b6b6b" // axes and labels (not part of the palette)
)

// chart draws one plot as an inline SVG element. Coordinates are data
// units; px and py map them to the drawing area.
type chart struct {
	w, h                  float64 // size of the SVG, px
	left, right, top, bot float64 // margins, px
	x0, x1, y0, y1        float64 // data range
	logY                  bool
	title, xLabel, yLabel string
	b                     strings.Builder
}

func newChart(title, xLabel, yLabel string) *chart {
	return &chart{w: 400, h: 230, left: 56, right: 14, top: 26, bot: 40, title: title, xLabel: xLabel, yLabel: yLabel}
}

func (c *chart) px(x float64) float64 {
	if c.x1 == c.x0 {
		return c.left + (c.w-c.left-c.right)/2
	}
	return c.left + (x-c.x0)/(c.x1-c.x0)*(c.w-c.left-c.right)
}

func (c *chart) py(y float64) float64 {
	y0, y1 := c.y0, c.y1
	if c.logY {
		y = math.Log10(math.Max(y, 1e-300))
		y0, y1 = math.Log10(y0), math.Log10(y1)
	}
	if y1 == y0 {
		return c.top + (c.h-c.top-c.bot)/2
	}
	return c.h - c.bot - (y-y0)/(y1-y0)*(c.h-c.top-c.bot)
}

// setRange sets the data range with nice bounds; for a log axis the
// bounds are whole decades.
func (c *chart) setRange(x0, x1, y0, y1 float64) {
	if x1 <= x0 {
		x0, x1 = x0-0.5, x0+0.5
	}
	c.x0, c.x1 = x0, x1
	if c.logY {
		if y0 <= 0 || math.IsNaN(y0) {
			y0 = y1 * 1e-6
		}
		if y1 <= 0 {
			y1 = 1
		}
		c.y0 = math.Pow(10, math.Floor(math.Log10(y0)))
		c.y1 = math.Pow(10, math.Ceil(math.Log10(y1)))
		if c.y1 <= c.y0 {
			c.y1 = c.y0 * 10
		}
		return
	}
	if y1 <= y0 {
		y0, y1 = y0-0.5, y0+0.5
	}
	step := niceStep(y1-y0, 5)
	c.y0 = math.Floor(y0/step) * step
	c.y1 = math.Ceil(y1/step) * step
}

// niceStep returns a tick step of 1, 2 or 5 × 10^k giving about n ticks
// over span (the "nice numbers" rule of Heckbert, Graphics Gems, 1990).
func niceStep(span float64, n int) float64 {
	if span <= 0 || math.IsNaN(span) || math.IsInf(span, 0) {
		return 1
	}
	raw := span / float64(n)
	mag := math.Pow(10, math.Floor(math.Log10(raw)))
	switch f := raw / mag; {
	case f < 1.5:
		return mag
	case f < 3.5:
		return 2 * mag
	case f < 7.5:
		return 5 * mag
	}
	return 10 * mag
}

func ticks(a, b float64, n int) []float64 {
	step := niceStep(b-a, n)
	var out []float64
	for v := math.Ceil(a/step-1e-9) * step; v <= b+step*1e-9; v += step {
		out = append(out, v)
		if len(out) > 50 {
			break
		}
	}
	return out
}

func num(v float64) string {
	if v == 0 {
		return "0"
	}
	a := math.Abs(v)
	switch {
	case a >= 1e5 || a < 1e-3:
		return strconv.FormatFloat(v, 'g', 2, 64)
	case a >= 100:
		return strconv.FormatFloat(v, 'f', 0, 64)
	}
	return strconv.FormatFloat(v, 'g', 3, 64)
}

func f1(v float64) string { return strconv.FormatFloat(v, 'f', 1, 64) }

// open writes the SVG header, the axes, the ticks and the labels.
func (c *chart) open() {
	fmt.Fprintf(&c.b, `<svg xmlns="http://www.w3.org/2000/svg" class="plot" viewBox="0 0 %s %s" width="%s" height="%s" role="img" aria-label="%s">`,
		f1(c.w), f1(c.h), f1(c.w), f1(c.h), html.EscapeString(c.title))
	fmt.Fprintf(&c.b, `<title>%s</title>`, html.EscapeString(c.title))
	fmt.Fprintf(&c.b, `<text x="%s" y="16" class="pt">%s</text>`, f1(c.left), html.EscapeString(c.title))
	// grid and y ticks
	var yt []float64
	if c.logY {
		for e := math.Log10(c.y0); e <= math.Log10(c.y1)+1e-9; e++ {
			yt = append(yt, math.Pow(10, e))
		}
		if len(yt) > 8 { // thin out many decades
			k := (len(yt) + 6) / 7
			var thin []float64
			for i := 0; i < len(yt); i += k {
				thin = append(thin, yt[i])
			}
			yt = thin
		}
	} else {
		yt = ticks(c.y0, c.y1, 5)
	}
	for _, v := range yt {
		y := c.py(v)
		fmt.Fprintf(&c.b, `<line x1="%s" x2="%s" y1="%s" y2="%s" class="grid"/>`, f1(c.left), f1(c.w-c.right), f1(y), f1(y))
		label := num(v)
		if c.logY {
			label = strconv.FormatFloat(v, 'g', 1, 64)
		}
		fmt.Fprintf(&c.b, `<text x="%s" y="%s" class="tl" text-anchor="end">%s</text>`, f1(c.left-5), f1(y+3.5), label)
	}
	for _, v := range ticks(c.x0, c.x1, 6) {
		x := c.px(v)
		fmt.Fprintf(&c.b, `<line x1="%s" x2="%s" y1="%s" y2="%s" class="axis"/>`, f1(x), f1(x), f1(c.h-c.bot), f1(c.h-c.bot+4))
		fmt.Fprintf(&c.b, `<text x="%s" y="%s" class="tl" text-anchor="middle">%s</text>`, f1(x), f1(c.h-c.bot+15), num(v))
	}
	fmt.Fprintf(&c.b, `<path d="M%s %sV%sH%s" class="axis" fill="none"/>`, f1(c.left), f1(c.top), f1(c.h-c.bot), f1(c.w-c.right))
	fmt.Fprintf(&c.b, `<text x="%s" y="%s" class="al" text-anchor="middle">%s</text>`, f1((c.left+c.w-c.right)/2), f1(c.h-6), html.EscapeString(c.xLabel))
	fmt.Fprintf(&c.b, `<text transform="translate(13 %s) rotate(-90)" class="al" text-anchor="middle">%s</text>`, f1((c.top+c.h-c.bot)/2), html.EscapeString(c.yLabel))
}

func (c *chart) close() string {
	c.b.WriteString(`</svg>`)
	return c.b.String()
}

// clampY keeps a value inside the plotted range (log axes cannot show 0).
func (c *chart) clampY(y float64) float64 {
	return math.Min(math.Max(y, c.y0), c.y1)
}

func (c *chart) polyline(xs, ys []float64, colour, extra string) {
	if len(xs) == 0 {
		return
	}
	var pts []string
	for i := range xs {
		pts = append(pts, f1(c.px(xs[i]))+","+f1(c.py(c.clampY(ys[i]))))
	}
	fmt.Fprintf(&c.b, `<polyline points="%s" fill="none" stroke="%s" stroke-width="1.6" %s/>`, strings.Join(pts, " "), colour, extra)
}

// dots draws circles; where hi is not nil and true the dot is drawn as a
// larger filled diamond in the alarm colour, so it stands out by shape too.
func (c *chart) dots(xs, ys []float64, colour string, r float64, hi []bool) {
	for i := range xs {
		x, y := c.px(xs[i]), c.py(c.clampY(ys[i]))
		if hi != nil && hi[i] {
			s := r + 1.5
			fmt.Fprintf(&c.b, `<path d="M%s %sl%s %sl-%s %sl-%s -%sz" fill="%s"/>`, f1(x), f1(y-s), f1(s), f1(s), f1(s), f1(s), f1(s), f1(s), colVermilion)
			continue
		}
		fmt.Fprintf(&c.b, `<circle cx="%s" cy="%s" r="%s" fill="%s"/>`, f1(x), f1(y), f1(r), colour)
	}
}

// hline draws a labelled horizontal reference line.
func (c *chart) hline(y float64, colour, dash, label string) {
	if y < c.y0 || y > c.y1 || math.IsNaN(y) {
		return
	}
	py := c.py(y)
	fmt.Fprintf(&c.b, `<line x1="%s" x2="%s" y1="%s" y2="%s" stroke="%s" stroke-width="1.4" stroke-dasharray="%s"/>`, f1(c.left), f1(c.w-c.right), f1(py), f1(py), colour, dash)
	fmt.Fprintf(&c.b, `<text x="%s" y="%s" class="rl" text-anchor="end" fill="%s">%s</text>`, f1(c.w-c.right-2), f1(py-4), colour, html.EscapeString(label))
}

// vline draws a labelled vertical reference line.
func (c *chart) vline(x float64, colour, dash, label string, row int) {
	if x < c.x0 || x > c.x1 || math.IsNaN(x) {
		return
	}
	px := c.px(x)
	fmt.Fprintf(&c.b, `<line x1="%s" x2="%s" y1="%s" y2="%s" stroke="%s" stroke-width="1.4" stroke-dasharray="%s"/>`, f1(px), f1(px), f1(c.top), f1(c.h-c.bot), colour, dash)
	anchor := "start"
	tx := px + 4
	if px > (c.left+c.w-c.right)*0.6 {
		anchor, tx = "end", px-4
	}
	fmt.Fprintf(&c.b, `<text x="%s" y="%s" class="rl" text-anchor="%s" fill="%s">%s</text>`, f1(tx), f1(c.top+10+float64(row)*12), anchor, colour, html.EscapeString(label))
}

// bars draws a histogram: counts[i] between edges[i] and edges[i+1];
// base holds counts already drawn below (stacked), or nil.
func (c *chart) bars(edges []float64, counts, base []int, colour, pattern string) {
	for i, n := range counts {
		if n == 0 {
			continue
		}
		b := 0
		if base != nil {
			b = base[i]
		}
		x0, x1 := c.px(edges[i]), c.px(edges[i+1])
		yTop, yBot := c.py(float64(b+n)), c.py(float64(b))
		fill := colour
		if pattern != "" {
			fill = "url(#" + pattern + ")"
		}
		fmt.Fprintf(&c.b, `<rect x="%s" y="%s" width="%s" height="%s" fill="%s" stroke="%s" stroke-width="0.8"/>`,
			f1(x0+0.5), f1(yTop), f1(math.Max(x1-x0-1, 0.5)), f1(yBot-yTop), fill, colour)
	}
}

// legend writes a row of legend entries under the title, right-aligned.
func (c *chart) legend(entries ...legendEntry) {
	x := c.w - c.right
	for i := len(entries) - 1; i >= 0; i-- {
		e := entries[i]
		w := float64(len([]rune(e.label)))*5.8 + 18
		x -= w
		switch e.kind {
		case "line":
			fmt.Fprintf(&c.b, `<line x1="%s" x2="%s" y1="12" y2="12" stroke="%s" stroke-width="1.6" stroke-dasharray="%s"/>`, f1(x), f1(x+12), e.colour, e.dash)
		case "diamond":
			fmt.Fprintf(&c.b, `<path d="M%s 7l5 5l-5 5l-5 -5z" fill="%s"/>`, f1(x+6), e.colour)
		case "hatch":
			fmt.Fprintf(&c.b, `<rect x="%s" y="7" width="11" height="10" fill="url(#%s)" stroke="%s"/>`, f1(x), e.dash, e.colour)
		default:
			fmt.Fprintf(&c.b, `<rect x="%s" y="7" width="11" height="10" fill="%s"/>`, f1(x), e.colour)
		}
		fmt.Fprintf(&c.b, `<text x="%s" y="16" class="tl">%s</text>`, f1(x+15), html.EscapeString(e.label))
	}
}

type legendEntry struct{ kind, colour, dash, label string }

// hatchDef defines a diagonal hatch pattern (a second series told apart
// by texture as well as colour).
func (c *chart) hatchDef(id, colour string) {
	fmt.Fprintf(&c.b, `<defs><pattern id="%s" width="5" height="5" patternUnits="userSpaceOnUse" patternTransform="rotate(45)"><rect width="5" height="5" fill="#fff"/><line x1="0" y1="0" x2="0" y2="5" stroke="%s" stroke-width="2.2"/></pattern></defs>`, id, colour)
}

// emptyPlot is shown instead of a plot that has no data.
func emptyPlot(title, why string) string {
	c := newChart(title, "", "")
	fmt.Fprintf(&c.b, `<svg xmlns="http://www.w3.org/2000/svg" class="plot" viewBox="0 0 %s %s" width="%s" height="%s" role="img" aria-label="%s">`,
		f1(c.w), f1(c.h), f1(c.w), f1(c.h), html.EscapeString(title))
	fmt.Fprintf(&c.b, `<title>%s</title><text x="%s" y="16" class="pt">%s</text>`, html.EscapeString(title), f1(c.left), html.EscapeString(title))
	fmt.Fprintf(&c.b, `<rect x="%s" y="%s" width="%s" height="%s" class="nodata"/>`, f1(c.left), f1(c.top), f1(c.w-c.left-c.right), f1(c.h-c.top-c.bot))
	fmt.Fprintf(&c.b, `<text x="%s" y="%s" class="al" text-anchor="middle">%s</text>`, f1((c.left+c.w-c.right)/2), f1((c.top+c.h-c.bot)/2), html.EscapeString(why))
	return c.close()
}

// histogram bins values into about n equal bins over [lo, hi].
func histogram(values []float64, lo, hi float64, n int) ([]float64, []int) {
	if hi <= lo {
		hi = lo + 1
	}
	step := niceStep(hi-lo, n)
	lo = math.Floor(lo/step) * step
	hi = math.Ceil(hi/step) * step
	if hi <= lo {
		hi = lo + step
	}
	nb := int(math.Round((hi - lo) / step))
	if nb < 1 {
		nb = 1
	}
	edges := make([]float64, nb+1)
	for i := range edges {
		edges[i] = lo + float64(i)*step
	}
	counts := make([]int, nb)
	for _, v := range values {
		if math.IsNaN(v) {
			continue
		}
		k := int((v - lo) / step)
		if k < 0 {
			k = 0
		}
		if k >= nb {
			k = nb - 1
		}
		counts[k]++
	}
	return edges, counts
}

func maxInt(v []int) int {
	m := 0
	for _, x := range v {
		if x > m {
			m = x
		}
	}
	return m
}

func finiteRange(v []float64) (lo, hi float64, ok bool) {
	lo, hi = math.Inf(1), math.Inf(-1)
	for _, x := range v {
		if math.IsNaN(x) || math.IsInf(x, 0) {
			continue
		}
		lo, hi = math.Min(lo, x), math.Max(hi, x)
	}
	return lo, hi, lo <= hi
}

func quantile(v []float64, q float64) float64 {
	s := append([]float64(nil), v...)
	sort.Float64s(s)
	if len(s) == 0 {
		return math.NaN()
	}
	i := int(math.Round(q * float64(len(s)-1)))
	return s[i]
}
