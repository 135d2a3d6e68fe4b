package loader

import (
	"fmt"
	"math"

	"github.com/x448/float16"
)

// memArray is an in-memory Array, for tests and for exports built in code.
type memArray struct {
	name  string
	dtype DType
	shape []int
	vals  []float32 // numeric values, already rounded to dtype
	ints  []int64   // integer values (integer and bool dtypes)
	strs  []string
}

// NewMemArray returns an in-memory Array of the given dtype and C-order
// shape holding data (len(data) must equal the product of shape). Values are
// rounded to dtype as a file of that dtype would store them: float16 and
// bfloat16 to nearest even, integers truncated toward zero, bool as v != 0.
// It panics when dtype is String or Invalid or len(data) does not match,
// like make does for impossible arguments.
func NewMemArray(name string, dtype DType, shape []int, data []float64) Array {
	if dtype == String || dtype == Invalid || dtype > Float64 {
		panic(fmt.Sprintf("loader.NewMemArray(%q): dtype %s is not numeric", name, dtype))
	}
	n, ok := numElems(shape, math.MaxInt32)
	if !ok || int(n) != len(data) {
		panic(fmt.Sprintf("loader.NewMemArray(%q): %d values for shape %v", name, len(data), shape))
	}
	a := &memArray{name: name, dtype: dtype, shape: append([]int(nil), shape...), vals: make([]float32, len(data))}
	if dtype.IsInt() {
		a.ints = make([]int64, len(data))
	}
	for i, v := range data {
		switch {
		case dtype == Bool:
			if v != 0 {
				a.ints[i] = 1
			}
			a.vals[i] = float32(a.ints[i])
		case dtype.IsInt():
			a.ints[i] = int64(v)
			a.vals[i] = float32(a.ints[i])
		case dtype == Float16:
			a.vals[i] = float16.Fromfloat32(float32(v)).Float32()
		case dtype == BFloat16:
			a.vals[i] = roundBF16(float32(v))
		case dtype == Float32:
			a.vals[i] = float32(v)
		default: // Float64 read as float32, as from a file
			a.vals[i] = float32(v)
		}
	}
	return a
}

// NewMemStrings returns an in-memory string Array (tokens) of the given
// shape; it panics when len(s) does not match shape.
func NewMemStrings(name string, shape []int, s []string) Array {
	n, ok := numElems(shape, math.MaxInt32)
	if !ok || int(n) != len(s) {
		panic(fmt.Sprintf("loader.NewMemStrings(%q): %d strings for shape %v", name, len(s), shape))
	}
	return &memArray{name: name, dtype: String, shape: append([]int(nil), shape...), strs: append([]string(nil), s...)}
}

func (m *memArray) Name() string { return m.name }
func (m *memArray) File() string { return "(memory)" }
func (m *memArray) DType() DType { return m.dtype }
func (m *memArray) Shape() []int { return append([]int(nil), m.shape...) }
func (m *memArray) cOrder() bool { return true }

func (m *memArray) sub(idx []int, n int) (int, error) {
	if m.dtype == String {
		return 0, fmt.Errorf("loader: %s: a string array has no numeric values", m.name)
	}
	if _, err := checkSub(m.name, m.shape, idx, n); err != nil {
		return 0, err
	}
	st := cStrides(m.shape)
	off := 0
	for i, v := range idx {
		off += v * st[i]
	}
	return off, nil
}

func (m *memArray) readFlat(off, n int, dst []float32) error {
	if m.dtype == String || off < 0 || n != len(dst) || off+n > len(m.vals) {
		return fmt.Errorf("loader: %s: elements [%d, %d) out of range", m.name, off, off+n)
	}
	copy(dst, m.vals[off:off+n])
	return nil
}

func (m *memArray) ReadFloat32(idx []int, dst []float32) error {
	off, err := m.sub(idx, len(dst))
	if err != nil {
		return err
	}
	copy(dst, m.vals[off:])
	return nil
}

func (m *memArray) ReadInt64(idx []int, dst []int64) error {
	if !m.dtype.IsInt() {
		return fmt.Errorf("loader: %s: %s array read as integers", m.name, m.dtype)
	}
	off, err := m.sub(idx, len(dst))
	if err != nil {
		return err
	}
	copy(dst, m.ints[off:])
	return nil
}

func (m *memArray) ReadStrings() ([]string, error) {
	if m.dtype != String {
		return nil, fmt.Errorf("loader: %s: %s array read as strings", m.name, m.dtype)
	}
	return append([]string(nil), m.strs...), nil
}
