//go:build !(goexperiment.simd && amd64)

package kernels

// simdJS is false in the default build: MlogmSum is the scalar loop.
const simdJS = false

func mlogmSum512(a, b []float32) float64 { panic("kernels: no SIMD in this build") }
