package bundle

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"

	"trackfactor/factor"
	"trackfactor/factor/rotation"
)

// Uncertainty holds the standard deviations of the refined parameters
// from the inverse of the Gauss–Newton normal matrix at the optimum,
//
//	Σ = σ̂²·(JᵀWJ)⁻¹,   σ̂² = Σρ(|r|²)/(n − d)  (= 2·cost/(n − d)),
//
// in the gauge of the refinement (the held parameters have zero
// variance; see Summary.Gauge), with W the robust weights at the optimum
// (Hartley and Zisserman, MVG 2nd ed., §5.2.3 and §A6.4; with the squared
// loss σ̂² is the unbiased residual variance). It is computed through the
// Schur complement (Triggs et al. 2000, §6.3): with S the reduced camera
// system and W_j, V_j point j's coupling and block,
//
//	Σ_cc = S⁻¹,   Σ_jj = V_j⁻¹ + Z_jᵀ Σ_cc Z_j,   Z_j = W_j V_j⁻¹,
//
// where Z_jᵀ Σ_cc Z_j only involves the blocks of the cameras that see
// point j, so every point costs as much as its share of S.
type Uncertainty struct {
	// Sigma is σ̂, px; Residuals n and Parameters d as in the Summary.
	Sigma                 float64
	Residuals, Parameters int
	// Points in the order of Reconstruction.Points.
	Points []PointUncertainty
	// Cameras in the order of Reconstruction.Cameras.
	Cameras []CameraUncertainty
	// FocalSigma (px) and K1Sigma, NaN when not refined.
	FocalSigma, K1Sigma float64
	// Gauge repeats Summary.Gauge: the covariances are relative to it.
	Gauge string
}

// PointUncertainty is one point's covariance.
type PointUncertainty struct {
	Track int
	// Cov is the 3×3 covariance, world units²; NaN for points that were
	// not refined.
	Cov [3][3]float64
	// Sigma is √(trace Cov / 3), the RMS over the three axes of the
	// standard deviation (world units); SigmaMax the largest one, the
	// square root of Cov's largest eigenvalue.
	Sigma, SigmaMax float64
	Refined         bool
}

// CameraUncertainty is one camera's covariance.
type CameraUncertainty struct {
	Frame int
	// RotationCov is the covariance of the rotation error δ in world axes,
	// R = R̂·exp([δ]×), rad². RotationSigmaDeg is √(trace/3) in degrees.
	RotationCov      [3][3]float64
	RotationSigmaDeg float64
	// TranslationSigma are the standard deviations of T (px for the
	// affine models' two components, world units for the perspective
	// model's three); ScaleSigma that of the affine scale (0 when held).
	TranslationSigma [3]float64
	ScaleSigma       float64
	// AngleSigmaDeg is, for single-axis motion, the standard deviation of
	// the frame's turntable angle θ_f, degrees; NaN for free motion (see
	// AngleSigmaAboutDeg).
	AngleSigmaDeg float64
	// Held is true for the cameras the gauge (or a lack of data) holds.
	Held bool
}

// AngleSigmaAboutDeg returns the standard deviation, degrees, of camera
// i's rotation about the world direction axis, √(aᵀ Σ_δ a) with a the unit
// axis — for free motion, the uncertainty of a turntable angle measured
// from that camera's rotation relative to the gauge camera.
func (u *Uncertainty) AngleSigmaAboutDeg(i int, axis [3]float64) float64 {
	a := rotation.Normalize(axis)
	C := u.Cameras[i].RotationCov
	v := rotation.Dot(a, rotation.Apply(C, a))
	return math.Sqrt(math.Max(v, 0)) * 180 / math.Pi
}

// Scaled returns a copy with every length multiplied by k (the points'
// covariances by k², translations of the perspective model by k); angles
// and pixel quantities stay.
func (u *Uncertainty) Scaled(k float64, perspective bool) *Uncertainty {
	out := *u
	out.Points = append([]PointUncertainty(nil), u.Points...)
	out.Cameras = append([]CameraUncertainty(nil), u.Cameras...)
	for i := range out.Points {
		p := &out.Points[i]
		for a := 0; a < 3; a++ {
			for b := 0; b < 3; b++ {
				p.Cov[a][b] *= k * k
			}
		}
		p.Sigma *= math.Abs(k)
		p.SigmaMax *= math.Abs(k)
	}
	if perspective {
		for i := range out.Cameras {
			for a := range out.Cameras[i].TranslationSigma {
				out.Cameras[i].TranslationSigma[a] *= math.Abs(k)
			}
		}
	}
	return &out
}

