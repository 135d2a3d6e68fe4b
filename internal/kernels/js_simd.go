//go:build goexperiment.simd && amd64

package kernels

import (
	"math"
	"simd/archsimd"
)

// simdJS: MlogmSum takes mlogmSum512 on processors with AVX-512 (the build
// with GOEXPERIMENT=simd only; the default build has no such path).
var simdJS = archsimd.X86.AVX512()

// Coefficients of ln f = 2 z (1 + z^2/3 + z^4/5 + ... + z^12/13), z = (f - 1)/(f + 1):
// the series of atanh (ln f = 2 atanh z; Abramowitz and Stegun 4.1.28, the
// reference cited from memory; the test checks the bound against math.Log).
const (
	c3  = 1.0 / 3
	c5  = 1.0 / 5
	c7  = 1.0 / 7
	c9  = 1.0 / 9
	c11 = 1.0 / 11
	c13 = 1.0 / 13
)

// mlogmSum512 is MlogmSum eight keys at a time in AVX-512 registers, with
// its logarithm computed in the registers too (no table: there is no
// gather in package archsimd): s = a + b = 2^e f with f in [sqrt(2)/2,
// sqrt(2)), ln f from the atanh series above to z^13, |z| <= 0.1716, so the
// term left out is below 2 z^15 / 15 < 5e-13 and H(M) is within 5e-13 of
// the definition (mass 1). s = 0 gives e = -1023, f = 1, a finite ln, and
// s ln s = 0. Keys past the last multiple of eight go through lnm.
func mlogmSum512(a, b []float32) float64 {
	b = b[:len(a)]
	n := len(a) &^ 7
	var h, t archsimd.Float64x8
	one := archsimd.BroadcastFloat64x8(1)
	half := archsimd.BroadcastFloat64x8(0.5)
	sqrt2 := archsimd.BroadcastFloat64x8(math.Sqrt2)
	ln2 := archsimd.BroadcastFloat64x8(math.Ln2)
	mant := archsimd.BroadcastUint64x8(1<<52 - 1)
	bias := archsimd.BroadcastUint64x8(0x3ff << 52)
	e1023 := archsimd.BroadcastInt64x8(1023)
	k3, k5, k7 := archsimd.BroadcastFloat64x8(c3), archsimd.BroadcastFloat64x8(c5), archsimd.BroadcastFloat64x8(c7)
	k9, k11, k13 := archsimd.BroadcastFloat64x8(c9), archsimd.BroadcastFloat64x8(c11), archsimd.BroadcastFloat64x8(c13)
	for k := 0; k < n; k += 8 {
		x := archsimd.LoadFloat32x8Slice(a[k:]).ConvertToFloat64()
		y := archsimd.LoadFloat32x8Slice(b[k:]).ConvertToFloat64()
		s := x.Add(y)
		u := s.AsUint64x8()
		e := u.ShiftAllRight(52).AsInt64x8().Sub(e1023).ConvertToFloat64()
		f := u.And(mant).Or(bias).AsFloat64x8()
		big := f.Greater(sqrt2)
		f = f.Mul(half).Merge(f, big)
		e = e.Add(one).Merge(e, big)
		z := f.Sub(one).Div(f.Add(one))
		z2 := z.Mul(z)
		p := k13.Mul(z2).Add(k11).Mul(z2).Add(k9).Mul(z2).Add(k7).Mul(z2).Add(k5).Mul(z2).Add(k3).Mul(z2).Add(one)
		lnS := e.Mul(ln2).Add(z.Add(z).Mul(p))
		h = h.Add(s.Mul(lnS))
		t = t.Add(s)
	}
	var hv, tv [8]float64
	h.Store(&hv)
	t.Store(&tv)
	for k := n; k < len(a); k++ {
		s0 := float64(a[k]) + float64(b[k])
		hv[0] += s0 * lnm(s0)
		tv[0] += s0
	}
	hs := ((hv[0] + hv[1]) + (hv[2] + hv[3])) + ((hv[4] + hv[5]) + (hv[6] + hv[7]))
	ts := ((tv[0] + tv[1]) + (tv[2] + tv[3])) + ((tv[4] + tv[5]) + (tv[6] + tv[7]))
	return -0.5 * (hs - math.Ln2*ts)
}
