package kernels

// Paths says which loops this binary runs on this processor, for heed
// version: results of the vector loops differ from the scalar ones in the
// last digits of the redundancy (MlogmSum), so the shards of one job
// should run one kind.
func Paths() string {
	switch {
	case simdHalf && simdJS:
		return "vector (GOEXPERIMENT=simd build: AVX2 row sums, AVX-512 Jensen-Shannon terms)"
	case simdHalf:
		return "vector row sums (GOEXPERIMENT=simd build: AVX2), scalar Jensen-Shannon terms (no AVX-512 here)"
	case simdBuild:
		return "scalar (GOEXPERIMENT=simd build, but this processor has no AVX2)"
	}
	return "scalar (built without GOEXPERIMENT=simd: make build uses it)"
}
