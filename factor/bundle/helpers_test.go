package bundle

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"

	"trackfactor/factor"
	"trackfactor/factor/rotation"
	"trackfactor/track/synth"
)

// scenario is a synthetic sequence with ground truth: the true
// reconstruction (cameras of the synthetic scene in factor's conventions)
// and noisy measurements of its points where the scene says they are
// visible.
type scenario struct {
	scene *synth.Scene
	truth *factor.Reconstruction
	clean [][2][]float64 // per point: noiseless x and y per frame
	vis   []bool         // F×P
	in    factor.Intrinsics
}

// newScenario renders npts surface points of the scene (seeded).
func newScenario(t testing.TB, o synth.Options, npts int, seed int64) *scenario {
	t.Helper()
	sc, err := synth.New(o)
	if err != nil {
		t.Fatal(err)
	}
	pts := sc.SurfacePoints(npts, seed)
	nf := sc.Len()
	fx, fy, cx, cy := sc.Intrinsics()
	pin := sc.Options().Projection == synth.Pinhole
	rec := &factor.Reconstruction{Model: factor.Orthographic}
	s := &scenario{scene: sc, in: factor.Intrinsics{Fx: fx, Fy: fy, Cx: cx, Cy: cy}}
	if pin {
		rec.Model = factor.Perspective
		in := s.in
		rec.Intrinsics = &in
	}
	for f := 0; f < nf; f++ {
		R, T := sc.Camera(f)
		c := factor.Camera{Frame: f, R: R, T: T, Scale: fx}
		if pin {
			c.Scale = fx / T[2]
		} else {
			c.T[2] = 0
		}
		rec.Cameras = append(rec.Cameras, c)
	}
	s.vis = make([]bool, nf*npts)
	for j, X := range pts {
		rec.Points = append(rec.Points, factor.Point{Track: j, X: X})
		for f := 0; f < nf; f++ {
			s.vis[f*npts+j] = sc.Visible(f, X)
		}
	}
	s.truth = rec
	return s
}

// measure returns measurements with Gaussian noise sigma (px) on every
// visible entry; points seen in fewer than two frames stay in the matrix
// (the bundle adjustment skips them).
func (s *scenario) measure(sigma float64, seed uint64) *factor.Measurements {
	nf, np := len(s.truth.Cameras), len(s.truth.Points)
	g := rand.New(rand.NewPCG(seed, 0xbadc0ffee))
	W := mat.NewDense(2*nf, np, nil)
	mask := make([]bool, nf*np)
	for f := 0; f < nf; f++ {
		for j := 0; j < np; j++ {
			if !s.vis[f*np+j] {
				continue
			}
			u, v := s.truth.Project(f, s.truth.Points[j].X)
			W.Set(2*f, j, u+sigma*g.NormFloat64())
			W.Set(2*f+1, j, v+sigma*g.NormFloat64())
			mask[f*np+j] = true
		}
	}
	frames := make([]int, nf)
	for f := range frames {
		frames[f] = f
	}
	tracks := make([]int, np)
	for j := range tracks {
		tracks[j] = j
	}
	return &factor.Measurements{W: W, Mask: mask, Frames: frames, Tracks: tracks}
}

// perturb returns a copy of rec with every camera but the first rotated by
// a random rotation of about rotDeg and its translation moved by trans
// (px for affine, world units for perspective), and every point moved by
// a random offset of about pt per axis.
func perturb(rec *factor.Reconstruction, rotDeg, trans, pt float64, seed uint64) *factor.Reconstruction {
	g := rand.New(rand.NewPCG(seed, 77))
	out := *rec
	out.Cameras = append([]factor.Camera(nil), rec.Cameras...)
	out.Points = append([]factor.Point(nil), rec.Points...)
	r := rotDeg * math.Pi / 180
	for i := 1; i < len(out.Cameras); i++ {
		c := &out.Cameras[i]
		c.R = rotation.Mul(c.R, rotation.Exp([3]float64{r * g.NormFloat64(), r * g.NormFloat64(), r * g.NormFloat64()}))
		c.T[0] += trans * g.NormFloat64()
		c.T[1] += trans * g.NormFloat64()
		if rec.Model == factor.Perspective {
			c.T[2] += trans * g.NormFloat64()
		}
	}
	for i := range out.Points {
		for a := 0; a < 3; a++ {
			out.Points[i].X[a] += pt * g.NormFloat64()
		}
	}
	return &out
}

