// Package loader opens attention exports (NPY, NPZ, safetensors, HDF5) and
// assembles them into the heed-export/1 convention: blocks of attention
// probabilities with their tokens, padding, document segments and masks.
//
// Every read is lazy: a Block hands out one (layer, batch, head) matrix at a
// time as float32 into a buffer the caller owns, so memory use does not grow
// with the size of the export. loader imports nothing else of heed's.
package loader

import (
	"errors"
	"fmt"
	"strings"
)

// DType is the element type of a stored array.
type DType uint8

// The element types heed reads.
const (
	Invalid DType = iota
	Bool
	Int8
	Int16
	Int32
	Int64
	Uint8
	Uint16
	Uint32
	Uint64
	Float16
	BFloat16
	Float32
	Float64
	String
)

var dtypeNames = [...]string{
	Invalid: "invalid", Bool: "bool", Int8: "i8", Int16: "i16", Int32: "i32", Int64: "i64",
	Uint8: "u8", Uint16: "u16", Uint32: "u32", Uint64: "u64",
	Float16: "f16", BFloat16: "bf16", Float32: "f32", Float64: "f64", String: "str",
}

// String returns the short name heed prints and writes in JSON ("f16", "bf16", "f32", ...).
func (d DType) String() string {
	if int(d) < len(dtypeNames) {
		return dtypeNames[d]
	}
	return fmt.Sprintf("dtype(%d)", d)
}

// IsFloat reports whether d is a floating-point type.
func (d DType) IsFloat() bool { return d == Float16 || d == BFloat16 || d == Float32 || d == Float64 }

// IsInt reports whether d is a signed or unsigned integer type or bool.
func (d DType) IsInt() bool { return d >= Bool && d <= Uint64 }

// Array is one named tensor of a container file. Implementations read lazily:
// only the bytes of the requested sub-array are touched.
type Array interface {
	// Name is the array's name inside its container (NPZ member without
	// ".npy", safetensors tensor name, HDF5 dataset path without the leading "/").
	Name() string
	// File is the path of the file that holds the array.
	File() string
	DType() DType
	// Shape is the logical (C-order) shape, whatever the storage order.
	Shape() []int
	// ReadFloat32 copies the sub-array selected by the leading indices idx
	// (len(idx) <= rank) into dst in C order, converting to float32. len(dst)
	// must equal the product of the remaining dimensions. Booleans read as 0/1.
	ReadFloat32(idx []int, dst []float32) error
	// ReadInt64 is ReadFloat32 for integer and bool arrays.
	ReadInt64(idx []int, dst []int64) error
	// ReadStrings returns every element of a string array in C order.
	ReadStrings() ([]string, error)
}

// Container is one opened file: its arrays and its metadata.
type Container interface {
	// Path is the file's path as given.
	Path() string
	// Format names the container: "npy", "npz", "safetensors" or "hdf5".
	Format() string
	// Arrays lists every array, sorted by name.
	Arrays() []Array
	// Meta returns the raw heed metadata JSON (NPZ member "meta", safetensors
	// __metadata__ "meta", HDF5 root attribute "meta") and whether it exists.
	Meta() (string, bool)
	Close() error
}

// Kind is the attention kind of a block, which decides its mask rules.
type Kind string

// Block kinds of the export convention.
const (
	KindUnknown       Kind = ""
	KindCausal        Kind = "causal"
	KindBidirectional Kind = "bidirectional"
	KindCross         Kind = "cross"
)

