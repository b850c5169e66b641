package report

import (
	"fmt"
	"html/template"
	"io"
	"strconv"
	"strings"
)

// IndexRow is one capture of a batch for WriteIndex.
type IndexRow struct {
	Capture  string
	Verdict  Verdict // Failed for a capture without reconstruction
	Frames   int     // frames with a camera
	FramesIn int     // input frames
	Points   int
	RMSPx    *float64 // nil when there is no reconstruction
	Warnings []string // codes that lowered the verdict, then the others
	Error    string   // why the capture failed, "" otherwise
	TimeS    float64
	Report   string // link to the capture's report, relative to the index
}

const indexTemplate = `<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{{.Title}} · trackfactor batch</title>
<style>{{.CSS}}
.counts { display: flex; gap: 12px; flex-wrap: wrap; margin: 0 0 14px; }
.count { display: flex; gap: 8px; align-items: center; border: 1px solid var(--line); border-radius: 6px; padding: 6px 12px; font-size: 1.05rem; }
.count b { font-size: 1.35rem; }
td .badge, .count .badge { width: 18px; height: 18px; vertical-align: -3px; }
tr.failed td:first-child { border-left: 5px solid var(--fail); }
tr.warnings td:first-child { border-left: 5px solid var(--warn); }
tr.good td:first-child { border-left: 5px solid var(--good); }
td.err { color: #8a3a10; max-width: 30em; }
</style>
</head>
<body>
<header class="top"><div class="in"><span class="brand">trackfactor batch</span><span class="meta">{{.Total}} captures</span></div></header>
<main>
<h1>{{.Title}}</h1>
<section id="counts">
<div class="counts">
{{range .Counts}}<div class="count">{{.Badge}}<b>{{.N}}</b> {{.Word}}</div>
{{end}}</div>
<table id="captures">
<tr><th>capture</th><th>verdict</th><th>frames</th><th>points</th><th>residual</th><th>warnings</th><th>time</th></tr>
{{range .Rows}}<tr class="{{.Class}}" data-verdict="{{.Verdict}}">
<td>{{if .Report}}<a href="{{.Report}}">{{.Capture}}</a>{{else}}{{.Capture}}{{end}}</td>
<td>{{.Badge}} {{.Verdict}}</td>
<td class="num">{{.Frames}}</td>
<td class="num">{{.Points}}</td>
<td class="num">{{.RMS}}</td>
<td>{{if .Error}}<span class="err">{{.Error}}</span>{{else}}{{range $i, $w := .Warnings}}{{if $i}}, {{end}}<code>{{$w}}</code>{{end}}{{end}}</td>
<td class="num">{{.Time}}</td>
</tr>
{{end}}</table>
</section>
<footer><p>Each capture's name links to its report. Verdicts: good; usable with warnings; failed (no reconstruction, or one that cannot be trusted).</p></footer>
</main>
</body>
</html>
`

// WriteIndex writes the batch index: one self-contained HTML page with a
// count per verdict and a table of every capture, each linking to its
// report, failed captures first.
func WriteIndex(w io.Writer, title string, rows []IndexRow) error {
	t, err := template.New("index").Parse(indexTemplate)
	if err != nil {
		panic("report: the index template does not parse: " + err.Error())
	}
	type rowView struct {
		Capture, Class, Verdict, Frames, RMS, Time, Error, Report string
		Points                                                    int
		Warnings                                                  []string
		Badge                                                     template.HTML
	}
	type count struct {
		N     int
		Word  string
		Badge template.HTML
	}
	n := map[Verdict]int{}
	var views []rowView
	for _, order := range []Verdict{Failed, Warnings, Good} {
		for _, r := range rows {
			if r.Verdict != order {
				continue
			}
			n[order]++
			v := rowView{Capture: r.Capture, Class: verdictClass(r.Verdict), Verdict: string(r.Verdict),
				Frames: fmt.Sprintf("%d / %d", r.Frames, r.FramesIn), Points: r.Points, RMS: "—",
				Time: fmt.Sprintf("%.1f s", r.TimeS), Error: r.Error, Report: r.Report, Warnings: r.Warnings,
				Badge: smallBadge(r.Verdict)}
			if r.RMSPx != nil {
				v.RMS = strconv.FormatFloat(*r.RMSPx, 'g', 3, 64) + " px"
			}
			views = append(views, v)
		}
	}
	// Rows with a verdict this build does not know go last, as failed.
	for _, r := range rows {
		if r.Verdict != Failed && r.Verdict != Warnings && r.Verdict != Good {
			n[Failed]++
			views = append(views, rowView{Capture: r.Capture, Class: "failed", Verdict: string(r.Verdict), Error: r.Error, Report: r.Report, Badge: smallBadge(Failed)})
		}
	}
	var counts []count
	for _, v := range []Verdict{Good, Warnings, Failed} {
		counts = append(counts, count{N: n[v], Word: string(v), Badge: smallBadge(v)})
	}
	data := struct {
		Title  string
		Total  int
		Counts []count
		Rows   []rowView
		CSS    template.CSS
	}{title, len(rows), counts, views, template.CSS(styleCSS)}
	if err := t.Execute(w, data); err != nil {
		return fmt.Errorf("report: writing the batch index: %w", err)
	}
	return nil
}

func smallBadge(v Verdict) template.HTML {
	return template.HTML(strings.Replace(string(badge(v)), `class="badge"`, `class="badge" width="18" height="18"`, 1))
}
