package kernels

import (
	"math"
	"math/rand/v2"
	"testing"

	"github.com/x448/float16"
)

// f16Values is float16's value table from github.com/x448/float16 (an
// IEEE 754 binary16 implementation outside heed).
func f16Values() *[65536]float32 {
	v := new([65536]float32)
	for i := range v {
		v[i] = float16.Frombits(uint16(i)).Float32()
	}
	return v
}

// dtypes are the 16-bit dtypes with their tables and a conversion from a
// float32 to the nearest pattern.
func dtypes() []struct {
	name string
	t    Half
	enc  func(float32) uint16
} {
	return []struct {
		name string
		t    Half
		enc  func(float32) uint16
	}{
		{"float16", NewHalf(f16Values(), 0x7c00), func(x float32) uint16 { return float16.Fromfloat32(x).Bits() }},
		{"bfloat16", NewHalf(bf16Values(), 0x7f80), func(x float32) uint16 { return uint16(math.Float32bits(x) >> 16) }},
	}
}

// randomRow is a softmax-like row of n patterns: zeros, tiny values,
// subnormals, and with odd, a negative zero, a negative value, an infinity
// or a NaN at a random key.
func randomRow(rng *rand.Rand, n int, enc func(float32) uint16, exp uint16, odd int) []uint16 {
	row := make([]uint16, n)
	for k := range row {
		switch rng.IntN(6) {
		case 0:
			row[k] = 0
		case 1:
			row[k] = uint16(rng.IntN(4)) // +0 or subnormals (float16) / tiny (bfloat16)
		default:
			row[k] = enc(float32(rng.Float64() * 2 / float64(n+1)))
		}
	}
	if n > 0 {
		k := rng.IntN(n)
		switch odd {
		case 1:
			row[k] = 0x8000 // -0: zero, not negative
		case 2:
			row[k] = enc(-0.25)
		case 3:
			row[k] = exp // +Inf
		case 4:
			row[k] = exp | 1 // NaN
		}
	}
	return row
}

// sameSum compares a fast sum of row's values with the reference's: to
// the bit when exact (float16: multiples of 2^-24 below 2^16, fewer than
// 2^13 of them, so every order gives the exact sum), else within n ulps of
// the sum of magnitudes (recursive summation, Higham 2002, sec. 4.2, from
// memory).
func sameSum(exact bool, got, want float64, row []uint16, t *Half) bool {
	if exact {
		return math.Float64bits(got) == math.Float64bits(want)
	}
	var m float64
	for _, h := range row {
		m += math.Abs(float64(t.Val[h]))
	}
	return math.Abs(got-want) <= float64(len(row))*0x1p-52*m
}

// lengths cover the tails of the four- and eight-pattern steps.
var lengths = []int{0, 1, 2, 3, 4, 5, 7, 8, 9, 15, 16, 17, 31, 64, 127, 1000, 1023, 1024, 4099}

