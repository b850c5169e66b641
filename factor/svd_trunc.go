package factor

import (
	"errors"
	"math"
	"math/rand/v2"
	"runtime"
	"sync"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/mat"
)

// truncatedSVDMinDim is the size from which factorRank3 switches from the
// full thin SVD to the truncated one: when min(2F, P) > truncatedSVDMinDim.
// The full thin SVD costs O(m·n·min(m, n)) flops and keeps an m×min and an
// n×min factor; the truncated one costs O(m·n·l) per power iteration with
// l = k + 10. At min(m, n) = 300 the two take about the same time on the
// 2-core reference machine (BenchmarkSVD* in svd_trunc_test.go); above it
// the truncated one wins by a growing factor.
const truncatedSVDMinDim = 300

// partialSVD is a rank-k partial singular value decomposition
// A ≈ U diag(Values[:k]) Vᵀ.
type partialSVD struct {
	U *mat.Dense // m×k, orthonormal columns
	V *mat.Dense // n×k, orthonormal columns
	// Values holds the l = k + oversampling Ritz values, largest first.
	// The first k are accurate singular values; the others are estimates
	// from below (Ritz values never exceed the true singular values).
	Values []float64
	// Resid2 = ‖A − U Σ Vᵀ‖²_F, computed directly (not as ‖A‖² − Σσ²,
	// which cancels for nearly rank-k matrices).
	Resid2 float64
	// Iterations counts the power iterations; Bound is the final a
	// posteriori bound on the sine of the largest principal angle between
	// the computed and the exact dominant k-dimensional subspaces.
	Iterations int
	Bound      float64
	Converged  bool
}

// rsvdConfig tunes randomizedSVD; the zero value gives the defaults.
type rsvdConfig struct {
	Oversample int     // extra basis vectors p; 0 means 10
	MaxIter    int     // power iterations at most; 0 means 40
	Tol        float64 // stop when the angle bound ≤ Tol; 0 means 1e-11
	Seed       uint64  // seed of the Gaussian start; the default 0 is fine
	// Start, when not nil (l×n), replaces the random test matrix Ωᵀ: a
	// warm start from a previous, nearby matrix (rows = vectors in ℝⁿ).
	Start *mat.Dense
}

