package rotation

import "gonum.org/v1/gonum/mat"

func nearest(M [3][3]float64) ([3][3]float64, bool) {
	a := mat.NewDense(3, 3, []float64{
		M[0][0], M[0][1], M[0][2],
		M[1][0], M[1][1], M[1][2],
		M[2][0], M[2][1], M[2][2],
	})
	var svd mat.SVD
	if !svd.Factorize(a, mat.SVDFull) {
		return Identity(), false
	}
	vals := svd.Values(nil)
	if !(vals[1] > 1e-12*vals[0]) {
		return Identity(), false
	}
	var u, v mat.Dense
	svd.UTo(&u)
	svd.VTo(&v)
	var U, V [3][3]float64
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			U[i][j] = u.At(i, j)
			V[i][j] = v.At(i, j)
		}
	}
	d := Det(U) * Det(V)
	if d < 0 {
		for i := 0; i < 3; i++ {
			U[i][2] = -U[i][2]
		}
	}
	return MulT(U, V), true
}
