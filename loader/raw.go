package loader

import (
	"errors"
	"fmt"
	"math"
	"runtime/debug"
	"strings"
	"sync"
	"unicode/utf8"
	"unsafe"
)

// errClosed is returned by reads of an array whose file has been closed.
var errClosed = errors.New("loader: read after the file was closed")

// lifetime guards the bytes of an open file: reads hold it shared, Close
// takes it exclusively, so a read never touches an unmapped region.
type lifetime struct {
	mu     sync.RWMutex
	closed bool
}

func (l *lifetime) enter() error {
	l.mu.RLock()
	if l.closed {
		l.mu.RUnlock()
		return errClosed
	}
	return nil
}

func (l *lifetime) leave() { l.mu.RUnlock() }

// end marks the file closed and runs release (unmap, close) once no read is in flight.
func (l *lifetime) end(release func() error) error {
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.closed {
		return nil
	}
	l.closed = true
	if release != nil {
		return release()
	}
	return nil
}

// numElems is the product of shape, or ok=false when a dimension is negative
// or the product overflows limit.
func numElems(shape []int, limit int64) (n int64, ok bool) {
	n = 1
	for _, d := range shape {
		if d < 0 {
			return 0, false
		}
		if d == 0 {
			n = 0
			continue
		}
		if n > limit/int64(d) {
			return 0, false
		}
		n *= int64(d)
	}
	return n, n <= limit
}

func prod(shape []int) int {
	n := 1
	for _, d := range shape {
		n *= d
	}
	return n
}

// cStrides returns the element strides of a C-order array of the given shape.
func cStrides(shape []int) []int {
	s := make([]int, len(shape))
	acc := 1
	for i := len(shape) - 1; i >= 0; i-- {
		s[i] = acc
		acc *= shape[i]
	}
	return s
}

// checkSub validates leading indices idx against shape and the length of a
// destination buffer; it returns the number of elements selected.
func checkSub(name string, shape, idx []int, dstLen int) (int, error) {
	if len(idx) > len(shape) {
		return 0, fmt.Errorf("loader: %s: %d indices for a rank-%d array", name, len(idx), len(shape))
	}
	for i, v := range idx {
		if v < 0 || v >= shape[i] {
			return 0, fmt.Errorf("loader: %s: index %d on axis %d out of range [0, %d)", name, v, i, shape[i])
		}
	}
	n := prod(shape[len(idx):])
	if dstLen != n {
		return 0, fmt.Errorf("loader: %s: buffer of %d values, the sub-array has %d", name, dstLen, n)
	}
	return n, nil
}

// flatReader is implemented by arrays stored in C order: the element at flat
// (C-order) index i is element i of the data, so a sub-array is one
// contiguous run and ReadAttn can copy it without building an index.
type flatReader interface {
	readFlat(off, n int, dst []float32) error
}

// rawArray is an array whose bytes are in memory or mapped from a file: NPY
// files, NPZ members and safetensors tensors.
type rawArray struct {
	name, file string
	dtype      DType
	shape      []int
	big        bool // big-endian elements
	fortran    bool // stored in Fortran (column-major) order
	strKind    byte // 'U' (UCS-4) or 'S' (bytes) for String arrays
	elem       int  // bytes per element
	life       *lifetime
	// data returns the array's bytes (exactly nelem*elem of them). It is
	// called between life.enter and life.leave.
	data func() ([]byte, error)
	// src, when set, is the mapped file data's bytes lie in: a whole head
	// is then copied with a positioned read of the file (mappedFile.pread)
	// rather than through the mapping. nil for bytes in memory (inflated
	// NPZ members, tests).
	src *mappedFile
}

// copyBytes copies n bytes of the array's data from byte off into dst: by a
// positioned read of the file where the array has one (src), else from
// data. The caller holds the lifetime; data is what r.data returned.
func (r *rawArray) copyBytes(dst, data []byte, off int) error {
	if r.src != nil {
		ok, err := r.src.pread(dst, data, off)
		if fe, is := err.(*FormatError); is {
			// name the array, and the input file rather than a temporary one
			fe.File, fe.Array = r.file, r.name
		}
		if ok || err != nil {
			return err
		}
	}
	copy(dst, data[off:off+len(dst)])
	return nil
}

