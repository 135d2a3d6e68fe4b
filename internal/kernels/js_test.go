package kernels

import (
	"math"
	"math/rand"
	"testing"
)

// MlogmSum against the definition -sum m ln m, m = (a+b)/2, with math.Log
// (the Go standard library's logarithm, correctly rounded to within 1 ulp):
// within the bound its doc states (6e-11 per unit of mass) on random rows
// of float16-like and float32 values, including zeros and keys where only
// one row is nonzero; and MlogmSumSlow (rows with negative values) skips
// keys whose m <= 0.
func TestMlogmSum(t *testing.T) {
	rng := rand.New(rand.NewSource(3))
	for _, n := range []int{1, 3, 4, 7, 64, 1023} {
		a, b := make([]float32, n), make([]float32, n)
		for i := range a {
			switch rng.Intn(4) {
			case 0:
				a[i] = 0
			case 1:
				b[i] = 0
				a[i] = rng.Float32()
			default:
				a[i], b[i] = rng.Float32(), rng.Float32()*1e-3
			}
		}
		var sa, sb float64
		for i := range a {
			sa += float64(a[i])
			sb += float64(b[i])
		}
		for i := range a { // normalise so that each row has mass 1
			a[i], b[i] = float32(float64(a[i])/sa), float32(float64(b[i])/max(sb, 1e-30))
		}
		var want float64
		for i := range a {
			if m := 0.5 * (float64(a[i]) + float64(b[i])); m > 0 {
				want -= m * math.Log(m)
			}
		}
		if got := MlogmSum(a, b); math.Abs(got-want) > 6e-11 {
			t.Errorf("n=%d: MlogmSum = %.17g, want %.17g (math.Log), off by %g", n, got, want, got-want)
		}
		if got := mlogmSumScalar(a, b); math.Abs(got-want) > 6e-11 { // the default build's loop
			t.Errorf("n=%d: mlogmSumScalar = %.17g, want %.17g (math.Log), off by %g", n, got, want, got-want)
		}
		if got := MlogmSumRef(a, b); math.Abs(got-want) > 1e-13 {
			t.Errorf("n=%d: MlogmSumRef = %.17g, want %.17g", n, got, want)
		}
		if got := MlogmSumSlow(a, b); math.Abs(got-want) > 1e-13 {
			t.Errorf("n=%d: MlogmSumSlow = %.17g, want %.17g", n, got, want)
		}
	}
	if got := MlogmSumSlow([]float32{-0.5, 0.5, 0.25}, []float32{0.25, -0.5, 0.25}); math.Abs(got-(-0.25*math.Log(0.25))) > 1e-15 {
		t.Errorf("MlogmSumSlow with negatives = %v, want %v (only m = 0.25 counts)", got, -0.25*math.Log(0.25))
	}
}
