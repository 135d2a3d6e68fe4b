package loader

import (
	"fmt"
	"runtime/debug"
	"sync"
	"unsafe"
)

// ReadRaw16 copies the stored 16-bit patterns of the attention matrix of
// (layer, batch, head) into dst as a row-major Queries x Keys matrix, without
// converting them, and returns the dtype they are in (Float16 or BFloat16).
// It is the fast path of the analysis pass, which reads the values through
// 65,536-entry tables. It returns Invalid and no error when the block's data
// is not held that way (another dtype, big-endian, Fortran order, stored key
// by key, HDF5): the caller then uses ReadAttn. For a block it accepts,
// F16ToF32Table()[dst[i]] (float16) or math.Float32frombits(uint32(dst[i])<<16)
// (bfloat16) is exactly what ReadAttn gives.
func (b *Block) ReadRaw16(layer, batch, head int, dst []uint16) (_ DType, err error) {
	r, off, err := b.raw16(layer, batch, head, len(dst))
	if r == nil || err != nil {
		return Invalid, err
	}
	defer r.faults(debug.SetPanicOnFault(true), &err)
	n := len(dst)
	data, err := r.bytes()
	if err != nil {
		return Invalid, err
	}
	defer r.life.leave()
	if n > 0 {
		if err := r.copyBytes(unsafe.Slice((*byte)(unsafe.Pointer(&dst[0])), 2*n), data, 2*off); err != nil {
			return Invalid, err
		}
	}
	return r.dtype, nil
}

// raw16 returns the array holding (layer, batch, head) as 16-bit patterns
// and the head's first element, nil when it is not held that way.
func (b *Block) raw16(layer, batch, head, n int) (*rawArray, int, error) {
	if err := b.check(layer, batch, head, n); err != nil {
		return nil, 0, err
	}
	s := &b.attn[layer]
	r, ok := s.flat.(*rawArray)
	if !ok || s.transposed || r.big || !hostLittle || r.elem != 2 || (r.dtype != Float16 && r.dtype != BFloat16) {
		return nil, 0, nil
	}
	if s.batchAt < 0 {
		batch = 0
	}
	if s.headAt < 0 {
		head = 0
	}
	off := s.base + batch*s.batchStride + head*s.headStride
	if off < 0 || off+n > prod(r.shape) {
		return nil, 0, fmt.Errorf("loader: %s: elements [%d, %d) out of range", r.label(), off, off+n)
	}
	return r, off, nil
}

// F16ToF32Table returns the float16 -> float32 table ReadAttn converts with
// (index: the 16-bit pattern). The caller must not modify it.
func F16ToF32Table() *[65536]float32 { return f16ToF32() }

var (
	bf16Once  sync.Once
	bf16Table *[65536]float32
)

// RawTable returns the table of the float32 value of each pattern ReadRaw16
// gives for dtype d (F16ToF32Table for Float16; for BFloat16 the pattern as
// the top half of a float32, which is what ReadAttn gives), nil for other
// dtypes. The caller must not modify it.
func RawTable(d DType) *[65536]float32 {
	switch d {
	case Float16:
		return f16ToF32()
	case BFloat16:
		bf16Once.Do(func() {
			t := new([65536]float32)
			for i := range t {
				t[i] = bf16ToF32(uint16(i))
			}
			bf16Table = t
		})
		return bf16Table
	}
	return nil
}

// ViewRaw16 is ReadRaw16 without the copy: it returns the stored patterns of
// (layer, batch, head) as a slice of bytes already in memory (an inflated
// NPZ member), and a release function the caller must call once done with
// them; Close waits until every view is released. It returns nil, Invalid
// and no error where ReadRaw16 would return Invalid, where the head's bytes
// are not 2-byte aligned (a container may place an array at an odd offset),
// and where they are in a mapped file, which ReadRaw16 reads for less than a
// first look through the mapping costs (mappedFile.pread; unless
// Options.ThroughMapping): the caller then copies with ReadRaw16 or converts
// with ReadAttn.
func (b *Block) ViewRaw16(layer, batch, head int) ([]uint16, DType, func(), error) {
	n := b.Queries * b.Keys
	r, off, err := b.raw16(layer, batch, head, n)
	if r == nil || err != nil {
		return nil, Invalid, nil, err
	}
	if r.src != nil {
		return nil, Invalid, nil, nil
	}
	data, err := r.bytes()
	if err != nil {
		return nil, Invalid, nil, err
	}
	if n == 0 {
		r.life.leave()
		return []uint16{}, r.dtype, func() {}, nil
	}
	p := unsafe.Pointer(&data[2*off])
	if uintptr(p)%2 != 0 {
		r.life.leave()
		return nil, Invalid, nil, nil
	}
	var once sync.Once
	return unsafe.Slice((*uint16)(p), n), r.dtype, func() { once.Do(r.life.leave) }, nil
}
