package main

import (
	"strings"
	"testing"
)

// --reference reads both of its forms: two track ids, or two image points
// in a frame named by file name (which may itself hold colons) or index.
// Malformed values are usage errors that show the expected form.
func TestReferenceFlag(t *testing.T) {
	good := []struct {
		in     string
		frame  string
		a, b   [2]float64
		ta, tb int
		l      float64
	}{
		{in: "17,242,25.4", ta: 17, tb: 242, l: 25.4},
		{in: "img_0012.png:412.5,230:598,236.4:25.4", frame: "img_0012.png", a: [2]float64{412.5, 230}, b: [2]float64{598, 236.4}, l: 25.4},
		{in: "3: 10, 20 : 30,40 :2", frame: "3", a: [2]float64{10, 20}, b: [2]float64{30, 40}, l: 2},
		{in: "cam:a.png:1,2:3,4:5", frame: "cam:a.png", a: [2]float64{1, 2}, b: [2]float64{3, 4}, l: 5},
	}
	for _, g := range good {
		f := refineFlags{reference: g.in, unit: "mm", refine: true, loss: "huber", lossScale: 1, maxIter: 10}
		rc, err := f.config()
		if err != nil {
			t.Errorf("%q: %v", g.in, err)
			continue
		}
		r := rc.Reference
		if r == nil || r.Frame != g.frame || r.A != g.a || r.B != g.b || r.Length != g.l || (g.frame == "" && (r.TrackA != g.ta || r.TrackB != g.tb)) {
			t.Errorf("%q read as %+v", g.in, r)
		}
	}
	for _, in := range []string{"1,2", "1,1,3", "1,2,-1", ":1,2:3,4:5", "f:1,2:1,2:5", "f:1,2:3:5", "f:1,2:3,4:0", "f:1,x:3,4:5", "f:NaN,1:3,4:5", "f:1,2:3,4"} {
		f := refineFlags{reference: in, unit: "mm", refine: true, loss: "huber", lossScale: 1, maxIter: 10}
		_, err := f.config()
		if err == nil {
			t.Errorf("%q accepted", in)
			continue
		}
		if _, ok := err.(*usageError); !ok || !strings.Contains(err.Error(), "--reference") || strings.Contains(err.Error(), "\n") {
			t.Errorf("%q: %T %q, want a one-line usage error naming --reference", in, err, err)
		}
	}
}
