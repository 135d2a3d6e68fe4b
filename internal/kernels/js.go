package kernels

import "math"

// MlogmSum returns -sum_k m ln m over m = (a[k] + b[k]) / 2 > 0, the H(M) of
// the Jensen-Shannon divergence (analysis's layerStore.js), for rows of finite values
// without negative ones (MlogmSumSlow takes the others). It is the
// redundancy pass's inner loop, so it works with s = a + b = 2m:
// sum m ln m = (sum s ln s - ln 2 sum s) / 2, and takes the keys four at a
// time into four partial sums (keys i mod 4, added together at the end),
// so that four logarithms are computed side by side instead of each
// waiting on the sum of the last. The order of the sums is fixed, so the
// result depends only on the two rows and the build: a GOEXPERIMENT=simd
// build on a processor with AVX-512 takes mlogmSum512 (js_simd.go), whose
// logarithm is another approximation, so its H(M) can differ from the
// default build's in the last 11 digits (both are within 6e-11 of the
// definition, MlogmSumRef; shards of one job should use one build).
func MlogmSum(a, b []float32) float64 {
	if simdJS {
		return mlogmSum512(a, b)
	}
	return mlogmSumScalar(a, b)
}

// mlogmSumScalar is MlogmSum in scalar registers, four lanes.
func mlogmSumScalar(a, b []float32) float64 {
	b = b[:len(a)]
	var h0, h1, h2, h3, t0, t1, t2, t3 float64
	n := len(a) &^ 3
	for k := 0; k < n; k += 4 {
		s0 := float64(a[k]) + float64(b[k])
		s1 := float64(a[k+1]) + float64(b[k+1])
		s2 := float64(a[k+2]) + float64(b[k+2])
		s3 := float64(a[k+3]) + float64(b[k+3])
		h0 += s0 * lnm(s0)
		h1 += s1 * lnm(s1)
		h2 += s2 * lnm(s2)
		h3 += s3 * lnm(s3)
		t0 += s0
		t1 += s1
		t2 += s2
		t3 += s3
	}
	for k := n; k < len(a); k++ {
		s0 := float64(a[k]) + float64(b[k])
		h0 += s0 * lnm(s0)
		t0 += s0
	}
	return -0.5 * (((h0 + h1) + (h2 + h3)) - math.Ln2*((t0+t1)+(t2+t3)))
}

// lnm returns ln s for a positive normal float64 s (every s MlogmSum forms
// from finite float32 values >= 0 is one, or 0), without a branch so that
// it is inlined. ln s as in FastLog: s = 2^e f, f = c (1 + r) with c the
// 8-bit truncation of f (logTable), 0 <= r < 2^-8, and ln(1 + r) from its
// Taylor series to r^3: the error is below r^4/4 < 6e-11, so H(M) is within
// 6e-11 (its mass is 1; the redundancy is reported to 4 digits). For s = 0
// it returns a finite value, so s ln s = 0 there too.
func lnm(s float64) float64 {
	bits := math.Float64bits(s)
	t := &logTable[(bits>>44)&0xff]
	r := (math.Float64frombits(bits&(1<<52-1)|0x3ff<<52) - t[2]) * t[1]
	return expLn[(bits>>52)&0x7ff] + (t[0] + r*(1+r*(-0.5+r*(1.0/3))))
}

// expLn holds (e - 1023) ln 2 for the biased exponents e of float64. A
// table filled at start (16 KB): computing the product in lnm instead put
// lnm over the inlining budget, and MlogmSum's scalar loop took 2,960
// against 2,170 ns a 1,024-key row.
var expLn = func() (t [2048]float64) {
	for e := range t {
		t[e] = float64(e-1023) * math.Ln2
	}
	return
}()

// MlogmSumSlow is MlogmSum for rows that may hold negative values: keys
// where m <= 0 add nothing.
func MlogmSumSlow(a, b []float32) float64 {
	b = b[:len(a)]
	var hm float64
	for k, x := range a {
		if m := 0.5 * (float64(x) + float64(b[k])); m > 0 {
			hm -= m * FastLog(m)
		}
	}
	return hm
}

// MlogmSumRef is the definition MlogmSum and MlogmSumSlow compute:
// -sum_k m ln m over m = (a[k] + b[k]) / 2 > 0, key by key, with the Go
// standard library's math.Log.
func MlogmSumRef(a, b []float32) float64 {
	var hm float64
	for k, x := range a {
		if m := 0.5 * (float64(x) + float64(b[k])); m > 0 {
			hm -= m * math.Log(m)
		}
	}
	return hm
}