// The fast scans and sums agree with their reference loops: Finite16 and
// AllZero16 exactly; Sum16 and Add16 to the bit on the sum (every float16
// or bfloat16 value is a multiple of 2^-133 below 2^128 with 11 or 8
// significant bits, so a float64 sum of fewer than 2^13 of them that stays
// finite is exact whatever the order), the nonzero count, the largest
// magnitude and the flag; Add16's entropy and distance sums, whose lanes
// add the terms in another order, within n ulps of their sum of
// magnitudes (the bound of recursive summation, cited from memory: Higham, Accuracy and
// Stability of Numerical Algorithms, 2002, sec. 4.2).
func TestHalfKernelsEqualReference(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	for _, dt := range dtypes() {
		tb := &dt.t
		for _, n := range lengths {
			for odd := 0; odd <= 4; odd++ {
				for rep := 0; rep < 20; rep++ {
					row := randomRow(rng, n, dt.enc, tb.Exp, odd)
					k1, f1, n1 := Finite16(row, tb.Exp)
					k2, f2, n2 := Finite16Ref(row, tb.Exp)
					if k1 != k2 || f1 != f2 || n1 != n2 {
						t.Fatalf("%s n=%d odd=%d: Finite16 = %d %v %v, reference %d %v %v", dt.name, n, odd, k1, f1, n1, k2, f2, n2)
					}
					if a, b := AllZero16(row), AllZero16Ref(row); a != b {
						t.Fatalf("%s n=%d: AllZero16 = %v, reference %v", dt.name, n, a, b)
					}
					zeros := make([]uint16, n)
					for i := range zeros {
						zeros[i] = uint16(rng.IntN(2)) << 15 // +0 and -0
					}
					if !AllZero16(zeros) || !AllZero16Ref(zeros) {
						t.Fatalf("%s n=%d: a run of +0 and -0 is not all zero", dt.name, n)
					}
					var fs, rs Sums
					bad := Bad(fs.Sum16(tb, row))
					rbad := rs.Sum16Ref(tb, row)
					exact := dt.name == "float16" // see sumBound
					if bad != rbad || fs.NZ != rs.NZ || (f1 && !sameSum(exact, fs.S, rs.S, row, tb)) {
						t.Fatalf("%s n=%d odd=%d: Sum16 = %v %d %v, reference %v %d %v", dt.name, n, odd, fs.S, fs.NZ, bad, rs.S, rs.NZ, rbad)
					}
					d, step := float64(rng.IntN(3000)), 1.0
					if rng.IntN(2) == 0 {
						d, step = float64(n), -1
					}
					var fa, ra Sums
					bad = Bad(fa.Add16(tb, row, d, step))
					rbad = ra.Add16Ref(tb, row, d, step)
					if bad != rbad || fa.NZ != ra.NZ || fa.Mx16 != ra.Mx16 {
						t.Fatalf("%s n=%d odd=%d: Add16 flag/nz/max %v %d %#x, reference %v %d %#x", dt.name, n, odd, bad, fa.NZ, fa.Mx16, rbad, ra.NZ, ra.Mx16)
					}
					if !f1 {
						continue
					}
					if !sameSum(exact, fa.S, ra.S, row, tb) {
						t.Fatalf("%s n=%d odd=%d: Add16 sum %v, reference %v", dt.name, n, odd, fa.S, ra.S)
					}
					var ment, mdist float64
					dd := d
					for _, h := range row {
						ment += math.Abs(tb.XL[h])
						mdist += math.Abs(float64(tb.Val[h]) * dd)
						dd += step
					}
					ulp := float64(n) * 0x1p-52
					if math.Abs(fa.Ent-ra.Ent) > ulp*ment || math.Abs(fa.Dist-ra.Dist) > ulp*mdist {
						t.Fatalf("%s n=%d odd=%d: Add16 entropy %v distance %v, reference %v %v", dt.name, n, odd, fa.Ent, fa.Dist, ra.Ent, ra.Dist)
					}
				}
			}
		}
	}
}

// The vector loop of Add16 in a GOEXPERIMENT=simd build gives the scalar
// loop's sums to the bit (same lanes, same order), so both builds print the same
// statistics; in the default build there is nothing to compare.
func TestVectorSumsEqualScalar(t *testing.T) {
	if !simdHalf {
		t.Skip("no vector loop in this build (GOEXPERIMENT=simd) or no AVX2")
	}
	rng := rand.New(rand.NewPCG(9, 10))
	for _, dt := range dtypes() {
		tb := &dt.t
		for _, n := range lengths {
			for odd := 0; odd <= 4; odd++ {
				row := randomRow(rng, n, dt.enc, tb.Exp, odd)
				var a, b Sums
				add := b.add16Scalar
				if n >= 8 {
					add = b.add16AVX2
				}
				fa, fb := a.add16Scalar(tb, row, 5, -1), add(tb, row, 5, -1)
				finite := odd < 3 // with Inf or NaN only the flag counts
				if Bad(fa) != Bad(fb) || a.NZ != b.NZ || a.Mx16 != b.Mx16 || finite && (math.Float64bits(a.S) != math.Float64bits(b.S) ||
					math.Float64bits(a.Ent) != math.Float64bits(b.Ent) || math.Float64bits(a.Dist) != math.Float64bits(b.Dist)) {
					t.Fatalf("%s n=%d odd=%d: add16AVX2 %+v, add16Scalar %+v", dt.name, n, odd, b, a)
				}
			}
		}
	}
}

