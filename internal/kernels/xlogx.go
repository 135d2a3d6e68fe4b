package kernels

import (
	"math"
	"sync"
)

// x ln x for the entropy terms, by table for the values a float16 or
// bfloat16 export can hold. Every float16 value is a float32 whose low 13
// mantissa bits are zero, and every bfloat16 value one whose low 16 bits are
// zero, so in (0, 1] there are only 24,577 and 16,256 of them: a lookup
// replaces the logarithm in the pass (the profile's largest cost) and gives the
// very same float64 as computing float64(x) * FastLog(float64(x)), so
// results do not change by a bit. Other values (float32 and float64 exports,
// anything above 1) are computed.

const (
	xlogxF16Lo = 103 << 10 // bits>>13 of 2^-24, the smallest positive float16
	xlogxF16Hi = 127 << 10 // bits>>13 of 1.0
	xlogxBFHi  = 0x3f80    // bits>>16 of 1.0
)

var (
	xlogxOnce sync.Once
	xlogxF16  []float64 // index bits>>13 - xlogxF16Lo
	xlogxBF16 []float64 // index bits>>16
)

func xlogxTables() {
	xlogxF16 = make([]float64, xlogxF16Hi-xlogxF16Lo+1)
	for i := range xlogxF16 {
		xlogxF16[i] = xlogxCompute(math.Float32frombits(uint32(i+xlogxF16Lo) << 13))
	}
	xlogxBF16 = make([]float64, xlogxBFHi+1)
	for i := 1; i <= xlogxBFHi; i++ {
		xlogxBF16[i] = xlogxCompute(math.Float32frombits(uint32(i) << 16))
	}
}

// xlogxCompute is x ln x in float64 with FastLog, the product rounded on
// its own (the conversion keeps a compiler from fusing it into a caller's
// subtraction).
func xlogxCompute(x float32) float64 {
	v := float64(x)
	return float64(v * FastLog(v))
}

// Xlogx returns x ln x for x > 0 (the caller handles 0 ln 0 = 0 and
// negative values).
func Xlogx(x float32) float64 {
	b := math.Float32bits(x)
	if b&0x1fff == 0 {
		if i := int(b>>13) - xlogxF16Lo; uint(i) < uint(len(xlogxF16)) {
			return xlogxF16[i]
		}
		if b&0xffff == 0 && b>>16 <= xlogxBFHi {
			return xlogxBF16[b>>16]
		}
	}
	return xlogxCompute(x)
}

// InitXlogx builds the tables once; call it before the first Xlogx (the
// pass does, before starting workers).
func InitXlogx() { xlogxOnce.Do(xlogxTables) }
