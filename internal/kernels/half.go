package kernels

import (
	"math"
	"math/bits"
	"unsafe"
)

// Half holds the tables of one 16-bit dtype (float16 or bfloat16), indexed
// by the stored pattern.
type Half struct {
	Val *[65536]float32 // the float32 value of a pattern
	XL  *[65536]float64 // Xlogx(value) for positive finite values, else 0
	Exp uint16          // the exponent bits: all set = Inf or NaN
}

// NewHalf builds the tables of a dtype from its value table and exponent
// bits (0x7c00 for float16, 0x7f80 for bfloat16): XL[i] is exactly what
// Xlogx gives for Val[i], so a row read as patterns sums the very same
// terms as the same row read as float32.
func NewHalf(val *[65536]float32, exp uint16) Half {
	InitXlogx()
	t := new([65536]float64)
	for i := range t {
		if x := val[i]; x > 0 && uint16(i)&exp != exp {
			t[i] = Xlogx(x)
		}
	}
	return Half{Val: val, XL: t, Exp: exp}
}

// Lane constants of the four-patterns-at-a-time tests (Finite16, Add16,
// Sum16): a lane's magnitude bits and its top (sign) bit.
const (
	lanes16Mag = 0x7fff7fff7fff7fff
	lanes16Top = 0x8000800080008000
)

// load4 returns run[i], run[i+1], run[i+2], run[i+3] as one little-endian
// word, run[i] in its low 16 bits (x86-64 and arm64 load unaligned words).
func load4(run []uint16, i int) uint64 {
	_ = run[i+3]
	return *(*uint64)(unsafe.Pointer(&run[i]))
}

// bad4 is the flag word of four patterns in v: a lane's top bit is set
// when its exponent bits are all set (Inf or NaN: adding the exponent's
// lowest bit to them carries into the top bit) or when it is negative and
// nonzero (its magnitude plus 0x7fff carries into the top bit, and its sign
// bit is set). e and low are exp and exp's lowest bit in every lane.
func bad4(v, e, low uint64) uint64 {
	return ((v & e) + low) | (((v & lanes16Mag) + lanes16Mag) & v)
}

// Bad reports whether a flag word of Add16 or Sum16 says that the run held
// a non-finite or a negative nonzero value.
func Bad(flags uint64) bool { return flags&lanes16Top != 0 }

// Finite16 returns the first non-finite key of row (exp: the dtype's
// exponent bits), or -1, true, and whether the row holds a negative
// nonzero value. Eight patterns a step, four in a word: a lane whose
// exponent bits are all set carries into its top bit when the exponent's
// lowest bit is added; a lane whose magnitude is nonzero carries into its
// top bit when 0x7fff is added to the magnitude, and it is negative when
// its sign bit is set too. The flags are gathered over the row and looked
// at once at its end (a non-finite row is rare).
func Finite16(row []uint16, exp uint16) (int, bool, bool) {
	e := uint64(exp) * 0x0001000100010001
	low := uint64(exp&-exp) * 0x0001000100010001
	const mag, top = lanes16Mag, lanes16Top
	n := len(row) &^ 7
	var bad, neg uint64
	for i := 0; i < n; i += 8 {
		v, u := load4(row, i), load4(row, i+4)
		bad |= ((v & e) + low) | ((u & e) + low)
		neg |= ((v&mag)+mag)&v | ((u&mag)+mag)&u
	}
	start := n
	if bad&top != 0 {
		start = 0
	}
	for k := start; k < len(row); k++ {
		if row[k]&exp == exp {
			return k, false, false
		}
		if row[k]&0x7fff != 0 && row[k]&0x8000 != 0 {
			neg = top
		}
	}
	return -1, true, neg&top != 0
}

// Finite16Ref is Finite16 one key at a time.
func Finite16Ref(row []uint16, exp uint16) (int, bool, bool) {
	neg := false
	for k, h := range row {
		if h&exp == exp {
			return k, false, false
		}
		neg = neg || (h&0x7fff != 0 && h&0x8000 != 0)
	}
	return -1, true, neg
}

// AllZero16 reports whether every pattern of xs is +0 or -0 (a forbidden
// run without mass), four patterns a step.
func AllZero16(xs []uint16) bool {
	n := len(xs) &^ 3
	for i := 0; i < n; i += 4 {
		if load4(xs, i)&lanes16Mag != 0 {
			return false
		}
	}
	for _, x := range xs[n:] {
		if x&0x7fff != 0 {
			return false
		}
	}
	return true
}