// Options override what the files say (heed's command-line options). Zero values mean
// "not set"; Window, Prefix and KVHeads use -1 for "not set" when the zero
// value is meaningful, see NewOptions.
type Options struct {
	Axes string // e.g. "layer batch head query key"
	Kind Kind
	// Tokens are token lists given from outside the export (heed reads
	// them from a file); each replaces the export's own tokens of its side.
	Tokens  []Tokens
	Window  int // -1 = not set
	Prefix  int // -1 = not set
	KVHeads int // -1 = not set
	// ComputeDType is the dtype the model computed attention in (Invalid =
	// not set); see ParseComputeDType.
	ComputeDType DType
	// QueryStart is the key position of query row 0 of every block (-1 = not
	// set): a decode step written from a static (pre-allocated) KV cache.
	QueryStart int
	// Group is how OpenSet groups files into examples (see Set); the other
	// fields apply to every example.
	Group GroupMode
	// SettingName words a setting in messages as the caller's users give
	// it (heed words "axes" as its command-line option); nil names the
	// Options field ("Options.Axes"). The loader names settings ("axes",
	// "group", "query_start"), never the ways a person gives them.
	SettingName func(setting string) string
	// ThroughMapping reads mapped files through the mapping, as heed did
	// before it copied whole heads with positioned reads: ReadRaw16 and
	// ReadAttn copy from the mapping, and ViewRaw16 gives views of mapped
	// bytes. The values are the same either way; tests and benchmarks
	// compare the two.
	ThroughMapping bool

	opened func(path string) // called with every file a Set opens (tests count them)
}

// Tokens are one side's tokens, given as data.
type Tokens struct {
	// Side names the side; "" means the export's only side ("target" when
	// the export has none). With several sides, "" is a *TokensSideError.
	Side string
	// Source says where the tokens came from, for messages (a file name).
	Source string
	// Rows hold one list per batch item, or one list for every item; all
	// of one length, the side's.
	Rows [][]string
}

// TokensSideError is returned when tokens are given without a side for an
// export with several sides: the caller says which one.
type TokensSideError struct {
	Source string   // the Source of the tokens
	Sides  []string // the export's sides, sorted
}

func (e *TokensSideError) Error() string {
	return fmt.Sprintf("%s: tokens given without a side, and the export has sides %s: name the side", e.Source, strings.Join(e.Sides, ", "))
}

// name is how messages name a setting (see SettingName): "query_start"
// is Options.QueryStart unless the caller words it.
func (o Options) name(setting string) string {
	if o.SettingName != nil {
		return o.SettingName(setting)
	}
	var b strings.Builder
	b.WriteString("Options.")
	for _, w := range strings.Split(setting, "_") {
		if w != "" {
			b.WriteString(strings.ToUpper(w[:1]) + w[1:])
		}
	}
	return b.String()
}

// NewOptions returns Options with nothing overridden.
func NewOptions() Options { return Options{Window: -1, Prefix: -1, KVHeads: -1, QueryStart: -1} }

// ParseComputeDType reads the name of the dtype a model computed in, as the
// metadata key compute_dtype and heed's command line take it: the
// short names heed prints (f16, bf16, f32, f64) or PyTorch's and numpy's
// (float16, half, bfloat16, float32, float, float64, double; a "torch."
// prefix is accepted).
func ParseComputeDType(s string) (DType, error) {
	switch strings.TrimPrefix(strings.ToLower(strings.TrimSpace(s)), "torch.") {
	case "f16", "float16", "half", "fp16":
		return Float16, nil
	case "bf16", "bfloat16", "bfp16":
		return BFloat16, nil
	case "f32", "float32", "float", "fp32":
		return Float32, nil
	case "f64", "float64", "double", "fp64":
		return Float64, nil
	}
	return Invalid, fmt.Errorf("compute dtype %q is not one of float16, bfloat16, float32, float64", s)
}

// ErrNoHDF5 is returned (wrapped) when a HDF5 file is opened by a build without HDF5 support.
var ErrNoHDF5 = errors.New("loader: this heed was built without HDF5 support; rebuild with cgo and libhdf5-dev (CGO_ENABLED=1 go build ./cmd/heed)")

// FormatError reports a malformed or unsupported input. Its message names the
// file, the array (when known) and what is wrong, on one line.
type FormatError struct {
	File   string
	Array  string // may be empty
	Offset int64  // byte offset of the problem, -1 when not meaningful
	Msg    string
	Err    error // underlying cause, may be nil
}

func (e *FormatError) Error() string {
	s := e.File
	if e.Array != "" {
		s += ": " + e.Array
	}
	s += ": " + e.Msg
	if e.Offset >= 0 {
		s += fmt.Sprintf(" (at byte %d)", e.Offset)
	}
	if e.Err != nil {
		s += ": " + e.Err.Error()
	}
	return s
}

func (e *FormatError) Unwrap() error { return e.Err }
