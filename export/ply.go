package export

import (
	"bufio"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"

	"trackfactor/factor"
)

// PLYOptions control WritePointsPLY.
type PLYOptions struct {
	// ASCII writes "format ascii 1.0". Default false:
	// "format binary_little_endian 1.0".
	ASCII bool
	// Units is written as "comment units <Units>". Default "": the
	// document's units, or DefaultUnits ("px") when that is empty too.
	Units string
	// Uncertainty, when not nil, adds "property float sigma" with one
	// value per point, in the order of the document's points and in Units.
	// Its length must equal the number of points; values must be finite
	// and not negative, or SigmaUnknown for a point without one. Default
	// nil: no sigma property.
	Uncertainty []float64
}

// SigmaUnknown is the PLY sigma of a point whose uncertainty was not
// determined (PLY has no missing value; a negative deviation cannot be
// mistaken for a real one).
const SigmaUnknown = -1

// CamerasPLYOptions control WriteCamerasPLY.
type CamerasPLYOptions struct {
	// ASCII as in PLYOptions. Default false (binary little endian).
	ASCII bool
	// Units as in PLYOptions. Default: the document's units, or "px".
	Units string
	// AxisLength is the length of each drawn camera axis, in Units.
	// Default 0: 10 % of the diagonal of the points' bounding box
	// (1 when that diagonal is zero, for example without points).
	AxisLength float64
	// AffineDistance is how far an affine camera (which has no centre) is
	// drawn from the points' centroid, against its viewing direction.
	// Default 0: 1.5 × the bounding-box diagonal (1.5 when that is zero).
	// Ignored for the perspective model.
	AffineDistance float64
}

// Colours of the drawn camera axes: image x red, image y green, viewing
// direction blue; the centre vertex is white.
func axisColours() [4][3]uint8 {
	return [4][3]uint8{{255, 255, 255}, {255, 0, 0}, {0, 255, 0}, {0, 0, 255}}
}

// plyVertex is one written vertex.
type plyVertex struct {
	xyz   [3]float32
	rgb   [3]uint8
	sigma float32
}

// WritePointsPLY writes the document's points as a PLY file with one
// "vertex" element: float x, y, z, uchar red, green, blue and, with
// opts.Uncertainty, float sigma. Comment lines name the producer, the unit,
// the model and where the points come from. Coordinates that are not finite
// or do not fit a float32 are an error naming the point.
func WritePointsPLY(w io.Writer, doc *Document, opts PLYOptions) error {
	if doc == nil {
		return errors.New("export: WritePointsPLY given no document; build one with NewDocument")
	}
	n := len(doc.Points)
	if opts.Uncertainty != nil && len(opts.Uncertainty) != n {
		return fmt.Errorf("export: PLYOptions.Uncertainty has %d values for %d points; give one per point or none", len(opts.Uncertainty), n)
	}
	verts := make([]plyVertex, n)
	for i, p := range doc.Points {
		xyz, err := toFloat32s(p.XYZ)
		if err != nil {
			return fmt.Errorf("export: point %d (track %d): %v; check the reconstruction", i, p.Track, err)
		}
		verts[i] = plyVertex{xyz: xyz, rgb: p.RGB}
		if opts.Uncertainty != nil {
			s := opts.Uncertainty[i]
			if !(s >= 0 || s == SigmaUnknown) || s > math.MaxFloat32 {
				return fmt.Errorf("export: uncertainty of point %d (track %d) is %v; it must be finite and not negative (or SigmaUnknown)", i, p.Track, s)
			}
			verts[i].sigma = float32(s)
		}
	}
	units := unitsOr(opts.Units, doc.Units)
	comments := []string{
		producerComment(doc.Producer),
		"units " + units,
		"model " + doc.Model,
		fmt.Sprintf("%d points, one per track, in the order of reconstruction.json points", n),
	}
	props := []string{"float x", "float y", "float z", "uchar red", "uchar green", "uchar blue"}
	if opts.Uncertainty != nil {
		props = append(props, "float sigma")
		comments = append(comments, "sigma is the position standard deviation in "+units+", -1 where not determined")
	}
	pw := newPLYWriter(w, opts.ASCII)
	pw.header(comments, []plyElementDecl{{"vertex", n, props}})
	for _, v := range verts {
		pw.vertex(v, opts.Uncertainty != nil)
	}
	return pw.finish("points")
}