func uncertainty(lin *linearizer, mod model, X [][3]float64, st *setup, rec *factor.Reconstruction, sum *Summary) (*Uncertainty, error) {
	p := lin.p
	ng, nc, N := lin.ng, lin.nc, lin.N
	var sys system
	lin.linearize(mod, X, 0, &sys)
	if !sys.ok {
		return nil, fmt.Errorf("a point's normal block is singular (a point seen along one line)")
	}
	dof := sum.Residuals - sum.Parameters
	s2 := 2 * sum.FinalCost / float64(dof)
	Sc := make([]float64, N*N)
	if N > 0 {
		var ch mat.Cholesky
		if !ch.Factorize(mat.NewSymDense(N, sys.S)) {
			return nil, fmt.Errorf("the reduced camera system is singular: some camera parameter is not determined by the data")
		}
		var inv mat.SymDense
		if err := ch.InverseTo(&inv); err != nil {
			return nil, fmt.Errorf("the reduced camera system is too ill-conditioned to invert (%v)", err)
		}
		for i := 0; i < N; i++ {
			for j := i; j < N; j++ {
				v := inv.At(i, j)
				if mod.held(i) || mod.held(j) {
					v = 0
				}
				Sc[i*N+j], Sc[j*N+i] = v, v
			}
		}
	}
	u := &Uncertainty{Sigma: math.Sqrt(s2), Residuals: sum.Residuals, Parameters: sum.Parameters, Gauge: sum.Gauge,
		FocalSigma: math.NaN(), K1Sigma: math.NaN()}
	u.Points = make([]PointUncertainty, len(rec.Points))
	nan := math.NaN()
	for k, pt := range rec.Points {
		u.Points[k] = PointUncertainty{Track: pt.Track, Sigma: nan, SigmaMax: nan,
			Cov: [3][3]float64{{nan, nan, nan}, {nan, nan, nan}, {nan, nan, nan}}}
	}
	refD := sys.refD
	p.parallel(func(c, lo, hi int) {
		w := &worker{ok: true}
		var idx []int
		var Z, M []float64
		for j := lo; j < hi; j++ {
			V, eps, Wg := lin.pointBlocks(w, mod, &X[j], j, nil, 0)
			k := p.start[j+1] - p.start[j]
			lin.dampAndProject(w, &V, &eps, &Wg, k, 0, j == p.ref, refD)
			vi := sys.pd[j].vi
			if j == p.ref {
				for a := 0; a < 3; a++ {
					for b := 0; b < 3; b++ {
						vi[3*a+b] -= refD[a] * refD[b]
					}
				}
			}
			// Z = W V⁻¹ over the point's parameter indices.
			idx = idx[:0]
			Z = Z[:0]
			add := func(i int, row []float64) {
				idx = append(idx, i)
				Z = append(Z,
					row[0]*vi[0]+row[1]*vi[3]+row[2]*vi[6],
					row[0]*vi[1]+row[1]*vi[4]+row[2]*vi[7],
					row[0]*vi[2]+row[1]*vi[5]+row[2]*vi[8])
			}
			for a := 0; a < ng; a++ {
				add(a, Wg[3*a:3*a+3])
			}
			o0 := p.start[j]
			for t := 0; t < k; t++ {
				base := ng + int(p.cam[o0+t])*nc
				wo := w.wbuf[t*nc*3 : (t+1)*nc*3]
				for a := 0; a < nc; a++ {
					add(base+a, wo[3*a:3*a+3])
				}
			}
			L := len(idx)
			if cap(M) < 3*L {
				M = make([]float64, 3*L)
			}
			M = M[:3*L]
			clear(M)
			for r := 0; r < L; r++ {
				srow := Sc[idx[r]*N:]
				m0, m1, m2 := 0.0, 0.0, 0.0
				for s := 0; s < L; s++ {
					v := srow[idx[s]]
					if v == 0 {
						continue
					}
					m0 += v * Z[3*s]
					m1 += v * Z[3*s+1]
					m2 += v * Z[3*s+2]
				}
				M[3*r], M[3*r+1], M[3*r+2] = m0, m1, m2
			}
			var C [3][3]float64
			for a := 0; a < 3; a++ {
				for b := 0; b < 3; b++ {
					s := vi[3*a+b]
					for r := 0; r < L; r++ {
						s += Z[3*r+a] * M[3*r+b]
					}
					C[a][b] = s * s2
				}
			}
			kk := st.pointRec[j]
			pu := &u.Points[kk]
			pu.Cov = C
			pu.Refined = true
			pu.Sigma = math.Sqrt(math.Max(C[0][0]+C[1][1]+C[2][2], 0) / 3)
			pu.SigmaMax = math.Sqrt(math.Max(largestEig(C), 0))
		}
	})
	// Cameras.
	u.Cameras = make([]CameraUncertainty, len(rec.Cameras))
	cov := func(i, j int) float64 { return Sc[i*N+j] * s2 }
	for f := range rec.Cameras {
		cu := CameraUncertainty{Frame: rec.Cameras[f].Frame, AngleSigmaDeg: math.NaN()}
		base := ng + f*nc
		cu.Held = mod.held(base)
		switch mm := mod.(type) {
		case *affineModel:
			for a := 0; a < 3; a++ {
				for b := 0; b < 3; b++ {
					cu.RotationCov[a][b] = cov(base+a, base+b)
				}
			}
			cu.TranslationSigma = [3]float64{math.Sqrt(cov(base+3, base+3)), math.Sqrt(cov(base+4, base+4)), 0}
			if mm.scaled {
				cu.ScaleSigma = math.Sqrt(cov(base+5, base+5))
			}
		case *perspModel:
			for a := 0; a < 3; a++ {
				for b := 0; b < 3; b++ {
					cu.RotationCov[a][b] = cov(base+a, base+b)
				}
				cu.TranslationSigma[a] = math.Sqrt(cov(base+3+a, base+3+a))
			}
		case *axisModel:
			// δ_f = Rz(θ_f)ᵀ δ_c + dθ_f e_z (the right perturbation of
			// R_f = R_c·Rz(θ_f)): Σ_δ = J Σ Jᵀ over (δ_c, θ_f).
			Rt := rotation.Transpose(rotation.RotZ(mm.theta[f]))
			var J [3][4]float64
			for a := 0; a < 3; a++ {
				for b := 0; b < 3; b++ {
					J[a][b] = Rt[a][b]
				}
			}
			J[2][3] = 1
			ix := [4]int{0, 1, 2, base}
			for a := 0; a < 3; a++ {
				for b := 0; b < 3; b++ {
					s := 0.0
					for r := 0; r < 4; r++ {
						for q := 0; q < 4; q++ {
							s += J[a][r] * cov(ix[r], ix[q]) * J[b][q]
						}
					}
					cu.RotationCov[a][b] = s
				}
			}
			for a := 0; a < mm.nT(); a++ {
				cu.TranslationSigma[a] = math.Sqrt(cov(3+a, 3+a))
			}
			cu.AngleSigmaDeg = math.Sqrt(cov(base, base)) * 180 / math.Pi
		}
		tr := cu.RotationCov[0][0] + cu.RotationCov[1][1] + cu.RotationCov[2][2]
		cu.RotationSigmaDeg = math.Sqrt(math.Max(tr, 0)/3) * 180 / math.Pi
		u.Cameras[f] = cu
	}
	if lm, ok := lensOf(mod); ok {
		off := 0
		if am, isAxis := mod.(*axisModel); isAxis && am.persp {
			off = 6
		}
		k := off
		if lm.refineF {
			u.FocalSigma = math.Sqrt(cov(k, k))
			k++
		}
		if lm.refK1 {
			u.K1Sigma = math.Sqrt(cov(k, k))
		}
	}
	return u, nil
}

