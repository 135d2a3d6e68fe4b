//go:build goexperiment.simd && amd64

package kernels

import (
	"math/bits"
	"simd/archsimd"
)

// simdHalf: Add16 takes its AVX2 loop (the build with GOEXPERIMENT=simd
// only). Sum16 has none: a vector loop measured within 15% of the scalar
// one (BenchmarkSum16, medians of 6 runs: 685 against 789 ns a 1,024-key
// row), not worth a second loop to keep equal.
var simdHalf = archsimd.X86.AVX2()

// simdBuild: this is a GOEXPERIMENT=simd build.
const simdBuild = true

// halfToFloat32 converts eight patterns to their float32 values without
// the table (IEEE 754 binary16 and binary32 layouts). float16: the
// magnitude shifted left by 13 puts its exponent in the low five bits of
// float32's, so the value is 2^112 too small, and the product by 2^112 is
// exact for normal and subnormal values; the sign bit moves to bit 31.
// bfloat16: the pattern shifted left by 16 is the float32. Inf and NaN
// patterns come out wrong, but the flag word then tells the caller to
// throw the sums away.
func halfToFloat32(h archsimd.Uint16x8, f16 bool) archsimd.Float32x8 {
	w := h.ExtendToUint32()
	if !f16 {
		return w.ShiftAllLeft(16).AsFloat32x8()
	}
	sign := w.And(archsimd.BroadcastUint32x8(0x8000)).ShiftAllLeft(16)
	mag := w.And(archsimd.BroadcastUint32x8(0x7fff)).ShiftAllLeft(13)
	return mag.Or(sign).AsFloat32x8().Mul(archsimd.BroadcastFloat32x8(0x1p112))
}

// add16AVX2 is add16Scalar with the values, their sum and their distance
// terms in vector registers, eight patterns a step as two groups of four,
// so that lane j adds keys j, j+4, j+8, ... in the order of the scalar
// loop's lane j: the sums are add16Scalar's to the bit (the test checks
// it). The entropy terms stay a table lookup (package archsimd has no
// gather) in four scalar lanes, the flags and counts in words as there.
// Whatever is left after the last eight goes through the scalar loop's
// steps.
func (rs *Sums) add16AVX2(t *Half, run []uint16, d, step float64) uint64 {
	xl := t.XL
	e := uint64(t.Exp) * 0x0001000100010001
	low := uint64(t.Exp&-t.Exp) * 0x0001000100010001
	f16 := t.Exp == 0x7c00
	magv := archsimd.BroadcastUint16x8(0x7fff)
	d4 := archsimd.LoadFloat64x4(&[4]float64{d, d + step, d + 2*step, d + 3*step})
	step4 := archsimd.BroadcastFloat64x4(4 * step)
	var s4, t4 archsimd.Float64x4
	var mx archsimd.Uint16x8
	var e0, e1, e2, e3 float64
	var nz int
	var flags uint64
	n := len(run) &^ 7
	for i := 0; i < n; i += 8 {
		h := archsimd.LoadUint16x8Slice(run[i:])
		mx = mx.Max(h.And(magv))
		f := halfToFloat32(h, f16)
		lo, hi := f.GetLo().ConvertToFloat64(), f.GetHi().ConvertToFloat64()
		s4 = s4.Add(lo)
		t4 = t4.Add(lo.Mul(d4))
		d4 = d4.Add(step4)
		s4 = s4.Add(hi)
		t4 = t4.Add(hi.Mul(d4))
		d4 = d4.Add(step4)
		v, u := load4(run, i), load4(run, i+4)
		e0 += xl[uint16(v)]
		e1 += xl[uint16(v>>16)]
		e2 += xl[uint16(v>>32)]
		e3 += xl[uint16(v>>48)]
		e0 += xl[uint16(u)]
		e1 += xl[uint16(u>>16)]
		e2 += xl[uint16(u>>32)]
		e3 += xl[uint16(u>>48)]
		flags |= bad4(v, e, low) | bad4(u, e, low)
		nz += bits.OnesCount64((((v&lanes16Mag)+lanes16Mag)&lanes16Top)>>15 | ((u&lanes16Mag)+lanes16Mag)&lanes16Top)
	}
	ln := lanes16{m: 0, nz: nz, flags: flags, d: d + float64(n)*step}
	s4.Store(&ln.s)
	t4.Store(&ln.t)
	ln.e = [4]float64{e0, e1, e2, e3}
	var mv [8]uint16
	mx.Store(&mv)
	ln.m = max(mv[0], mv[1], mv[2], mv[3], mv[4], mv[5], mv[6], mv[7])
	// the rest as in add16Scalar: a group of four, then single keys into lane 0
	ln.add(t, run[n:], step)
	return rs.take(&ln)
}

// widen16AVX2 is Widen16 eight patterns a step; the last eight, which may
// overlap the step before, too.
func widen16AVX2(t *Half, dst []float32, src []uint16) {
	f16 := t.Exp == 0x7c00
	n := len(src)
	dst = dst[:n]
	for i := 0; ; i += 8 {
		i = min(i, n-8)
		halfToFloat32(archsimd.LoadUint16x8Slice(src[i:]), f16).StoreSlice(dst[i:])
		if i == n-8 {
			return
		}
	}
}
