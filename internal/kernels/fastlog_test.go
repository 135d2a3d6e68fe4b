package kernels

import (
	"math"
	"math/rand/v2"
	"testing"
)

// TestFastLog compares FastLog with the standard library's math.Log.
func TestFastLog(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 4))
	xs := []float64{1, 2, 0.5, math.E, 1e-38, 1.1754944e-38, 3.4e38, 1 - 1e-16, 1 + 1e-15, 1.0 / 256, 0.9999}
	for i := 0; i < 200000; i++ {
		xs = append(xs, math.Ldexp(1+r.Float64(), r.IntN(260)-200))
	}
	for _, x := range xs {
		got, want := FastLog(x), math.Log(x)
		if math.Abs(got-want) > 1e-15*math.Max(1, math.Abs(want)) {
			t.Fatalf("FastLog(%v) = %v, math.Log = %v", x, got, want)
		}
	}
	for _, x := range []float64{0, -1, math.Inf(1), math.NaN(), 5e-324} {
		got, want := FastLog(x), math.Log(x)
		if !(got == want || math.IsNaN(got) && math.IsNaN(want)) {
			t.Errorf("FastLog(%v) = %v, want %v", x, got, want)
		}
	}
}
