// Package kernels holds the hot loops of heed's attention pass over float16,
// bfloat16 and float32 rows: row sums with the finite / negative flags,
// the scan for non-finite values, the test that a forbidden run holds no
// mass, the entropy and distance terms of a row (x ln x, x |k - p|) and the
// Jensen-Shannon terms of two rows (m ln m). Package analysis calls them;
// they import nothing of heed.
//
// Every fast loop here has a plain reference loop beside it (the names
// ending in Ref: one key at a time, in key order, the definition with
// nothing clever) and kernels_test.go checks that the two agree: to the bit
// where the result is an exact sum (a sum of float16 or bfloat16 values in
// float64 is exact for rows shorter than 2^13 keys, whatever the order, so
// the fast loop's lanes give the reference's bits), and within the bound the
// function's comment states where it is not (entropy and distance terms,
// whose lane order differs from key order, and logarithms).
//
// The fast loops run on little-endian hosts only (analysis takes the
// pattern path there only): they read four 16-bit patterns as one 64-bit
// word.
package kernels
