package report

import (
	"bytes"
	"encoding/base64"
	"fmt"
	"image"
	"image/color"
	_ "image/gif" // frame formats the standard library decodes
	"image/jpeg"
	_ "image/png"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strings"

	"trackfactor/export"
)

// Track is a 2D track for the frame overlays and the track-length plot.
type Track struct {
	ID  int
	Obs []Obs // sorted by frame
	// Reason says why a track was not used ("" for a used one): a
	// track.Drop* reason such as "incomplete", or "residual-outlier" for
	// tracks the reconstruction rejected.
	Reason string
}

// Obs is one observation of a track, in pixels (origin at the top-left
// pixel's centre, x right, y down).
type Obs struct {
	Frame int
	X, Y  float64
}

// ReasonOutlier marks tracks the reconstruction rejected because their
// residual stood out (Track.Reason).
const ReasonOutlier = "residual-outlier"

// Frames shown in the report are scaled down to at most this width, px,
// and embedded as JPEG of this quality.
const (
	frameMaxWidth = 560
	jpegQuality   = 82
	trailFrames   = 8 // frames of history drawn behind each mark
)

// FolderFrames returns a frame loader for Extras.Frame that decodes
// dir/names[i] with the standard library's decoders (PNG, JPEG, GIF).
// Other formats give an error, and the report then shows no frames.
func FolderFrames(dir string, names []string) func(int) (image.Image, error) {
	return func(i int) (image.Image, error) {
		if i < 0 || i >= len(names) {
			return nil, fmt.Errorf("report: frame %d is not among the %d input frames", i, len(names))
		}
		p := filepath.Join(dir, names[i])
		f, err := os.Open(p)
		if err != nil {
			return nil, fmt.Errorf("report: frame %s: %w", p, err)
		}
		defer f.Close()
		im, _, err := image.Decode(f)
		if err != nil {
			return nil, fmt.Errorf("report: frame %s cannot be shown (%v); the report embeds PNG, JPEG and GIF frames only", p, err)
		}
		return im, nil
	}
}

// frameView is one frame of the report with its overlay.
type frameView struct {
	Frame   int
	Name    string
	SVG     string
	Kept    int
	Outlier int
	Other   int
}

// pickFrames returns the frames to show: the first, middle and last frame
// that has a camera (or the frames the caller asked for).
func pickFrames(doc *export.Document, ex Extras) []int {
	if ex.ShowFrames != nil {
		return ex.ShowFrames
	}
	var fr []int
	for _, c := range doc.Cameras {
		fr = append(fr, c.Frame)
	}
	sort.Ints(fr)
	if len(fr) == 0 {
		return nil
	}
	pick := []int{fr[0], fr[len(fr)/2], fr[len(fr)-1]}
	var out []int
	for _, f := range pick {
		if len(out) == 0 || out[len(out)-1] != f {
			out = append(out, f)
		}
	}
	return out
}

// frameViews renders the chosen frames with the tracks drawn over them.
// It returns the views and, when frames cannot be shown, why.
func frameViews(doc *export.Document, ex Extras) ([]frameView, string) {
	if ex.Frame == nil {
		return nil, "The frames are not available to this report (no frame source was given)."
	}
	var views []frameView
	var problems []string
	for _, fi := range pickFrames(doc, ex) {
		im, err := ex.Frame(fi)
		if err != nil {
			problems = append(problems, err.Error())
			continue
		}
		name := ""
		if fi >= 0 && fi < len(doc.Input.Frames) {
			name = doc.Input.Frames[fi]
		}
		v, err := overlay(im, fi, doc, ex)
		if err != nil {
			problems = append(problems, err.Error())
			continue
		}
		v.Name = name
		views = append(views, v)
	}
	if len(problems) > 0 {
		return views, "Some frames could not be shown: " + strings.Join(problems, "; ")
	}
	return views, ""
}