// AllZero16Ref is AllZero16 one key at a time.
func AllZero16Ref(xs []uint16) bool {
	for _, x := range xs {
		if x&0x7fff != 0 {
			return false
		}
	}
	return true
}

// Sums holds the sums of one run of keys that a rule allows.
type Sums struct {
	S, Ent, Dist float64 // sum of x, of x ln x, of x |k - p|
	Mx16         uint16  // the largest magnitude pattern (Add16)
	Mx32         uint32  // the largest magnitude bits (Add32)
	NZ           int64   // nonzero values
}

// Add16 adds the sums of a run of patterns, whose keys lie at distances d,
// d+step, ... from the query, and returns the run's flag word (bad4 over
// it; Bad says whether the run held a non-finite or a negative value, and
// then the caller throws the sums away and takes a path for such rows).
// Four lanes (keys i mod 4), added together at the end of the run, so that
// four additions are in flight instead of one chain: the order is fixed,
// so the same run gives the same bits, and Add32 keeps the same order over
// float32 values, to the bit. S is exact (Add16Ref's bits); Ent and Dist
// are within a few ulps of the key-order sums (the test's bound).
func (rs *Sums) Add16(t *Half, run []uint16, d, step float64) uint64 {
	if simdHalf && len(run) >= 8 {
		return rs.add16AVX2(t, run, d, step)
	}
	return rs.add16Scalar(t, run, d, step)
}

// add16Scalar is Add16 in scalar registers (the default build's, and
// every build's on processors without AVX2).
func (rs *Sums) add16Scalar(t *Half, run []uint16, d, step float64) uint64 {
	ln := lanes16{d: d}
	ln.add(t, run, step)
	return rs.take(&ln)
}

// lanes16 are Add16's four lanes (keys i mod 4) between runs of its loop:
// the sums of x, of x ln x and of x times the distance d, the largest
// magnitude pattern, the count of nonzero values, the flag word and the
// next key's distance. The vector loop (add16AVX2) fills them from its
// registers and ends with add, as the scalar loop does from the start.
type lanes16 struct {
	s, e, t [4]float64
	m       uint16
	nz      int
	flags   uint64
	d       float64
}

// add adds run to the lanes: groups of four keys, one into each lane, then
// the keys left over into lane 0.
func (ln *lanes16) add(t *Half, run []uint16, step float64) {
	val, xl := t.Val, t.XL
	e := uint64(t.Exp) * 0x0001000100010001
	low := uint64(t.Exp&-t.Exp) * 0x0001000100010001
	s0, s1, s2, s3 := ln.s[0], ln.s[1], ln.s[2], ln.s[3]
	e0, e1, e2, e3 := ln.e[0], ln.e[1], ln.e[2], ln.e[3]
	t0, t1, t2, t3 := ln.t[0], ln.t[1], ln.t[2], ln.t[3]
	m0, m1, m2, m3 := ln.m, ln.m, ln.m, ln.m
	nz, flags, d := ln.nz, ln.flags, ln.d
	n := len(run) &^ 3
	for i := 0; i < n; i += 4 {
		v := load4(run, i)
		h0, h1, h2, h3 := uint16(v), uint16(v>>16), uint16(v>>32), uint16(v>>48)
		x0, x1, x2, x3 := float64(val[h0]), float64(val[h1]), float64(val[h2]), float64(val[h3])
		s0 += x0
		s1 += x1
		s2 += x2
		s3 += x3
		e0 += xl[h0]
		e1 += xl[h1]
		e2 += xl[h2]
		e3 += xl[h3]
		t0 += x0 * d
		t1 += x1 * (d + step)
		t2 += x2 * (d + 2*step)
		t3 += x3 * (d + 3*step)
		d += 4 * step
		flags |= bad4(v, e, low)
		m := v & lanes16Mag
		nz += bits.OnesCount64((m + lanes16Mag) & lanes16Top)
		m0, m1, m2, m3 = max(m0, uint16(m)), max(m1, uint16(m>>16)), max(m2, uint16(m>>32)), max(m3, uint16(m>>48))
	}
	for _, h := range run[n:] {
		x := float64(val[h])
		s0 += x
		e0 += xl[h]
		t0 += x * d
		d += step
		flags |= bad4(uint64(h), e, low)
		h &= 0x7fff
		m0 = max(m0, h)
		nz += int((uint32(h) + 0x7fff) >> 15)
	}
	ln.s, ln.e, ln.t = [4]float64{s0, s1, s2, s3}, [4]float64{e0, e1, e2, e3}, [4]float64{t0, t1, t2, t3}
	ln.m, ln.nz, ln.flags, ln.d = max(m0, m1, m2, m3), nz, flags, d
}

