package bundle_test

import (
	"context"
	"fmt"
	"math/rand/v2"

	"gonum.org/v1/gonum/mat"

	"trackfactor/factor"
	"trackfactor/factor/bundle"
	"trackfactor/factor/rotation"
)

// Refine a perturbed orthographic reconstruction of eight random points
// seen from five views, then read the summary and a point's uncertainty.
func ExampleAdjust() {
	g := rand.New(rand.NewPCG(1, 2))
	truth := &factor.Reconstruction{Model: factor.Orthographic}
	for f := 0; f < 5; f++ {
		R := rotation.Exp([3]float64{0.3, 0.2 * float64(f), 0})
		truth.Cameras = append(truth.Cameras, factor.Camera{Frame: f, R: R, T: [3]float64{320, 240, 0}, Scale: 1})
	}
	for j := 0; j < 8; j++ {
		X := [3]float64{100 * g.NormFloat64(), 100 * g.NormFloat64(), 100 * g.NormFloat64()}
		truth.Points = append(truth.Points, factor.Point{Track: j, X: X})
	}
	W := mat.NewDense(10, 8, nil)
	for f := range truth.Cameras {
		for j, p := range truth.Points {
			u, v := truth.Project(f, p.X)
			W.Set(2*f, j, u+0.3*g.NormFloat64())
			W.Set(2*f+1, j, v+0.3*g.NormFloat64())
		}
	}
	m := &factor.Measurements{W: W}
	start := *truth
	start.Points = append([]factor.Point(nil), truth.Points...)
	for j := range start.Points {
		start.Points[j].X[0] += 2
	}
	res, err := bundle.Adjust(context.Background(), m, &start, bundle.Options{Loss: bundle.Squared})
	if err != nil {
		fmt.Println(err)
		return
	}
	s := res.Summary
	fmt.Printf("%s, converged %v, RMS %.1f → %.2f px\n", s.Termination, s.Termination.Converged(), s.InitialRMS, s.FinalRMS)
	fmt.Printf("n = %d residuals, d = %d parameters\n", s.Residuals, s.Parameters)
	fmt.Printf("point 3: σ = %.2f world units\n", res.Uncertainty.Points[3].Sigma)
	// Output:
	// function-tolerance, converged true, RMS 1.3 → 0.19 px
	// n = 80 residuals, d = 43 parameters
	// point 3: σ = 0.52 world units
}