// WriteCamerasPLY writes the document's cameras as axis triads: per camera
// four vertices (centre, then the ends of the image x axis, the image y axis
// and the viewing direction, at AxisLength from the centre) and three edges
// from the centre to the ends, x red, y green, viewing direction blue. For
// the perspective model the centre is −Rᵀt. The affine models have no
// centre: each camera is drawn at the points' centroid minus AffineDistance
// times its viewing direction, which a comment in the file states.
func WriteCamerasPLY(w io.Writer, doc *Document, opts CamerasPLYOptions) error {
	if doc == nil {
		return errors.New("export: WriteCamerasPLY given no document; build one with NewDocument")
	}
	var affine bool
	switch factor.Model(doc.Model) {
	case factor.Perspective:
	case factor.Orthographic, factor.ScaledOrthographic, factor.Paraperspective:
		affine = true
	default:
		return fmt.Errorf("export: unknown camera model %q; use one of orthographic, scaled-orthographic, paraperspective, perspective", doc.Model)
	}
	for _, v := range [2]float64{opts.AxisLength, opts.AffineDistance} {
		if !(v >= 0) || math.IsInf(v, 0) {
			return fmt.Errorf("export: CamerasPLYOptions has axis length %v and affine distance %v; both must be finite and not negative (0 means default)", opts.AxisLength, opts.AffineDistance)
		}
	}
	centroid, diag := pointsExtent(doc.Points)
	if diag == 0 {
		diag = 1
	}
	axis := opts.AxisLength
	if axis == 0 {
		axis = 0.1 * diag
	}
	dist := opts.AffineDistance
	if dist == 0 {
		dist = 1.5 * diag
	}
	units := unitsOr(opts.Units, doc.Units)
	colours := axisColours()
	n := len(doc.Cameras)
	verts := make([]plyVertex, 0, 4*n)
	for i, c := range doc.Cameras {
		var centre [3]float64
		R := c.Rotation
		if affine {
			for k := 0; k < 3; k++ {
				centre[k] = centroid[k] - dist*R[2][k]
			}
		} else {
			// X_cam = R X + t is zero at X = −Rᵀ t.
			for k := 0; k < 3; k++ {
				centre[k] = -(R[0][k]*c.Translation[0] + R[1][k]*c.Translation[1] + R[2][k]*c.Translation[2])
			}
		}
		ends := [4][3]float64{centre}
		for a := 0; a < 3; a++ {
			for k := 0; k < 3; k++ {
				ends[a+1][k] = centre[k] + axis*R[a][k]
			}
		}
		for j, e := range ends {
			xyz, err := toFloat32s(e)
			if err != nil {
				return fmt.Errorf("export: camera %d (frame %d): %v; check its rotation and translation", i, c.Frame, err)
			}
			verts = append(verts, plyVertex{xyz: xyz, rgb: colours[j]})
		}
	}
	comments := []string{
		producerComment(doc.Producer),
		"units " + units,
		"model " + doc.Model,
		fmt.Sprintf("%d cameras in the order of reconstruction.json cameras; each is 4 vertices: centre, end of image x axis, end of image y axis, end of viewing direction", n),
		"edges join each centre to its axis ends: x red, y green, viewing direction blue",
		"axis length " + formatFloat(axis) + " " + units,
	}
	if affine {
		comments = append(comments, "affine cameras have no centre: each is drawn at the points' centroid minus "+
			formatFloat(dist)+" "+units+" along its viewing direction")
	}
	pw := newPLYWriter(w, opts.ASCII)
	pw.header(comments, []plyElementDecl{
		{"vertex", len(verts), []string{"float x", "float y", "float z", "uchar red", "uchar green", "uchar blue"}},
		{"edge", 3 * n, []string{"int vertex1", "int vertex2", "uchar red", "uchar green", "uchar blue"}},
	})
	for _, v := range verts {
		pw.vertex(v, false)
	}
	for i := 0; i < n; i++ {
		for a := 1; a <= 3; a++ {
			pw.edge(int32(4*i), int32(4*i+a), colours[a])
		}
	}
	return pw.finish("cameras")
}

// pointsExtent returns the centroid and the bounding-box diagonal of the
// points (zero for no points).
func pointsExtent(pts []Point) (centroid [3]float64, diag float64) {
	if len(pts) == 0 {
		return centroid, 0
	}
	lo, hi := pts[0].XYZ, pts[0].XYZ
	for _, p := range pts {
		for k := 0; k < 3; k++ {
			centroid[k] += p.XYZ[k]
			lo[k] = math.Min(lo[k], p.XYZ[k])
			hi[k] = math.Max(hi[k], p.XYZ[k])
		}
	}
	for k := 0; k < 3; k++ {
		centroid[k] /= float64(len(pts))
	}
	diag = math.Sqrt((hi[0]-lo[0])*(hi[0]-lo[0]) + (hi[1]-lo[1])*(hi[1]-lo[1]) + (hi[2]-lo[2])*(hi[2]-lo[2]))
	if math.IsNaN(diag) || math.IsInf(diag, 0) {
		diag = 0 // non-finite points are reported when they are written
	}
	return centroid, diag
}

