// Package kernels holds the hot loops of heed's attention pass over float16,
// bfloat16 and float32 rows: row sums with the finite / negative flags
// (Sums.Add16, Sum16, Add32, Sum32), the scan for non-finite values
// (Finite16, Finite32), the test that a forbidden run holds no mass
// (AllZero16, AllZero32), the entropy and distance terms of a row (x ln x,
// x |k - p|), the widening of kept rows (Widen16) and the Jensen-Shannon
// terms of two rows (m ln m, MlogmSum). Package analysis calls them; they
// import nothing of heed.
//
// Every fast loop here has a plain reference loop beside it (the names
// ending in Ref: one key at a time, in key order, the definition with
// nothing clever) and kernels_test.go checks that the two agree: to the bit
// where the result is an exact sum (float16 values are multiples of 2^-24
// below 2^16, so a float64 sum of fewer than 2^13 of them is exact whatever
// the order, and the fast loop's lanes give the reference's bits), and
// within the bound of recursive summation where it is not (bfloat16 sums,
// entropy and distance terms, whose lane order differs from key order) or
// within the stated error of a logarithm.
//
// The vector loops of a GOEXPERIMENT=simd build (files *_simd.go, build
// tag goexperiment.simd && amd64; the default build has none and needs no
// experiment): Add16's keeps the scalar loop's lanes and order, so it gives
// the same bits in both builds (tested); MlogmSum's has its own logarithm
// and agrees with the definition within its bound. Sum16, Finite16 and
// AllZero16 have none: a vector Sum16 measured within 15% of the scalar
// loop, not worth a second loop to keep equal.
//
// The fast loops run on little-endian hosts only (analysis takes the
// pattern path there only): they read four 16-bit patterns as one 64-bit
// word.
package kernels
