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
	for _, c := range []struct {
		name string
		f    func(float32) float64
	}{{"table", Xlogx}, {"FastLog", xlogxCompute}} {
		benchEach(b, c.name, 4*int64(len(xs)), func(int) {
			for _, x := range xs {
				sink += c.f(x)
			}
		})
	}
}
