package kernels

import (
	"math/rand/v2"
	"testing"
)

// The benchmarks time each fast loop beside its reference loop on the
// same 1,024-key rows, so the ratio comes from one run (compare medians of
// -count runs; there are no timing thresholds anywhere):
//
//	go test -run '^$' -bench . -count 10 ./internal/kernels
//	GOEXPERIMENT=simd go test -run '^$' -bench . -count 10 ./internal/kernels
//
// Rows are float16 softmax rows with a causal row's zeros: keys past the
// query are 0.

const benchKeys = 1024

func benchRows(n int) ([][]uint16, [][]float32, *Half) {
	dt := dtypes()[0]
	rng := rand.New(rand.NewPCG(1, 2))
	rows := make([][]uint16, n)
	fs := make([][]float32, n)
	for i := range rows {
		q := rng.IntN(benchKeys)
		r := make([]uint16, benchKeys)
		f := make([]float32, benchKeys)
		for k := 0; k <= q; k++ {
			r[k] = dt.enc(float32(rng.Float64() * 2 / float64(q+1)))
			f[k] = dt.t.Val[r[k]]
		}
		rows[i], fs[i] = r, f
	}
	return rows, fs, &dt.t
}

var sink float64

func BenchmarkAdd16(b *testing.B) {
	rows, _, t := benchRows(64)
	for _, c := range []struct {
		name string
		simd bool
		fn   func(s *Sums, row []uint16)
	}{
		{"ref", false, func(s *Sums, row []uint16) { s.Add16Ref(t, row, 0, 1) }},
		{"scalar", false, func(s *Sums, row []uint16) { s.add16Scalar(t, row, 0, 1) }},
		{"simd", true, func(s *Sums, row []uint16) { s.add16AVX2(t, row, 0, 1) }},
	} {
		b.Run(c.name, func(b *testing.B) {
			if c.simd && !simdHalf {
				b.Skip("no vector loop in this build (GOEXPERIMENT=simd)")
			}
			b.SetBytes(2 * benchKeys)
			for i := range b.N {
				var s Sums
				c.fn(&s, rows[i&63])
				sink += s.Ent
			}
		})
	}
}

// refFast names the two sub-benchmarks of a reference loop and its fast path.
var refFast = [2]string{"ref", "fast"}

// benchEach runs fn(i) b.N times, i counting up, as sub-benchmark name over
// bytes bytes an op.
func benchEach(b *testing.B, name string, bytes int64, fn func(i int)) {
	b.Run(name, func(b *testing.B) {
		b.SetBytes(bytes)
		for i := range b.N {
			fn(i)
		}
	})
}

func BenchmarkSum16(b *testing.B) {
	rows, _, t := benchRows(64)
	for j, sum := range [2]func(*Sums, []uint16){func(s *Sums, r []uint16) { s.Sum16Ref(t, r) }, func(s *Sums, r []uint16) { s.Sum16(t, r) }} {
		benchEach(b, refFast[j], 2*benchKeys, func(i int) {
			var s Sums
			sum(&s, rows[i&63])
			sink += s.S
		})
	}
}

func BenchmarkFinite16(b *testing.B) {
	rows, _, t := benchRows(64)
	for j, finite := range [2]func([]uint16, uint16) (int, bool, bool){Finite16Ref, Finite16} {
		benchEach(b, refFast[j], 2*benchKeys, func(i int) {
			k, _, _ := finite(rows[i&63], t.Exp)
			sink += float64(k)
		})
	}
}

// BenchmarkAllZero16 scans the forbidden (all-zero) part of causal rows:
// keys q+1... of every row, 512 keys on average.
func BenchmarkAllZero16(b *testing.B) {
	rows := make([][]uint16, 64)
	for i := range rows {
		rows[i] = make([]uint16, benchKeys/2+i)
	}
	for j, zero := range [2]func([]uint16) bool{AllZero16Ref, AllZero16} {
		benchEach(b, refFast[j], benchKeys, func(i int) {
			if zero(rows[i&63]) {
				sink++
			}
		})
	}
}

// BenchmarkMlogmSum is the Jensen-Shannon term of two causal rows: the
// definition with math.Log (ref), the scalar loop with its table logarithm
// (scalar) and, in a GOEXPERIMENT=simd build on AVX-512, the vector loop.
func BenchmarkMlogmSum(b *testing.B) {
	_, fs, _ := benchRows(65)
	b.Run("ref", func(b *testing.B) {
		b.SetBytes(8 * benchKeys)
		for i := range b.N {
			sink += MlogmSumRef(fs[i&63], fs[i&63+1])
		}
	})
	b.Run("scalar", func(b *testing.B) {
		b.SetBytes(8 * benchKeys)
		for i := range b.N {
			sink += mlogmSumScalar(fs[i&63], fs[i&63+1])
		}
	})
	b.Run("simd", func(b *testing.B) {
		if !simdJS {
			b.Skip("no AVX-512 path in this build (GOEXPERIMENT=simd)")
		}
		b.SetBytes(8 * benchKeys)
		for i := range b.N {
			sink += mlogmSum512(fs[i&63], fs[i&63+1])
		}
	})
}

func BenchmarkWiden16(b *testing.B) {
	rows, _, t := benchRows(64)
	dst := make([]float32, benchKeys)
	b.Run("ref", func(b *testing.B) {
		b.SetBytes(2 * benchKeys)
		for i := range b.N {
			Widen16Ref(t, dst, rows[i&63])
		}
	})
	b.Run("fast", func(b *testing.B) {
		b.SetBytes(2 * benchKeys)
		for i := range b.N {
			Widen16(t, dst, rows[i&63])
		}
	})
}

// BenchmarkFinite32 times the plain loop Finite32 is (a branch-free loop
// measured slower and was not kept).
func BenchmarkFinite32(b *testing.B) {
	_, fs, _ := benchRows(64)
	b.SetBytes(4 * benchKeys)
	for i := range b.N {
		Finite32(fs[i&63])
	}
}

func BenchmarkAllZero32(b *testing.B) {
	zero := make([]float32, benchKeys)
	b.Run("ref", func(b *testing.B) {
		b.SetBytes(4 * benchKeys)
		for range b.N {
			AllZero32Ref(zero)
		}
	})
	b.Run("fast", func(b *testing.B) {
		b.SetBytes(4 * benchKeys)
		for range b.N {
			AllZero32(zero)
		}
	})
}
