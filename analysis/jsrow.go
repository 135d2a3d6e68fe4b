package analysis

import "math"

// mlogmSum returns -sum_k m ln m over m = (a[k] + b[k]) / 2 > 0, the H(M) of
// the Jensen-Shannon divergence (layerStore.js), for rows of finite values
// without negative ones (mlogmSumSlow takes the others). It is the
// redundancy pass's inner loop: keys are taken four at a time into four
// partial sums (keys i mod 4, added together at the end), so that four
// logarithms are computed side by side instead of each waiting on the sum
// of the last; the order of the sums is fixed, so the result depends only on
// the two rows.
func mlogmSum(a, b []float32) float64 {
	b = b[:len(a)]
	var h0, h1, h2, h3 float64
	n := len(a) &^ 3
	for k := 0; k < n; k += 4 {
		m0 := 0.5 * (float64(a[k]) + float64(b[k]))
		h0 += m0 * lnm(m0)
		m1 := 0.5 * (float64(a[k+1]) + float64(b[k+1]))
		h1 += m1 * lnm(m1)
		m2 := 0.5 * (float64(a[k+2]) + float64(b[k+2]))
		h2 += m2 * lnm(m2)
		m3 := 0.5 * (float64(a[k+3]) + float64(b[k+3]))
		h3 += m3 * lnm(m3)
	}
	for k := n; k < len(a); k++ {
		m0 := 0.5 * (float64(a[k]) + float64(b[k]))
		h0 += m0 * lnm(m0)
	}
	return -((h0 + h1) + (h2 + h3))
}

// lnm returns ln m for a positive normal float64 m (every m mlogmSum forms
// from finite float32 values >= 0 is one, or 0), without a branch so that it
// is inlined. ln m as in fastLog: m = 2^e f, f = c (1 + r) with c
// the 8-bit truncation of f (logTable), 0 <= r < 2^-8, and ln(1 + r) from
// its Taylor series to r^4: the error is below r^5/5 < 2e-13, so |m ln m| is
// within 2e-13 m (the redundancy is reported to 4 digits). For m = 0 it
// returns a finite value, so m ln m = 0 there too.
func lnm(m float64) float64 {
	bits := math.Float64bits(m)
	t := &logTable[(bits>>44)&0xff]
	r := (math.Float64frombits(bits&(1<<52-1)|0x3ff<<52) - t[2]) * t[1]
	return expLn[(bits>>52)&0x7ff] + (t[0] + r*(1+r*(-0.5+r*(1.0/3-r*0.25))))
}

// expLn holds (e - 1023) ln 2 for the biased exponents e of float64.
var expLn = func() (t [2048]float64) {
	for e := range t {
		t[e] = float64(e-1023) * math.Ln2
	}
	return
}()

// mlogmSumSlow is mlogmSum for rows that may hold negative values: keys
// where m <= 0 add nothing.
func mlogmSumSlow(a, b []float32) float64 {
	b = b[:len(a)]
	var hm float64
	for k, x := range a {
		if m := 0.5 * (float64(x) + float64(b[k])); m > 0 {
			hm -= m * fastLog(m)
		}
	}
	return hm
}
