package kernels

import (
	"math"
	"math/rand/v2"
	"testing"

	"github.com/x448/float16"
)

// The table must give exactly what the pass computed before it existed,
// float64(x) * FastLog(float64(x)), for every positive float16 and
// bfloat16 value (all 65,536 bit patterns of each are tried) and for any
// other float32.
func TestXlogxTableIsExact(t *testing.T) {
	InitXlogx()
	check := func(what string, x float32) {
		if !(x > 0) || math.IsInf(float64(x), 0) {
			return
		}
		v := float64(x)
		want := v * FastLog(v)
		if got := Xlogx(x); math.Float64bits(got) != math.Float64bits(want) {
			t.Fatalf("%s: Xlogx(%g) = %v, want %v", what, x, got, want)
		}
	}
	for i := 0; i < 1<<16; i++ {
		check("float16", float16.Frombits(uint16(i)).Float32())
		check("bfloat16", math.Float32frombits(uint32(i)<<16))
	}
	rng := rand.New(rand.NewPCG(1, 2))
	for i := 0; i < 100000; i++ {
		check("float32", math.Float32frombits(rng.Uint32()))
		check("float32 in (0, 1]", float32(rng.Float64()))
	}
}

// Derived values: 0.5 ln 0.5 = -ln(2)/2; 1 ln 1 = 0; 2^-24 ln 2^-24 =
// -24 ln(2) 2^-24 (the smallest float16, from the table).
func TestXlogxValues(t *testing.T) {
	InitXlogx()
	tiny := math.Ldexp(1, -24)
	for _, c := range []struct {
		x    float32
		want float64
	}{
		{0.5, -math.Ln2 / 2},
		{1, 0},
		{float32(tiny), -24 * math.Ln2 * tiny},
	} {
		if got := Xlogx(c.x); math.Abs(got-c.want) > 1e-15*math.Max(1, math.Abs(c.want)) {
			t.Errorf("Xlogx(%g) = %v, want %v", c.x, got, c.want)
		}
	}
}
