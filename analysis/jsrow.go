package analysis

import "math"

// mlogmSum returns -sum_k m ln m over m = (a[k] + b[k]) / 2 > 0, the H(M) of
// the Jensen-Shannon divergence (layerStore.js). It is the redundancy pass's
// inner loop, and fastLog is too large for the compiler to inline, so its
// fast path is written out here: the same operations in the same order, so
// the result is the same to the bit as -m*fastLog(m) summed in key order
// (values fastLog hands to math.Log still go there).
func mlogmSum(a, b []float32) float64 {
	b = b[:len(a)]
	var hm float64
	for k, x := range a {
		m := 0.5 * (float64(x) + float64(b[k]))
		if !(m > 0) {
			continue
		}
		bits := math.Float64bits(m)
		ex := int(bits>>52) & 0x7ff
		var lg float64
		if ex == 0 || ex == 0x7ff {
			lg = math.Log(m)
		} else {
			mant := bits & (1<<52 - 1)
			t := &logTable[mant>>44]
			f := math.Float64frombits(mant | 0x3ff<<52)
			r := (f - (1 + float64(mant>>44)/256)) * t[1]
			p := r * (1 + r*(-0.5+r*(1.0/3+r*(-0.25+r*0.2))))
			e := float64(ex - 1023)
			lg = e*ln2Hi + (t[0] + (p + e*ln2Lo))
		}
		hm -= m * lg
	}
	return hm
}