// randomizedSVD computes the dominant rank-k part of A (m×n) by randomized
// subspace iteration (Halko, Martinsson and Tropp, "Finding structure with
// randomness", SIAM Review 53(2), 2011, Algorithm 4.4 with the
// re-orthonormalisation of every half step, followed by the direct SVD of
// Algorithm 5.1):
//
//	Y₀ = A Ω,  Q₀ = orth(Y₀)                       (Ω n×l Gaussian, l = k+p)
//	repeat:  Z = Aᵀ Q,  Q_z = orth(Z);  Y = A Q_z,  Q = orth(Y)
//	B = Qᵀ A = Zᵀ = R_zᵀ Q_zᵀ,  R_zᵀ = Ũ Σ W̃ᵀ  ⇒  U = Q Ũ, V = Q_z W̃.
//
// Instead of a fixed number of power iterations q it iterates until an a
// posteriori bound is met. With the Ritz triplets (σ_i, u_i, v_i) of B,
// Aᵀu_i = σ_i v_i holds exactly by construction and r_i = A v_i − σ_i u_i
// comes for free from the next product Y = A Q_z; Wedin's sin θ theorem
// (Stewart and Sun, Matrix Perturbation Theory, 1990, Thm V.4.4) bounds the
// largest principal angle by ‖[r_1 … r_k]‖_F / (σ_k − σ_{k+1}). Iteration
// stops when that bound is ≤ Tol, when it no longer shrinks (rounding
// floor, or no gap between σ_k and σ_{k+1}), or after MaxIter.
//
// All work is done on transposed factors (rows = basis vectors) so that
// both big products are row-major dense products that gonum runs on all
// cores; no m×m or n×n matrix is formed. Extra memory is O((m+n)·l).
func randomizedSVD(a *mat.Dense, k int, cfg rsvdConfig) (partialSVD, error) {
	m, n := a.Dims()
	if k < 1 || k > min(m, n) {
		panic("factor: randomizedSVD rank out of range")
	}
	p := cfg.Oversample
	if p == 0 {
		p = 10
	}
	l := min(k+p, min(m, n))
	maxIter := cfg.MaxIter
	if maxIter == 0 {
		maxIter = 40
	}
	tol := cfg.Tol
	if tol == 0 {
		tol = 1e-11
	}
	rng := rand.New(rand.NewPCG(cfg.Seed, 0x9e3779b97f4a7c15))

	omega := cfg.Start
	if omega == nil || func() bool { r, c := omega.Dims(); return r != l || c != n }() {
		omega = mat.NewDense(l, n, nil)
		data := omega.RawMatrix().Data
		for i := range data {
			data[i] = rng.NormFloat64()
		}
	}
	qt := mat.NewDense(l, m, nil) // Qᵀ
	qt.Mul(omega, a.T())          // (A Ω)ᵀ = Ωᵀ Aᵀ
	orthRows(qt, nil, rng)

	zt := mat.NewDense(l, n, nil) // Zᵀ = Qᵀ A, then Q_zᵀ in place
	yt := mat.NewDense(l, m, nil) // Yᵀ = Q_zᵀ Aᵀ
	tri := mat.NewDense(l, l, nil)
	var res partialSVD
	prevBound := math.Inf(1)
	var svd mat.SVD
	var ur, wr mat.Dense
	av := make([]float64, m)
	u := make([]float64, m)
	for it := 1; ; it++ {
		zt.Mul(qt, a)
		orthRows(zt, tri, rng) // Zᵀ = T Q_zᵀ, T = R_zᵀ lower triangular
		if !svd.Factorize(tri, mat.SVDFull) {
			return partialSVD{}, errors.New("factor: SVD of the projected matrix did not converge")
		}
		vals := svd.Values(nil)
		svd.UTo(&ur) // T = Ũ Σ W̃ᵀ
		svd.VTo(&wr)
		yt.Mul(zt, a.T()) // (A Q_z)ᵀ

		// Residual r_i = A v_i − σ_i u_i with v_i = Q_z w̃_i, u_i = Q ũ_i.
		r2 := 0.0
		for i := 0; i < k; i++ {
			for j := range av {
				av[j], u[j] = 0, 0
			}
			for r := 0; r < l; r++ {
				floats.AddScaled(av, wr.At(r, i), yt.RawRowView(r))
				floats.AddScaled(u, ur.At(r, i), qt.RawRowView(r))
			}
			floats.AddScaled(av, -vals[i], u)
			r2 += floats.Dot(av, av)
		}
		gap := vals[k-1]
		if k < l {
			gap -= vals[k]
		}
		bound := math.Inf(1)
		if gap > 0 {
			bound = math.Sqrt(r2) / gap
		} else if r2 == 0 {
			bound = 0
		}
		done := bound <= tol || it >= maxIter || (it > 2 && bound > 0.5*prevBound)
		if done {
			res.Values = vals
			res.Iterations = it
			res.Bound = bound
			res.Converged = bound <= tol || (it > 2 && bound > 0.5*prevBound && bound < 1e-6)
			// Uᵀ = Ũ_kᵀ Qᵀ and Vᵀ = W̃_kᵀ Q_zᵀ.
			ut := mat.NewDense(k, m, nil)
			ut.Mul(ur.Slice(0, l, 0, k).T(), qt)
			vt := mat.NewDense(k, n, nil)
			vt.Mul(wr.Slice(0, l, 0, k).T(), zt)
			res.U = mat.DenseCopyOf(ut.T())
			res.V = mat.DenseCopyOf(vt.T())
			res.Resid2 = residualRankK(a, ut, vals[:k], vt)
			return res, nil
		}
		prevBound = bound
		qt, yt = yt, qt
		orthRows(qt, nil, rng)
	}
}

