package kernels

import (
	"math/rand/v2"
	"testing"

	"github.com/x448/float16"
)

// BenchmarkXlogx compares the table with FastLog on float16 values in [0, 1).
func BenchmarkXlogx(b *testing.B) {
	InitXlogx()
	xs := make([]float32, 4096)
	rng := rand.New(rand.NewPCG(3, 4))
	for i := range xs {
		xs[i] = float16.Fromfloat32(float32(rng.Float64())).Float32()
	}
	b.Run("table", func(b *testing.B) {
		var s float64
		for range b.N {
			for _, x := range xs {
				s += Xlogx(x)
			}
		}
		_ = s
	})
	b.Run("FastLog", func(b *testing.B) {
		var s float64
		for range b.N {
			for _, x := range xs {
				s += xlogxCompute(x)
			}
		}
		_ = s
	})
}