func (r *rawArray) Name() string  { return r.name }
func (r *rawArray) File() string  { return r.file }
func (r *rawArray) DType() DType  { return r.dtype }
func (r *rawArray) Shape() []int  { return append([]int(nil), r.shape...) }
func (r *rawArray) cOrder() bool  { return !r.fortran || len(r.shape) < 2 }
func (r *rawArray) label() string { return r.file + ": " + r.name }

// faults ends a read through the mapping (deferred, with the setting
// debug.SetPanicOnFault(true) replaced): a fault there means the file got
// shorter after it was mapped (reading a mapping past the end of its file
// raises SIGBUS), and becomes an error naming the file and the array
// instead of a crash. Other panics go on.
func (r *rawArray) faults(old bool, err *error) {
	debug.SetPanicOnFault(old)
	if e := recover(); e != nil {
		if _, ok := e.(interface{ Addr() uintptr }); !ok {
			panic(e)
		}
		*err = &FormatError{File: r.file, Array: r.name, Offset: -1, Msg: errShrunk}
	}
}

// errShrunk is what a read says of a file cut short under it.
const errShrunk = "the file got shorter while heed read it (truncated or rewritten?)"

// bytes enters the lifetime and returns the data; the caller must call r.life.leave.
func (r *rawArray) bytes() ([]byte, error) {
	if err := r.life.enter(); err != nil {
		return nil, err
	}
	b, err := r.data()
	if err != nil {
		r.life.leave()
		return nil, err
	}
	return b, nil
}

func (r *rawArray) readFlat(off, n int, dst []float32) (err error) {
	defer r.faults(debug.SetPanicOnFault(true), &err)
	if r.dtype == String {
		return fmt.Errorf("loader: %s: a string array has no numeric values", r.label())
	}
	if off < 0 || n != len(dst) || off+n > prod(r.shape) {
		return fmt.Errorf("loader: %s: elements [%d, %d) out of range", r.label(), off, off+n)
	}
	b, err := r.bytes()
	if err != nil {
		return err
	}
	defer r.life.leave()
	if r.dtype == Float32 && !r.big && hostLittle && n > 0 {
		// little-endian float32 on a little-endian host: the bytes are the values
		return r.copyBytes(unsafe.Slice((*byte)(unsafe.Pointer(&dst[0])), 4*n), b, off*4)
	}
	convertF32(r.dtype, r.big, b[off*r.elem:], dst)
	return nil
}

// offsets calls fn with the element index into the stored data of every
// element of the sub-array idx, in C order.
func (r *rawArray) offsets(idx []int, fn func(i, off int)) {
	rank := len(r.shape)
	st := make([]int, rank)
	if r.cOrder() {
		st = cStrides(r.shape)
	} else {
		acc := 1
		for i := 0; i < rank; i++ {
			st[i] = acc
			acc *= r.shape[i]
		}
	}
	base := 0
	for i, v := range idx {
		base += v * st[i]
	}
	rest := r.shape[len(idx):]
	rst := st[len(idx):]
	n := prod(rest)
	if n == 0 {
		return
	}
	ctr := make([]int, len(rest))
	off := base
	for i := 0; i < n; i++ {
		fn(i, off)
		for a := len(rest) - 1; a >= 0; a-- {
			ctr[a]++
			off += rst[a]
			if ctr[a] < rest[a] {
				break
			}
			off -= ctr[a] * rst[a]
			ctr[a] = 0
		}
	}
}

