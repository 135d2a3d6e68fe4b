package kernels

import "math"

// logTable holds ln(1 + i/256), 1/(1 + i/256) and 1 + i/256 for the
// reduction of FastLog.
var logTable = func() (t [256][3]float64) {
	for i := range t {
		c := 1 + float64(i)/256
		t[i] = [3]float64{math.Log(c), 1 / c, c}
	}
	return
}()

// FastLog returns ln x for x > 0 to within a few ulps (relative error about
// 1e-15, checked against math.Log in the tests), about three times faster
// than math.Log: x = 2^e f with f in [1, 2), f = c (1 + r) with c the 8-bit
// truncation of f so that 0 <= r < 2^-8, and ln(1+r) from its Taylor series
// to r^5 (the first term left out, r^6/6 < 1e-15). Zero, subnormal, infinite
// and NaN arguments go to math.Log.
func FastLog(x float64) float64 {
	b := math.Float64bits(x)
	ex := int(b>>52) & 0x7ff
	if ex == 0 || ex == 0x7ff || b>>63 != 0 {
		return math.Log(x)
	}
	m := b & (1<<52 - 1)
	t := &logTable[m>>44]
	f := math.Float64frombits(m | 0x3ff<<52)
	r := (f - t[2]) * t[1]
	p := r * (1 + r*(-0.5+r*(1.0/3+r*(-0.25+r*0.2))))
	e := float64(ex - 1023)
	// ln 2 split as in fdlibm's log: e*ln2Hi is exact for |e| < 2^11
	return e*ln2Hi + (t[0] + (p + e*ln2Lo))
}

const (
	ln2Hi = 6.93147180369123816490e-01
	ln2Lo = 1.90821492927058770002e-10
)