// alignedRMS is the RMS distance between the points of est and truth (same
// tracks) after the best similarity x ↦ sRx + t (Umeyama, IEEE PAMI
// 13(4), 1991, eqs. 34–43; a proper rotation, so a mirrored structure is
// not forgiven). Only the tracks present in both and observed in at least
// minViews (≥ 2: the ones a refinement can move) frames of m count.
func alignedRMS(est, truth *factor.Reconstruction, m *factor.Measurements, minViews int) float64 {
	idx := map[int]int{}
	for i, p := range truth.Points {
		idx[p.Track] = i
	}
	nf, np := m.Dims()
	seen := map[int]bool{}
	for j := 0; j < np; j++ {
		n := 0
		for f := 0; f < nf; f++ {
			if m.Observed(f, j) {
				n++
			}
		}
		seen[m.Tracks[j]] = n >= max(2, minViews)
	}
	var A, B [][3]float64
	for _, p := range est.Points {
		if i, ok := idx[p.Track]; ok && seen[p.Track] {
			A = append(A, p.X)
			B = append(B, truth.Points[i].X)
		}
	}
	n := float64(len(A))
	var ma, mb [3]float64
	for i := range A {
		ma = rotation.Add(ma, A[i])
		mb = rotation.Add(mb, B[i])
	}
	ma, mb = rotation.Scale(1/n, ma), rotation.Scale(1/n, mb)
	var C [3][3]float64
	va := 0.0
	for i := range A {
		a, b := rotation.Sub(A[i], ma), rotation.Sub(B[i], mb)
		va += rotation.Dot(a, a)
		for r := 0; r < 3; r++ {
			for c := 0; c < 3; c++ {
				C[r][c] += b[r] * a[c] / n
			}
		}
	}
	va /= n
	Cm := mat.NewDense(3, 3, []float64{C[0][0], C[0][1], C[0][2], C[1][0], C[1][1], C[1][2], C[2][0], C[2][1], C[2][2]})
	var svd mat.SVD
	svd.Factorize(Cm, mat.SVDFull)
	var U, V mat.Dense
	svd.UTo(&U)
	svd.VTo(&V)
	d := svd.Values(nil)
	S := [3]float64{1, 1, 1}
	if mat.Det(&U)*mat.Det(&V) < 0 {
		S[2] = -1
	}
	var R [3][3]float64
	for r := 0; r < 3; r++ {
		for c := 0; c < 3; c++ {
			for k := 0; k < 3; k++ {
				R[r][c] += U.At(r, k) * S[k] * V.At(c, k)
			}
		}
	}
	scale := (d[0]*S[0] + d[1]*S[1] + d[2]*S[2]) / va
	ss := 0.0
	for i := range A {
		x := rotation.Add(rotation.Scale(scale, rotation.Apply(R, rotation.Sub(A[i], ma))), mb)
		e := rotation.Sub(x, B[i])
		ss += rotation.Dot(e, e)
	}
	return math.Sqrt(ss / n)
}

// weakPerspective returns the scaled-orthographic camera nearest a
// perspective one at the depth of the point c: s = fx/Z_c and t the pixel
// of c, expressed for a world whose origin is c (points shifted by −c).
func weakPerspective(truth *factor.Reconstruction, c [3]float64) *factor.Reconstruction {
	out := &factor.Reconstruction{Model: factor.ScaledOrthographic}
	in := truth.Intrinsics
	for i, cam := range truth.Cameras {
		Xc := rotation.Add(rotation.Apply(cam.R, c), cam.T)
		u, v := truth.Project(i, c)
		out.Cameras = append(out.Cameras, factor.Camera{Frame: cam.Frame, R: cam.R, T: [3]float64{u, v, 0}, Scale: in.Fx / Xc[2]})
	}
	for _, p := range truth.Points {
		out.Points = append(out.Points, factor.Point{Track: p.Track, X: rotation.Sub(p.X, c)})
	}
	return out
}

func centroid(rec *factor.Reconstruction) [3]float64 {
	var c [3]float64
	for _, p := range rec.Points {
		c = rotation.Add(c, p.X)
	}
	return rotation.Scale(1/float64(len(rec.Points)), c)
}