// take adds the lanes' totals to rs, lanes in the fixed order (0+1)+(2+3),
// and returns their flag word.
func (rs *Sums) take(ln *lanes16) uint64 {
	rs.S += (ln.s[0] + ln.s[1]) + (ln.s[2] + ln.s[3])
	rs.Ent += (ln.e[0] + ln.e[1]) + (ln.e[2] + ln.e[3])
	rs.Dist += (ln.t[0] + ln.t[1]) + (ln.t[2] + ln.t[3])
	rs.Mx16 = max(rs.Mx16, ln.m)
	rs.NZ += int64(ln.nz)
	return ln.flags
}

// Add16Ref is Add16 one key at a time, in key order, with its flag as a
// bool (a non-finite or a negative nonzero value).
func (rs *Sums) Add16Ref(t *Half, run []uint16, d, step float64) bool {
	bad := false
	for _, h := range run {
		x := float64(t.Val[h])
		rs.S += x
		rs.Ent += t.XL[h]
		rs.Dist += x * d
		d += step
		bad = bad || h&t.Exp == t.Exp || (h&0x8000 != 0 && h&0x7fff != 0)
		rs.Mx16 = max(rs.Mx16, h&0x7fff)
		if h&0x7fff != 0 {
			rs.NZ++
		}
	}
	return bad
}

// Sum16 is Add16 for the sum and the count of nonzero values only (a pass
// without row statistics), in the same lanes; it returns the run's flag
// word as Add16 does. S is exact (Sum16Ref's bits).
func (rs *Sums) Sum16(t *Half, run []uint16) uint64 {
	val := t.Val
	e := uint64(t.Exp) * 0x0001000100010001
	low := uint64(t.Exp&-t.Exp) * 0x0001000100010001
	var s0, s1, s2, s3 float64
	var nz int
	var flags uint64
	n := len(run) &^ 3
	for i := 0; i < n; i += 4 {
		v := load4(run, i)
		s0 += float64(val[uint16(v)])
		s1 += float64(val[uint16(v>>16)])
		s2 += float64(val[uint16(v>>32)])
		s3 += float64(val[uint16(v>>48)])
		flags |= bad4(v, e, low)
		nz += bits.OnesCount64(((v & lanes16Mag) + lanes16Mag) & lanes16Top)
	}
	for _, h := range run[n:] {
		s0 += float64(val[h])
		flags |= bad4(uint64(h), e, low)
		nz += int((uint32(h&0x7fff) + 0x7fff) >> 15)
	}
	rs.S += (s0 + s1) + (s2 + s3)
	rs.NZ += int64(nz)
	return flags
}

// Sum16Ref is Sum16 one key at a time.
func (rs *Sums) Sum16Ref(t *Half, run []uint16) bool {
	bad := false
	for _, h := range run {
		rs.S += float64(t.Val[h])
		bad = bad || h&t.Exp == t.Exp || (h&0x8000 != 0 && h&0x7fff != 0)
		if h&0x7fff != 0 {
			rs.NZ++
		}
	}
	return bad
}

// Xlogx0 is Xlogx with 0 ln 0 = 0, for finite x >= 0.
func Xlogx0(x float32) float64 {
	if x == 0 {
		return 0
	}
	return Xlogx(x)
}