// Add32 and Sum32 over the float32 values of a row of patterns give
// Add16's and Sum16's sums to the bit (same lanes, same order), so a
// float16 head read as float32 and read as patterns agree.
func TestFloat32SumsEqualHalf(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 8))
	for _, dt := range dtypes() {
		tb := &dt.t
		for _, n := range lengths {
			row := randomRow(rng, n, dt.enc, tb.Exp, 1)
			f := make([]float32, n)
			for i, h := range row {
				f[i] = tb.Val[h]
			}
			var a, b Sums
			a.Add16(tb, row, 3, 1)
			b.Add32(f, 3, 1)
			if math.Float64bits(a.S) != math.Float64bits(b.S) || math.Float64bits(a.Ent) != math.Float64bits(b.Ent) ||
				math.Float64bits(a.Dist) != math.Float64bits(b.Dist) || a.NZ != b.NZ || tb.Val[a.Mx16] != math.Float32frombits(b.Mx32) {
				t.Fatalf("%s n=%d: Add16 %+v, Add32 %+v", dt.name, n, a, b)
			}
			var c, e Sums
			c.Sum16(tb, row)
			e.Sum32(f)
			if math.Float64bits(c.S) != math.Float64bits(e.S) || c.NZ != e.NZ {
				t.Fatalf("%s n=%d: Sum16 %+v, Sum32 %+v", dt.name, n, c, e)
			}
		}
	}
}

// bf16Values is the value table of bfloat16 (loader.RawTable's, which this
// leaf package cannot import): a pattern is the top 16 bits of a float32.
func bf16Values() *[65536]float32 {
	v := new([65536]float32)
	for i := range v {
		v[i] = math.Float32frombits(uint32(i) << 16)
	}
	return v
}

// Widen16 gives every finite pattern's value exactly: that of
// github.com/x448/float16 (float16) and of the pattern shifted into a
// float32's upper half (bfloat16, its definition), whichever loop the
// build takes, on every finite pattern and on random rows of every length.
func TestWiden16(t *testing.T) {
	rng := rand.New(rand.NewPCG(11, 12))
	for _, dt := range dtypes() {
		tb := &dt.t
		var all []uint16
		for i := range 65536 {
			if uint16(i)&tb.Exp != tb.Exp {
				all = append(all, uint16(i))
			}
		}
		rows := [][]uint16{all}
		for _, n := range lengths {
			rows = append(rows, randomRow(rng, n, dt.enc, tb.Exp, rng.IntN(3)))
		}
		for _, row := range rows {
			got := make([]float32, len(row)+1)
			got[len(row)] = 7 // past the end: untouched
			Widen16(tb, got, row)
			for k, h := range row {
				if math.Float32bits(got[k]) != math.Float32bits(tb.Val[h]) {
					t.Fatalf("%s: Widen16 of %#04x = %v (%#08x), want %v", dt.name, h, got[k], math.Float32bits(got[k]), tb.Val[h])
				}
			}
			if got[len(row)] != 7 {
				t.Fatalf("%s n=%d: Widen16 wrote past the row", dt.name, len(row))
			}
		}
	}
}

// Finite32 agrees with the Go standard library's math.IsInf / math.IsNaN
// and AllZero32 with its reference loop on float32 rows
// of every length with zeros of both signs, subnormals, a negative value,
// an infinity or a NaN at a random key (IEEE 754 binary32: exponent bits
// all set = Inf or NaN).
func TestFloat32ScansEqualReference(t *testing.T) {
	rng := rand.New(rand.NewPCG(13, 14))
	odd := []float32{float32(math.Copysign(0, -1)), -0.25, float32(math.Inf(1)), float32(math.Inf(-1)), float32(math.NaN()), math.SmallestNonzeroFloat32}
	for _, n := range lengths {
		for rep := 0; rep < 40; rep++ {
			row := make([]float32, n)
			for k := range row {
				if rng.IntN(3) > 0 {
					row[k] = float32(rng.Float64() / float64(n+1))
				}
			}
			if n > 0 && rep%7 > 0 {
				row[rng.IntN(n)] = odd[rep%len(odd)]
			}
			k1, f1, n1 := Finite32(row)
			k2, f2, n2 := -1, true, false
			for k, x := range row {
				if x64 := float64(x); math.IsInf(x64, 0) || math.IsNaN(x64) {
					k2, f2, n2 = k, false, false
					break
				}
				n2 = n2 || x < 0
			}
			if k1 != k2 || f1 != f2 || n1 != n2 {
				t.Fatalf("n=%d rep=%d: Finite32 = %d %v %v, math.IsInf/IsNaN %d %v %v", n, rep, k1, f1, n1, k2, f2, n2)
			}
			if a, b := AllZero32(row), AllZero32Ref(row); a != b {
				t.Fatalf("n=%d rep=%d: AllZero32 = %v, reference %v", n, rep, a, b)
			}
			zeros := make([]float32, n)
			for i := range zeros {
				zeros[i] = float32(math.Copysign(0, float64(rng.IntN(2)*2-1)))
			}
			if !AllZero32(zeros) || !AllZero32Ref(zeros) {
				t.Fatalf("n=%d: a run of +0 and -0 is not all zero", n)
			}
		}
	}
}
