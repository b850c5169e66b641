package synth

import (
	"math"
	"testing"
)

func mustNew(t testing.TB, o Options) *Scene {
	t.Helper()
	s, err := New(o)
	if err != nil {
		t.Fatalf("New(%+v): %v", o, err)
	}
	return s
}

// Raycast then Project must give the image point back: the hit lies on the
// pixel's ray by construction, so only rounding remains (an invariant of
// the ray model, common practice). Tolerance 1e-9 px: rounding of float64
// over ~200 mm and 800 px is ≈1e-12 px, so 1e-9 leaves three orders of
// margin yet catches any inconsistency between the two code paths.
func TestRaycastProjectRoundTrip(t *testing.T) {
	const tol = 1e-9
	for _, proj := range []Projection{Orthographic, Pinhole} {
		s := mustNew(t, Options{Projection: proj, Width: 320, Height: 240, StepDeg: 10, Frames: 36})
		hits, worst := 0, 0.0
		for _, f := range []int{0, 7, 35} {
			for y := 0.0; y < 240; y += 3.7 {
				for x := 0.0; x < 320; x += 2.9 {
					X, ok := s.Raycast(f, x, y)
					if !ok {
						continue
					}
					hits++
					px, py := s.Project(f, X)
					worst = math.Max(worst, math.Hypot(px-x, py-y))
					if _, on := s.SurfaceNormal(X); !on {
						t.Fatalf("%s frame %d (%.2f, %.2f): hit %v is not on the surface", proj, f, x, y, X)
					}
				}
			}
		}
		// The part covers roughly a tenth of the image; demand a real sample.
		if hits < 500 {
			t.Fatalf("%s: only %d rays hit the part", proj, hits)
		}
		if worst > tol {
			t.Errorf("%s: Raycast→Project error %.3g px > %g", proj, worst, tol)
		}
		t.Logf("%s: %d hits, worst round-trip error %.2g px", proj, hits, worst)
	}
}

func cross(a, b [3]float64) [3]float64 {
	return [3]float64{a[1]*b[2] - a[2]*b[1], a[2]*b[0] - a[0]*b[2], a[0]*b[1] - a[1]*b[0]}
}

func det3(m [3][3]float64) float64 { return dot(m[0], cross(m[1], m[2])) }

// Camera matrices are rotations: RᵀR = I, det R = +1 (definition of SO(3));
// the third row is the first × the second (convention in DESIGN.md).
// Tolerance 1e-12: entries are products of a few sines and cosines, whose
// rounding is ≈1e-16.
func TestCameraRotations(t *testing.T) {
	const tol = 1e-12
	cases := []Options{
		{},
		{Projection: Pinhole},
		{ElevationDeg: 0, ElevationSet: true, StepDeg: 7.3},
		{ElevationDeg: -35, AnglesDeg: []float64{0, 13, 190, -400}},
		{ElevationDeg: 80, Projection: Pinhole, StartDeg: 33},
	}
	for _, o := range cases {
		s := mustNew(t, o)
		for f := 0; f < s.Len(); f++ {
			R, _ := s.Camera(f)
			for i := 0; i < 3; i++ {
				for j := 0; j < 3; j++ {
					g := R[0][i]*R[0][j] + R[1][i]*R[1][j] + R[2][i]*R[2][j]
					want := 0.0
					if i == j {
						want = 1
					}
					if math.Abs(g-want) > tol {
						t.Fatalf("%+v frame %d: (RᵀR)[%d][%d] = %.17g", o, f, i, j, g)
					}
				}
			}
			if d := det3(R); math.Abs(d-1) > tol {
				t.Fatalf("%+v frame %d: det R = %.17g", o, f, d)
			}
			c := cross(R[0], R[1])
			for i := range c {
				if math.Abs(c[i]-R[2][i]) > tol {
					t.Fatalf("%+v frame %d: R[2] = %v, R[0]×R[1] = %v", o, f, R[2], c)
				}
			}
		}
	}
}