// Add32 is Add16 over float32 values (finite, none negative: the caller
// scans the row first), in the same lanes and order.
func (rs *Sums) Add32(run []float32, d, step float64) {
	var s0, s1, s2, s3, e0, e1, e2, e3, t0, t1, t2, t3 float64
	var m0, m1, m2, m3 uint32
	var nz int64
	n := len(run) &^ 3
	for i := 0; i < n; i += 4 {
		y0, y1, y2, y3 := run[i], run[i+1], run[i+2], run[i+3]
		x0, x1, x2, x3 := float64(y0), float64(y1), float64(y2), float64(y3)
		s0 += x0
		s1 += x1
		s2 += x2
		s3 += x3
		e0 += Xlogx0(y0)
		e1 += Xlogx0(y1)
		e2 += Xlogx0(y2)
		e3 += Xlogx0(y3)
		t0 += x0 * d
		t1 += x1 * (d + step)
		t2 += x2 * (d + 2*step)
		t3 += x3 * (d + 3*step)
		d += 4 * step
		b0, b1, b2, b3 := math.Float32bits(y0)&0x7fffffff, math.Float32bits(y1)&0x7fffffff, math.Float32bits(y2)&0x7fffffff, math.Float32bits(y3)&0x7fffffff
		m0, m1, m2, m3 = max(m0, b0), max(m1, b1), max(m2, b2), max(m3, b3)
		nz += int64((b0+0x7fffffff)>>31 + (b1+0x7fffffff)>>31 + (b2+0x7fffffff)>>31 + (b3+0x7fffffff)>>31)
	}
	for _, y := range run[n:] {
		x := float64(y)
		s0 += x
		e0 += Xlogx0(y)
		t0 += x * d
		d += step
		b := math.Float32bits(y) & 0x7fffffff
		m0 = max(m0, b)
		nz += int64((b + 0x7fffffff) >> 31)
	}
	rs.S += (s0 + s1) + (s2 + s3)
	rs.Ent += (e0 + e1) + (e2 + e3)
	rs.Dist += (t0 + t1) + (t2 + t3)
	rs.Mx32 = max(rs.Mx32, m0, m1, m2, m3)
	rs.NZ += nz
}

// Sum32 is Sum16 over float32 values.
func (rs *Sums) Sum32(run []float32) {
	var s0, s1, s2, s3 float64
	var nz int64
	n := len(run) &^ 3
	for i := 0; i < n; i += 4 {
		y0, y1, y2, y3 := run[i], run[i+1], run[i+2], run[i+3]
		s0 += float64(y0)
		s1 += float64(y1)
		s2 += float64(y2)
		s3 += float64(y3)
		b0, b1, b2, b3 := math.Float32bits(y0)&0x7fffffff, math.Float32bits(y1)&0x7fffffff, math.Float32bits(y2)&0x7fffffff, math.Float32bits(y3)&0x7fffffff
		nz += int64((b0+0x7fffffff)>>31 + (b1+0x7fffffff)>>31 + (b2+0x7fffffff)>>31 + (b3+0x7fffffff)>>31)
	}
	for _, y := range run[n:] {
		s0 += float64(y)
		nz += int64((math.Float32bits(y)&0x7fffffff + 0x7fffffff) >> 31)
	}
	rs.S += (s0 + s1) + (s2 + s3)
	rs.NZ += nz
}

// Widen16 sets dst[k] to the value of the finite pattern src[k] (t's
// table; dst is at least as long as src): the rows of a layer the
// redundancy pass keeps as float32. A GOEXPERIMENT=simd build converts
// eight patterns at a time in registers (halfToFloat32, exact for finite
// values); the value of an Inf or NaN pattern is then undefined.
func Widen16(t *Half, dst []float32, src []uint16) {
	if simdHalf && len(src) >= 8 {
		widen16AVX2(t, dst, src)
		return
	}
	Widen16Ref(t, dst, src)
}

// Widen16Ref is Widen16 one key at a time, through the table (exact for
// every pattern).
func Widen16Ref(t *Half, dst []float32, src []uint16) {
	dst = dst[:len(src)]
	for k, h := range src {
		dst[k] = t.Val[h]
	}
}

// Finite32 is Finite16 over float32 values: the first non-finite key of
// row, or -1, true, and whether the row holds a negative value. A plain
// loop: Finite16's way, four values a step without a branch and the flags
// looked at once at the end, measured slower here (BenchmarkFinite32: 1.3
// against 0.9 us a 1,024-key row), so there is no fast path to keep equal.
func Finite32(row []float32) (int, bool, bool) {
	neg := false
	for k, x := range row {
		if math.Float32bits(x)&0x7f800000 == 0x7f800000 {
			return k, false, false
		}
		neg = neg || x < 0
	}
	return -1, true, neg
}

// AllZero32 is AllZero16 over float32 values: whether every value of xs
// is +0 or -0, the magnitude bits of four values ORed a step.
func AllZero32(xs []float32) bool {
	n := len(xs) &^ 3
	for i := 0; i < n; i += 4 {
		if (math.Float32bits(xs[i])|math.Float32bits(xs[i+1])|math.Float32bits(xs[i+2])|math.Float32bits(xs[i+3]))&0x7fffffff != 0 {
			return false
		}
	}
	for _, x := range xs[n:] {
		if x != 0 {
			return false
		}
	}
	return true
}

// AllZero32Ref is AllZero32 one key at a time.
func AllZero32Ref(xs []float32) bool {
	for _, x := range xs {
		if x != 0 {
			return false
		}
	}
	return true
}