// orthRows orthonormalises the rows of x in place by classical Gram–Schmidt
// applied twice ("twice is enough": Giraud, Langou and Rozložník, Comput.
// Math. Appl. 50, 2005), so that x_old = T · x_new with T lower triangular;
// T is stored in tri when not nil. A row that vanishes (rank-deficient
// input) is replaced by a random vector orthogonal to the previous ones and
// gets a zero diagonal in T.
func orthRows(x *mat.Dense, tri *mat.Dense, rng *rand.Rand) {
	l, _ := x.Dims()
	if tri != nil {
		tri.Zero()
	}
	c := make([]float64, l)
	for i := 0; i < l; i++ {
		v := x.RawRowView(i)
		norm0 := floats.Norm(v, 2)
		for j := range c[:i] {
			c[j] = 0
		}
		for pass := 0; pass < 2; pass++ {
			for j := 0; j < i; j++ {
				q := x.RawRowView(j)
				d := floats.Dot(q, v)
				c[j] += d
				floats.AddScaled(v, -d, q)
			}
		}
		nv := floats.Norm(v, 2)
		if nv > 1e-300 && nv < 1e-10*norm0 {
			// Heavy cancellation: a third pass restores orthogonality.
			for j := 0; j < i; j++ {
				q := x.RawRowView(j)
				d := floats.Dot(q, v)
				c[j] += d
				floats.AddScaled(v, -d, q)
			}
			nv = floats.Norm(v, 2)
		}
		if !(nv > 1e-300) {
			// Replace by a random direction, orthogonalised twice.
			for r := range v {
				v[r] = rng.NormFloat64()
			}
			for pass := 0; pass < 2; pass++ {
				for j := 0; j < i; j++ {
					q := x.RawRowView(j)
					floats.AddScaled(v, -floats.Dot(q, v), q)
				}
			}
			floats.Scale(1/floats.Norm(v, 2), v)
			nv = 0
		} else {
			floats.Scale(1/nv, v)
		}
		if tri != nil {
			for j := 0; j < i; j++ {
				tri.Set(i, j, c[j])
			}
			tri.Set(i, i, nv)
		}
	}
}

// residualRankK returns ‖A − Uᵀᵀ diag(s) Vᵀ‖²_F for row-stored factors
// ut (k×m) and vt (k×n), one pass over A split across the cores.
func residualRankK(a *mat.Dense, ut *mat.Dense, s []float64, vt *mat.Dense) float64 {
	m, n := a.Dims()
	k := len(s)
	workers := min(runtime.GOMAXPROCS(0), max(1, m/64))
	parts := make([]float64, workers)
	var wg sync.WaitGroup
	for w := 0; w < workers; w++ {
		wg.Add(1)
		go func(w int) {
			defer wg.Done()
			row := make([]float64, n)
			sum := 0.0
			for i := w; i < m; i += workers {
				copy(row, a.RawRowView(i))
				for c := 0; c < k; c++ {
					floats.AddScaled(row, -s[c]*ut.At(c, i), vt.RawRowView(c))
				}
				sum += floats.Dot(row, row)
			}
			parts[w] = sum
		}(w)
	}
	wg.Wait()
	return floats.Sum(parts)
}

// principalAngleSin returns the sine of the largest principal angle between
// the column spaces of A and B (both m×k with orthonormal columns): with
// the singular values c_i of AᵀB (the cosines), sin θ_max = √(1 − c_min²),
// computed as the norm of the component of B outside span(A) for accuracy
// at small angles (Björck and Golub, Math. Comp. 27, 1973).
func principalAngleSin(a, b *mat.Dense) float64 {
	var atb, proj, diff mat.Dense
	atb.Mul(a.T(), b)
	proj.Mul(a, &atb)
	diff.Sub(b, &proj) // (I − AAᵀ) B
	var svd mat.SVD
	if !svd.Factorize(&diff, mat.SVDNone) {
		return math.NaN()
	}
	return svd.Values(nil)[0]
}