// The relative rotation R_j·R_iᵀ of two frames of a turntable is a
// rotation by θ_j − θ_i about the turntable axis (geometry of a rotation
// about a fixed axis); its angle from Rodrigues' formula is
// acos((tr R − 1)/2) and its axis is the skew part (R32−R23, R13−R31,
// R21−R12)/(2 sin θ). The axis in camera coordinates is R_f·(0,0,1), the
// same for every frame. Tolerance 1e-9 rad: acos amplifies the ≈1e-16
// rounding of the trace by 1/sin θ (≤ 60 for the 1° step).
func TestRelativeRotationIsTurntableStep(t *testing.T) {
	const tol = 1e-9
	angles := []float64{0, 1, 3.5, 10, 47, 90, 179, -30}
	for _, proj := range []Projection{Orthographic, Pinhole} {
		s := mustNew(t, Options{Projection: proj, AnglesDeg: angles, ElevationDeg: 27})
		R0, _ := s.Camera(0)
		axis := [3]float64{R0[0][2], R0[1][2], R0[2][2]} // R·e_z
		for i := 0; i < s.Len(); i++ {
			for j := 0; j < s.Len(); j++ {
				if i == j {
					continue
				}
				Ri, _ := s.Camera(i)
				Rj, _ := s.Camera(j)
				var M [3][3]float64 // Rj·Riᵀ
				for a := 0; a < 3; a++ {
					for b := 0; b < 3; b++ {
						M[a][b] = dot(Rj[a], Ri[b])
					}
				}
				c := (M[0][0] + M[1][1] + M[2][2] - 1) / 2
				got := math.Acos(math.Max(-1, math.Min(1, c)))
				d := math.Mod(math.Abs(s.AngleDeg(j)-s.AngleDeg(i)), 360)
				if d > 180 {
					d = 360 - d
				}
				want := d * math.Pi / 180
				if math.Abs(got-want) > tol {
					t.Errorf("%s frames %d,%d: relative angle %.12f°, turntable step %.12f°", proj, i, j, got*180/math.Pi, d)
				}
				if sn := math.Sin(got); sn > 0.01 {
					w := [3]float64{(M[2][1] - M[1][2]) / (2 * sn), (M[0][2] - M[2][0]) / (2 * sn), (M[1][0] - M[0][1]) / (2 * sn)}
					// Same axis up to sign (the sign follows the sign of the step).
					if e := norm(cross(w, axis)); e > 1e-9 {
						t.Errorf("%s frames %d,%d: relative rotation axis %v, turntable axis %v", proj, i, j, w, axis)
					}
				}
			}
			Ri, _ := s.Camera(i)
			ai := [3]float64{Ri[0][2], Ri[1][2], Ri[2][2]}
			if e := norm([3]float64{ai[0] - axis[0], ai[1] - axis[1], ai[2] - axis[2]}); e > 1e-12 {
				t.Errorf("%s frame %d: axis in camera coordinates moved by %g", proj, i, e)
			}
		}
	}
}

// Regular hexagon (handbook fact): across corners = across flats × 2/√3,
// side = across corners / 2. The across-flats distance is measured with
// the ray caster itself: two horizontal rays along ±n_k through the
// axis hit opposite flats AF apart. Tolerance 1e-9 mm (rounding only).
func TestHexCollarGeometry(t *testing.T) {
	const tol = 1e-9
	s := mustNew(t, Options{})
	for k := 0; k < 3; k++ {
		a := float64(k) * 60 * math.Pi / 180
		n := vec3{math.Cos(a), math.Sin(a), 0}
		far := 500.0
		for _, z := range []float64{30.5, 35, 39.5} {
			// An offset along the flat, so the ray does not pass the axis
			// exactly (the distance between the flats is the same).
			off := vec3{-n[1] * 3, n[0] * 3, 0}
			o1 := vec3{far*n[0] + off[0], far*n[1] + off[1], z}
			o2 := vec3{-far*n[0] + off[0], -far*n[1] + off[1], z}
			t1, f1 := intersectPart(o1, vec3{-n[0], -n[1], 0})
			t2, f2 := intersectPart(o2, vec3{n[0], n[1], 0})
			if f1 != faceCollarFlat0+k || f2 != faceCollarFlat0+k+3 {
				t.Fatalf("flat %d at z=%g: faces hit %d and %d", k, z, f1, f2)
			}
			p1 := vec3{o1[0] - t1*n[0], o1[1] - t1*n[1], z}
			p2 := vec3{o2[0] + t2*n[0], o2[1] + t2*n[1], z}
			d := norm(vec3{p1[0] - p2[0], p1[1] - p2[1], 0})
			if math.Abs(d-CollarAcrossFlatsMM) > tol {
				t.Errorf("flat %d at z=%g: across flats %.12f, want %g", k, z, d, CollarAcrossFlatsMM)
			}
		}
	}
	lm := s.Landmarks()
	ac := CollarAcrossFlatsMM * 2 / math.Sqrt(3)
	for k := 0; k < 6; k++ {
		for _, lvl := range []string{"top", "bottom"} {
			p := lm[name(lvl, k)]
			q := lm[name(lvl, (k+3)%6)]
			r := lm[name(lvl, (k+1)%6)]
			if d := dist(p, q); math.Abs(d-ac) > tol {
				t.Errorf("%s corners %d,%d: %.12f apart, want AF·2/√3 = %.12f", lvl, k, (k+3)%6, d, ac)
			}
			if d := dist(p, r); math.Abs(d-ac/2) > tol {
				t.Errorf("%s corners %d,%d: %.12f apart, want the side AF/√3 = %.12f", lvl, k, (k+1)%6, d, ac/2)
			}
			// The midpoints of opposite sides are the across-flats apart.
			m1 := mid(p, r)
			m2 := mid(q, lm[name(lvl, (k+4)%6)])
			if d := dist(m1, m2); math.Abs(d-CollarAcrossFlatsMM) > tol {
				t.Errorf("%s: opposite side midpoints %.12f apart, want %g", lvl, d, CollarAcrossFlatsMM)
			}
		}
		if d := dist(lm[name("top", k)], lm[name("bottom", k)]); math.Abs(d-CollarThicknessMM) > tol {
			t.Errorf("corner %d: top to bottom %.12f, want %g", k, d, CollarThicknessMM)
		}
	}
	if d := dist(lm["base-centre"], lm["top-centre"]); math.Abs(d-PartHeightMM) > tol {
		t.Errorf("axis length %g, want %g", d, PartHeightMM)
	}
	for nm, p := range lm {
		if _, ok := s.SurfaceNormal(p); !ok {
			t.Errorf("landmark %s %v is not on the surface", nm, p)
		}
	}
}

