package loader

import (
	"encoding/binary"
	"math"
	"sync"
	"unsafe"

	"github.com/x448/float16"
)

// hostLittle is true on little-endian machines, where little-endian float32
// data can be copied without conversion.
var hostLittle = func() bool {
	x := uint16(1)
	return *(*byte)(unsafe.Pointer(&x)) == 1
}()

var (
	f16Once  sync.Once
	f16Table *[65536]float32
)

// f16ToF32 returns the 65,536-entry float16 -> float32 table. Finite values
// and infinities come from github.com/x448/float16. NaNs keep their payload
// and signalling bit (sign | 0x7f800000 | mantissa<<13), which is what numpy's
// npy_halfbits_to_floatbits does; x448 quiets signalling NaNs instead. The
// table is checked against numpy for every bit pattern (see convert_test.go).
func f16ToF32() *[65536]float32 {
	f16Once.Do(func() {
		t := new([65536]float32)
		for i := range t {
			h := uint16(i)
			if h&0x7c00 == 0x7c00 && h&0x03ff != 0 {
				t[i] = math.Float32frombits(uint32(h&0x8000)<<16 | 0x7f800000 | uint32(h&0x03ff)<<13)
				continue
			}
			t[i] = float16.Frombits(h).Float32()
		}
		f16Table = t
	})
	return f16Table
}

// bf16ToF32 widens bfloat16 bits: bfloat16 is the upper half of a float32.
func bf16ToF32(h uint16) float32 { return math.Float32frombits(uint32(h) << 16) }

// roundBF16 rounds a float32 to the nearest bfloat16 (ties to even), keeping NaN.
func roundBF16(f float32) float32 {
	u := math.Float32bits(f)
	if f != f {
		return math.Float32frombits(u | 0x00400000)
	}
	u += 0x7fff + (u>>16)&1
	return math.Float32frombits(u &^ 0xffff)
}

// itemSize is the number of bytes of one element of a numeric dtype.
func itemSize(d DType) int {
	switch d {
	case Bool, Int8, Uint8:
		return 1
	case Int16, Uint16, Float16, BFloat16:
		return 2
	case Int32, Uint32, Float32:
		return 4
	case Int64, Uint64, Float64:
		return 8
	}
	return 0
}

func order(big bool) binary.ByteOrder {
	if big {
		return binary.BigEndian
	}
	return binary.LittleEndian
}

// convertF32 converts len(dst) contiguous elements of src (dtype d, byte
// order big) into dst. src must hold at least len(dst) elements.
func convertF32(d DType, big bool, src []byte, dst []float32) {
	n := len(dst)
	if n == 0 {
		return
	}
	bo := order(big)
	switch d {
	case Float32:
		src = src[:4*n]
		if hostLittle && !big {
			copy(unsafe.Slice((*byte)(unsafe.Pointer(&dst[0])), 4*n), src)
			return
		}
		for i := range dst {
			dst[i] = math.Float32frombits(bo.Uint32(src[4*i:]))
		}
	case Float16:
		t := f16ToF32()
		src = src[:2*n]
		if big {
			for i := range dst {
				dst[i] = t[uint16(src[2*i])<<8|uint16(src[2*i+1])]
			}
			return
		}
		for i := range dst {
			dst[i] = t[uint16(src[2*i])|uint16(src[2*i+1])<<8]
		}
	case BFloat16:
		src = src[:2*n]
		for i := range dst {
			dst[i] = bf16ToF32(bo.Uint16(src[2*i:]))
		}
	case Float64:
		src = src[:8*n]
		for i := range dst {
			dst[i] = float32(math.Float64frombits(bo.Uint64(src[8*i:])))
		}
	case Bool:
		src = src[:n]
		for i, b := range src {
			if b != 0 {
				dst[i] = 1
			} else {
				dst[i] = 0
			}
		}
	case Int8:
		for i := range dst {
			dst[i] = float32(int8(src[i]))
		}
	case Uint8:
		for i := range dst {
			dst[i] = float32(src[i])
		}
	case Int16:
		for i := range dst {
			dst[i] = float32(int16(bo.Uint16(src[2*i:])))
		}
	case Uint16:
		for i := range dst {
			dst[i] = float32(bo.Uint16(src[2*i:]))
		}
	case Int32:
		for i := range dst {
			dst[i] = float32(int32(bo.Uint32(src[4*i:])))
		}
	case Uint32:
		for i := range dst {
			dst[i] = float32(bo.Uint32(src[4*i:]))
		}
	case Int64:
		for i := range dst {
			dst[i] = float32(int64(bo.Uint64(src[8*i:])))
		}
	case Uint64:
		for i := range dst {
			dst[i] = float32(bo.Uint64(src[8*i:]))
		}
	}
}

// elemF32 converts the single element at src[0:itemSize(d)].
func elemF32(d DType, big bool, src []byte) float32 {
	var v [1]float32
	convertF32(d, big, src, v[:])
	return v[0]
}

// elemI64 converts the single integer or bool element at src[0:itemSize(d)].
func elemI64(d DType, big bool, src []byte) int64 {
	bo := order(big)
	switch d {
	case Bool:
		if src[0] != 0 {
			return 1
		}
		return 0
	case Int8:
		return int64(int8(src[0]))
	case Uint8:
		return int64(src[0])
	case Int16:
		return int64(int16(bo.Uint16(src)))
	case Uint16:
		return int64(bo.Uint16(src))
	case Int32:
		return int64(int32(bo.Uint32(src)))
	case Uint32:
		return int64(bo.Uint32(src))
	case Int64, Uint64:
		return int64(bo.Uint64(src)) // u64 above 2^63-1 wraps, as numpy's astype(int64) does
	}
	return 0
}