func toFloat32s(v [3]float64) ([3]float32, error) {
	var out [3]float32
	for k, x := range v {
		if math.IsNaN(x) || math.IsInf(x, 0) || math.Abs(x) > math.MaxFloat32 {
			return out, fmt.Errorf("coordinate %d is %v, which a PLY float cannot hold", k, x)
		}
		out[k] = float32(x)
	}
	return out, nil
}

func unitsOr(opt, doc string) string {
	if opt != "" {
		return opt
	}
	if doc != "" {
		return doc
	}
	return DefaultUnits
}

func producerComment(p Producer) string {
	s := "producer trackfactor"
	if p.Version != "" {
		s += " " + p.Version
	}
	return s
}

// formatFloat gives the shortest decimal that reads back to v.
func formatFloat(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }

type plyElementDecl struct {
	name  string
	count int
	props []string
}

// plyWriter writes a header and rows; the first write error sticks.
type plyWriter struct {
	bw    *bufio.Writer
	ascii bool
	buf   []byte
	err   error
}

func newPLYWriter(w io.Writer, ascii bool) *plyWriter {
	return &plyWriter{bw: bufio.NewWriter(w), ascii: ascii}
}

// cleanComment keeps a comment on one header line: control characters
// (newlines among them) become spaces.
func cleanComment(s string) string {
	return strings.Map(func(r rune) rune {
		if r < 0x20 || r == 0x7f {
			return ' '
		}
		return r
	}, s)
}

func (p *plyWriter) header(comments []string, elems []plyElementDecl) {
	format := "binary_little_endian"
	if p.ascii {
		format = "ascii"
	}
	var b strings.Builder
	b.WriteString("ply\nformat " + format + " 1.0\n")
	for _, c := range comments {
		b.WriteString("comment " + cleanComment(c) + "\n")
	}
	for _, e := range elems {
		fmt.Fprintf(&b, "element %s %d\n", e.name, e.count)
		for _, pr := range e.props {
			b.WriteString("property " + pr + "\n")
		}
	}
	b.WriteString("end_header\n")
	p.write([]byte(b.String()))
}

func (p *plyWriter) write(b []byte) {
	if p.err == nil {
		_, p.err = p.bw.Write(b)
	}
}

func (p *plyWriter) vertex(v plyVertex, sigma bool) {
	b := p.buf[:0]
	if p.ascii {
		for k, x := range v.xyz {
			if k > 0 {
				b = append(b, ' ')
			}
			b = strconv.AppendFloat(b, float64(x), 'g', -1, 32)
		}
		for _, c := range v.rgb {
			b = append(b, ' ')
			b = strconv.AppendUint(b, uint64(c), 10)
		}
		if sigma {
			b = append(b, ' ')
			b = strconv.AppendFloat(b, float64(v.sigma), 'g', -1, 32)
		}
		b = append(b, '\n')
	} else {
		for _, x := range v.xyz {
			b = binary.LittleEndian.AppendUint32(b, math.Float32bits(x))
		}
		b = append(b, v.rgb[:]...)
		if sigma {
			b = binary.LittleEndian.AppendUint32(b, math.Float32bits(v.sigma))
		}
	}
	p.buf = b
	p.write(b)
}

func (p *plyWriter) edge(a, b int32, rgb [3]uint8) {
	out := p.buf[:0]
	if p.ascii {
		out = strconv.AppendInt(out, int64(a), 10)
		out = append(out, ' ')
		out = strconv.AppendInt(out, int64(b), 10)
		for _, c := range rgb {
			out = append(out, ' ')
			out = strconv.AppendUint(out, uint64(c), 10)
		}
		out = append(out, '\n')
	} else {
		out = binary.LittleEndian.AppendUint32(out, uint32(a))
		out = binary.LittleEndian.AppendUint32(out, uint32(b))
		out = append(out, rgb[:]...)
	}
	p.buf = out
	p.write(out)
}

func (p *plyWriter) finish(what string) error {
	if p.err == nil {
		p.err = p.bw.Flush()
	}
	if p.err != nil {
		return fmt.Errorf("export: writing %s PLY: %w", what, p.err)
	}
	return nil
}