func (r *rawArray) ReadFloat32(idx []int, dst []float32) error {
	if r.dtype == String {
		return fmt.Errorf("loader: %s: a string array has no numeric values", r.label())
	}
	n, err := checkSub(r.label(), r.shape, idx, len(dst))
	if err != nil {
		return err
	}
	if r.cOrder() {
		st := cStrides(r.shape)
		off := 0
		for i, v := range idx {
			off += v * st[i]
		}
		return r.readFlat(off, n, dst) // guarded there
	}
	return r.readStrided(idx, dst)
}

// readStrided is ReadFloat32 of a sub-array that is not one run of the
// stored bytes (Fortran order), element by element.
func (r *rawArray) readStrided(idx []int, dst []float32) (err error) {
	defer r.faults(debug.SetPanicOnFault(true), &err)
	b, err := r.bytes()
	if err != nil {
		return err
	}
	defer r.life.leave()
	r.offsets(idx, func(i, off int) {
		dst[i] = elemF32(r.dtype, r.big, b[off*r.elem:])
	})
	return nil
}

func (r *rawArray) ReadInt64(idx []int, dst []int64) (err error) {
	defer r.faults(debug.SetPanicOnFault(true), &err)
	if !r.dtype.IsInt() {
		return fmt.Errorf("loader: %s: %s array read as integers", r.label(), r.dtype)
	}
	if _, err := checkSub(r.label(), r.shape, idx, len(dst)); err != nil {
		return err
	}
	b, err := r.bytes()
	if err != nil {
		return err
	}
	defer r.life.leave()
	r.offsets(idx, func(i, off int) {
		dst[i] = elemI64(r.dtype, r.big, b[off*r.elem:])
	})
	return nil
}

func (r *rawArray) ReadStrings() (_ []string, err error) {
	defer r.faults(debug.SetPanicOnFault(true), &err)
	if r.dtype != String {
		return nil, fmt.Errorf("loader: %s: %s array read as strings", r.label(), r.dtype)
	}
	b, err := r.bytes()
	if err != nil {
		return nil, err
	}
	defer r.life.leave()
	out := make([]string, prod(r.shape))
	bo := order(r.big)
	var sb strings.Builder
	r.offsets(nil, func(i, off int) {
		e := b[off*r.elem : (off+1)*r.elem]
		if r.strKind == 'S' {
			// numpy strips trailing NULs of 'S' items.
			end := len(e)
			for end > 0 && e[end-1] == 0 {
				end--
			}
			out[i] = string(e[:end])
			return
		}
		sb.Reset()
		for j := 0; j+4 <= len(e); j += 4 {
			c := bo.Uint32(e[j:])
			if c == 0 {
				// numpy strips trailing NULs; an embedded NUL ends the item too.
				break
			}
			if c > utf8.MaxRune || (c >= 0xd800 && c < 0xe000) {
				c = utf8.RuneError
			}
			sb.WriteRune(rune(c))
		}
		out[i] = sb.String()
	})
	return out, nil
}

// maxZeroSizeElems bounds arrays of zero-byte elements (empty strings).
const maxZeroSizeElems = 1 << 20

// hasFile is checkDataSize's has for bytes that are a whole file.
const hasFile = "the file has %d"

// checkDataSize returns the byte size of an array of shape and element size
// elem, or an error when it overflows or exceeds avail bytes; has is a
// format of avail saying where that number comes from (hasFile).
func checkDataSize(shape []int, elem int, avail int64, has string) (int64, error) {
	n, ok := numElems(shape, math.MaxInt64/int64(max(elem, 1)))
	if !ok {
		return 0, fmt.Errorf("shape %v overflows", shape)
	}
	if elem == 0 && n > maxZeroSizeElems {
		// Elements of zero bytes ('<U0') take no data, so the file size
		// cannot bound their count; reading them would still allocate.
		return 0, fmt.Errorf("shape %v of zero-byte elements is too large", shape)
	}
	nb := n * int64(elem)
	if nb > avail {
		return 0, fmt.Errorf("shape %v needs %d bytes of data, %s", shape, nb, fmt.Sprintf(has, avail))
	}
	return nb, nil
}
