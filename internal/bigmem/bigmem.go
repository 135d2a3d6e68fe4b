// Package bigmem hands out large buffers that are filled right after they
// are made and freed explicitly: a head's matrix, a layer's rows. On Linux
// they are mapped outside the Go heap with transparent huge pages asked for
// (madvise MADV_HUGEPAGE), so that filling a fresh buffer costs a page
// fault every 2 MiB rather than every 4 KiB: on the virtual machines we
// measured, a fresh 8 MiB buffer filled by one read took 26-35 ms with 4 KiB
// pages and about 2 ms with huge pages (docs/scale.md). Elsewhere, and for
// small buffers, they come from make and free does nothing.
package bigmem

import "unsafe"

// threshold is the size from which a buffer is mapped rather than made.
const threshold = 1 << 20

// Bytes returns a zeroed buffer of n bytes and the function that frees it;
// the buffer must not be used after free. free may be called more than
// once.
func Bytes(n int) ([]byte, func()) {
	if n >= threshold {
		if b, free, ok := mapped(n); ok {
			return b, free
		}
	}
	return make([]byte, n), func() {}
}

// Uint16s is Bytes for n uint16 values.
func Uint16s(n int) ([]uint16, func()) {
	b, free := Bytes(2 * n)
	if n == 0 {
		return []uint16{}, free
	}
	return unsafe.Slice((*uint16)(unsafe.Pointer(&b[0])), n), free
}

// Float32s is Bytes for n float32 values.
func Float32s(n int) ([]float32, func()) {
	b, free := Bytes(4 * n)
	if n == 0 {
		return []float32{}, free
	}
	return unsafe.Slice((*float32)(unsafe.Pointer(&b[0])), n), free
}