// overlay draws one frame: the image scaled down, and over it, in the
// image's own pixel coordinates, each track's recent path and its
// position in this frame.
func overlay(im image.Image, fi int, doc *export.Document, ex Extras) (frameView, error) {
	b := im.Bounds()
	W, H := b.Dx(), b.Dy()
	if W == 0 || H == 0 {
		return frameView{}, fmt.Errorf("report: frame %d is empty", fi)
	}
	small := downscale(im, frameMaxWidth)
	var buf bytes.Buffer
	if err := jpeg.Encode(&buf, small, &jpeg.Options{Quality: jpegQuality}); err != nil {
		return frameView{}, fmt.Errorf("report: encoding frame %d: %w", fi, err)
	}
	v := frameView{Frame: fi}
	r := math.Max(float64(max(W, H))/220, 1.5) // mark size in image pixels
	var s strings.Builder
	// viewBox: pixel centres are at integer coordinates, so the image
	// spans -0.5 .. W-0.5.
	fmt.Fprintf(&s, `<svg xmlns="http://www.w3.org/2000/svg" class="frame" viewBox="-0.5 -0.5 %d %d" role="img" aria-label="frame %d with tracks">`, W, H, fi)
	fmt.Fprintf(&s, `<image x="-0.5" y="-0.5" width="%d" height="%d" preserveAspectRatio="none" href="data:image/jpeg;base64,%s"/>`, W, H, base64.StdEncoding.EncodeToString(buf.Bytes()))
	var keptTrail, keptDots, outTrail, outMarks, otherTrail, otherMarks strings.Builder
	for _, t := range ex.Rejected {
		o, ok := at(t.Obs, fi)
		if !ok {
			continue
		}
		if t.Reason == ReasonOutlier {
			v.Outlier++
			trail(&outTrail, t.Obs, fi)
			fmt.Fprintf(&outMarks, "M%s %sl%s %sm0 -%sl-%s %s", f1(o.X-r), f1(o.Y-r), f1(2*r), f1(2*r), f1(2*r), f1(2*r), f1(2*r))
		} else {
			v.Other++
			trail(&otherTrail, t.Obs, fi)
			fmt.Fprintf(&otherMarks, "M%s %sh%sv%sh-%sz", f1(o.X-r*0.85), f1(o.Y-r*0.85), f1(1.7*r), f1(1.7*r), f1(1.7*r))
		}
	}
	for _, t := range ex.Kept {
		o, ok := at(t.Obs, fi)
		if !ok {
			continue
		}
		v.Kept++
		trail(&keptTrail, t.Obs, fi)
		fmt.Fprintf(&keptDots, "M%s %sa%s %s 0 1 0 %s 0a%s %s 0 1 0 -%s 0", f1(o.X-r*0.7), f1(o.Y), f1(r*0.7), f1(r*0.7), f1(1.4*r), f1(r*0.7), f1(r*0.7), f1(1.4*r))
	}
	// Each layer is drawn twice, a dark halo under the colour, so that the
	// marks stay visible on light and dark parts of the image alike.
	layer := func(d, colour, extra string, fill bool) {
		if d == "" {
			return
		}
		fmt.Fprintf(&s, `<path d="%s" fill="none" stroke="#000" stroke-opacity="0.7" stroke-width="3.2" vector-effect="non-scaling-stroke" stroke-linecap="round" stroke-linejoin="round"/>`, d)
		fillAttr := `fill="none"`
		if fill {
			fillAttr = `fill="` + colour + `"`
		}
		fmt.Fprintf(&s, `<path d="%s" %s stroke="%s" stroke-width="1.6" vector-effect="non-scaling-stroke" stroke-linecap="round" stroke-linejoin="round" %s/>`, d, fillAttr, colour, extra)
	}
	layer(otherTrail.String(), colYellow, `stroke-dasharray="3 3"`, false)
	layer(otherMarks.String(), colYellow, "", false)
	layer(keptTrail.String(), colSky, "", false)
	layer(keptDots.String(), colSky, "", true)
	layer(outTrail.String(), colVermilion, `stroke-dasharray="3 3"`, false)
	layer(outMarks.String(), colVermilion, "", false)
	s.WriteString(`</svg>`)
	v.SVG = s.String()
	return v, nil
}

// colYellow is Okabe–Ito yellow, used for tracks left out (with a dark
// halo, as on a light image it would be faint otherwise).
const colYellow = "#F0E442"

// trail appends the track's path over the trailFrames frames up to fi.
func trail(b *strings.Builder, obs []Obs, fi int) {
	first := true
	n := 0
	for _, o := range obs {
		if o.Frame > fi || o.Frame < fi-trailFrames {
			continue
		}
		if first {
			fmt.Fprintf(b, "M%s %s", f1(o.X), f1(o.Y))
			first = false
		} else {
			fmt.Fprintf(b, "L%s %s", f1(o.X), f1(o.Y))
		}
		n++
	}
	_ = n
}

func at(obs []Obs, f int) (Obs, bool) {
	i := sort.Search(len(obs), func(i int) bool { return obs[i].Frame >= f })
	if i < len(obs) && obs[i].Frame == f {
		return obs[i], true
	}
	return Obs{}, false
}

// downscale shrinks im to at most maxW pixels wide by averaging the
// source pixels under each target pixel (a box filter); a narrower image
// is copied as is.
func downscale(im image.Image, maxW int) image.Image {
	b := im.Bounds()
	W, H := b.Dx(), b.Dy()
	if W <= maxW {
		return im
	}
	w := maxW
	h := max(1, int(math.Round(float64(H)*float64(w)/float64(W))))
	out := image.NewRGBA(image.Rect(0, 0, w, h))
	for y := 0; y < h; y++ {
		sy0, sy1 := y*H/h, max((y+1)*H/h, y*H/h+1)
		for x := 0; x < w; x++ {
			sx0, sx1 := x*W/w, max((x+1)*W/w, x*W/w+1)
			var r, g, bl, n uint32
			for sy := sy0; sy < sy1; sy++ {
				for sx := sx0; sx < sx1; sx++ {
					cr, cg, cb, _ := im.At(b.Min.X+sx, b.Min.Y+sy).RGBA()
					r, g, bl, n = r+cr, g+cg, bl+cb, n+1
				}
			}
			out.SetRGBA(x, y, color.RGBA{uint8(r / n >> 8), uint8(g / n >> 8), uint8(bl / n >> 8), 255})
		}
	}
	return out
}
