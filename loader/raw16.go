package loader

import (
	"fmt"
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
func (b *Block) ReadRaw16(layer, batch, head int, dst []uint16) (DType, error) {
	if err := b.check(layer, batch, head, len(dst)); err != nil {
		return Invalid, err
	}
	s := &b.attn[layer]
	r, ok := s.flat.(*rawArray)
	if !ok || s.transposed || r.big || !hostLittle || r.elem != 2 || (r.dtype != Float16 && r.dtype != BFloat16) {
		return Invalid, nil
	}
	if s.batchAt < 0 {
		batch = 0
	}
	if s.headAt < 0 {
		head = 0
	}
	off, n := s.base+batch*s.batchStride+head*s.headStride, len(dst)
	if off < 0 || off+n > prod(r.shape) {
		return Invalid, fmt.Errorf("loader: %s: elements [%d, %d) out of range", r.label(), off, off+n)
	}
	data, err := r.bytes()
	if err != nil {
		return Invalid, err
	}
	defer r.life.leave()
	if n > 0 {
		copy(unsafe.Slice((*byte)(unsafe.Pointer(&dst[0])), 2*n), data[2*off:2*(off+n)])
	}
	return r.dtype, nil
}

// F16ToF32Table returns the float16 -> float32 table ReadAttn converts with
// (index: the 16-bit pattern). The caller must not modify it.
func F16ToF32Table() *[65536]float32 { return f16ToF32() }
