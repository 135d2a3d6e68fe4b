//go:build !(goexperiment.simd && amd64)

package kernels

// simdHalf is false in the default build: Add16 is the scalar loop.
const simdHalf = false

// simdBuild: this is not a GOEXPERIMENT=simd build.
const simdBuild = false

func (rs *Sums) add16AVX2(t *Half, run []uint16, d, step float64) uint64 {
	panic("kernels: no SIMD in this build")
}

func widen16AVX2(t *Half, dst []float32, src []uint16) { panic("kernels: no SIMD in this build") }