func lensOf(m model) (*lens, bool) {
	switch mm := m.(type) {
	case *perspModel:
		return &mm.lens, true
	case *axisModel:
		if mm.persp {
			return &mm.lens, true
		}
	}
	return nil, false
}

// largestEig returns the largest eigenvalue of a symmetric 3×3 matrix
// (closed form of the characteristic cubic, trigonometric solution;
// Smith, Comm. ACM 4(4), 1961).
func largestEig(A [3][3]float64) float64 {
	p1 := A[0][1]*A[0][1] + A[0][2]*A[0][2] + A[1][2]*A[1][2]
	q := (A[0][0] + A[1][1] + A[2][2]) / 3
	if p1 == 0 {
		return math.Max(A[0][0], math.Max(A[1][1], A[2][2]))
	}
	p2 := sq(A[0][0]-q) + sq(A[1][1]-q) + sq(A[2][2]-q) + 2*p1
	p := math.Sqrt(p2 / 6)
	var B [3][3]float64
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			B[i][j] = A[i][j] / p
			if i == j {
				B[i][j] -= q / p
			}
		}
	}
	r := rotation.Det(B) / 2
	r = math.Max(-1, math.Min(1, r))
	phi := math.Acos(r) / 3
	return q + 2*p*math.Cos(phi)
}