func name(lvl string, k int) string { return "collar-" + lvl + "-" + string(rune('0'+k)) }

func dist(a, b [3]float64) float64 { return norm(vec3{a[0] - b[0], a[1] - b[1], a[2] - b[2]}) }

func mid(a, b [3]float64) [3]float64 {
	return [3]float64{(a[0] + b[0]) / 2, (a[1] + b[1]) / 2, (a[2] + b[2]) / 2}
}

// Pinhole symmetry: a point on the turntable axis stays on the axis, which
// the camera looks at, so it projects to x = cx whatever the angle, and
// Target() (the principal height) to (cx, cy). Same for orthographic.
// Tolerance 1e-9 px (rounding only).
func TestAxisProjectsToPrincipalColumn(t *testing.T) {
	const tol = 1e-9
	var angles []float64
	for a := -180.0; a <= 360; a += 17 {
		angles = append(angles, a)
	}
	for _, proj := range []Projection{Pinhole, Orthographic} {
		s := mustNew(t, Options{Projection: proj, AnglesDeg: angles})
		_, _, cx, cy := s.Intrinsics()
		if cx != 319.5 || cy != 239.5 {
			t.Fatalf("%s: principal point (%g, %g), want ((W−1)/2, (H−1)/2) = (319.5, 239.5)", proj, cx, cy)
		}
		for f := range angles {
			x, y := s.Project(f, s.Target())
			if math.Abs(x-cx) > tol || math.Abs(y-cy) > tol {
				t.Errorf("%s angle %g: target projects to (%.12f, %.12f), want (%g, %g)", proj, angles[f], x, y, cx, cy)
			}
			for _, z := range []float64{0, 12.5, PartHeightMM} {
				x, _ := s.Project(f, [3]float64{0, 0, z})
				if math.Abs(x-cx) > tol {
					t.Errorf("%s angle %g: axis point z=%g projects to x = %.12f, want %g", proj, angles[f], z, x, cx)
				}
			}
			// A point off the axis does move (the check above can fail).
			x0, _ := s.Project(0, [3]float64{10, 0, 15})
			x1, _ := s.Project(f, [3]float64{10, 0, 15})
			if math.Mod(angles[f]-angles[0], 360) != 0 && math.Abs(x1-x0) < 1e-6 {
				t.Errorf("%s angle %g: an off-axis point did not move", proj, angles[f])
			}
		}
	}
}

// Visible must agree with the ray caster: a visible surface point is the
// first hit along its own pixel's ray; a point whose normal faces away, or
// which lies off the surface, is not visible. About half of the points
// face the camera, of which the collar hides some: the visible fraction
// must lie in (0.2, 0.6), so neither answer can be constant.
func TestVisibleAgreesWithRaycast(t *testing.T) {
	for _, proj := range []Projection{Orthographic, Pinhole} {
		s := mustNew(t, Options{Projection: proj, Frames: 3, StepDeg: 40})
		pts := s.SurfacePoints(3000, 7)
		for f := 0; f < s.Len(); f++ {
			R, T := s.Camera(f)
			vis := 0
			for _, X := range pts {
				n, ok := s.SurfaceNormal(X)
				if !ok {
					t.Fatalf("SurfacePoints gave %v, not on the surface", X)
				}
				v := s.Visible(f, X)
				// Direction to the camera: −R[2] (orthographic) or C − X.
				toCam := vec3{-R[2][0], -R[2][1], -R[2][2]}
				if proj == Pinhole {
					C := matTVec(R, vec3{-T[0], -T[1], -T[2]})
					toCam = vec3{C[0] - X[0], C[1] - X[1], C[2] - X[2]}
				}
				if dot(n, toCam) < 0 && v {
					t.Fatalf("%s frame %d: back-facing %v reported visible", proj, f, X)
				}
				x, y := s.Project(f, X)
				H, ok := s.Raycast(f, x, y)
				if v {
					vis++
					if !ok || dist(H, X) > 1e-6 {
						t.Fatalf("%s frame %d: visible %v but its pixel's ray hits %v (ok=%v)", proj, f, X, H, ok)
					}
				} else if dot(n, toCam) > 1e-3 && ok && dist(H, X) < 1e-3 {
					t.Fatalf("%s frame %d: front-facing %v is the first hit of its ray but reported hidden", proj, f, X)
				}
				off := vec3{X[0] + 0.01*n[0], X[1] + 0.01*n[1], X[2] + 0.01*n[2]}
				if s.Visible(f, off) {
					t.Fatalf("%s frame %d: point 0.01 mm off the surface reported visible", proj, f)
				}
			}
			frac := float64(vis) / float64(len(pts))
			if frac < 0.2 || frac > 0.6 {
				t.Errorf("%s frame %d: visible fraction %.3f outside (0.2, 0.6)", proj, f, frac)
			}
		}
	}
}

// SurfacePoints must be spread over the faces by area (uniform sampling):
// the share of points on the lower shaft's side must match its share of
// the exposed area, 2π·10·30 / total, within 4 binomial standard
// deviations (a 1-in-15000 false alarm).
func TestSurfacePointsByArea(t *testing.T) {
	s := mustNew(t, Options{})
	const n = 20000
	pts := s.SurfacePoints(n, 3)
	total := 0.0
	for _, p := range surfacePieces() {
		total += p.area
	}
	want := 2 * math.Pi * LowerShaftRadiusMM * LowerShaftLengthMM / total
	got := 0
	for _, X := range pts {
		if surfaceFace(X) == faceLowerSide && X[2] > 1e-6 && X[2] < CollarZ0MM-1e-6 {
			got++
		}
	}
	sd := math.Sqrt(want * (1 - want) / n)
	if p := float64(got) / n; math.Abs(p-want) > 4*sd {
		t.Errorf("lower shaft side: %.4f of the points, want %.4f ± %.4f", p, want, 4*sd)
	}
	again := s.SurfacePoints(n, 3)
	for i := range pts {
		if pts[i] != again[i] {
			t.Fatalf("SurfacePoints is not deterministic at %d", i)
		}
	}
}

// Corners of the collar seen from 20° above at θ = 10° (camera on the −Y
// side; corner k at lab azimuth 40°+60°k, flat k's normal at 10°+60°k):
//   - the top face faces up, so all top corners face the camera, but the
//     rear one (corner 1, lab (−4.0, 22.7, 40)) is hidden by the upper
//     shaft: going back towards the camera the ray keeps x = −4 (inside
//     the radius 8) and rises only (22.7 − 6.9)·tan 20° ≈ 5.7 mm by the
//     shaft's far side, well below its top at 65;
//   - a bottom corner is seen only through its two flats: corners 0 and 1
//     touch only rear flats (normals at 10°, 70°, 130°, i.e. a positive
//     lab y component), the other four touch a front flat.
//
// (θ = 10° avoids θ = 0°, where flats 0 and 3 are edge-on.)
func TestLandmarkVisibility(t *testing.T) {
	for _, proj := range []Projection{Orthographic, Pinhole} {
		s := mustNew(t, Options{Projection: proj, AnglesDeg: []float64{10}})
		lm := s.Landmarks()
		for k := 0; k < 6; k++ {
			wantTop := k != 1
			if got := s.Visible(0, lm[name("top", k)]); got != wantTop {
				t.Errorf("%s: top corner %d visible = %v, want %v", proj, k, got, wantTop)
			}
			wantBottom := k >= 2
			if got := s.Visible(0, lm[name("bottom", k)]); got != wantBottom {
				t.Errorf("%s: bottom corner %d visible = %v, want %v", proj, k, got, wantBottom)
			}
		}
		if !s.Visible(0, lm["top-centre"]) || s.Visible(0, lm["base-centre"]) {
			t.Errorf("%s: top centre must be visible, base centre (bottom face) not", proj)
		}
	}
}
