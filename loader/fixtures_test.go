package loader

import (
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"hash/crc32"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"sort"
	"strconv"
	"strings"
	"testing"
)

// The fixtures under testdata/fixtures are written by
// testdata/gen_fixtures.py with numpy, h5py and PyTorch; beside each file a
// JSON records what those libraries report when they read it back (shape,
// dtype, the values converted to float32 by numpy's astype, CRC-32 of those
// values). These tests check that heed reads the same thing, bit for bit.

const fixtures = "../testdata/fixtures"

type fixtureArray struct {
	Name       string            `json:"name"`
	DType      string            `json:"dtype"`
	NumpyDType string            `json:"numpy_dtype"`
	Shape      []int             `json:"shape"`
	CRC32F32   *uint32           `json:"crc32_f32"`
	F32Bits    []string          `json:"f32_bits"`
	CRC32I64   *uint32           `json:"crc32_i64"`
	I64        []string          `json:"i64"`
	Strings    []string          `json:"strings"`
	Attrs      map[string]string `json:"attrs"`
}

type fixtureFile struct {
	File   string         `json:"file"`
	Format string         `json:"format"`
	Meta   *string        `json:"meta"`
	Arrays []fixtureArray `json:"arrays"`
}

func loadJSON(t *testing.T, path string, v any) {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (generate with /usr/bin/python3 testdata/gen_fixtures.py)", err)
	}
	if err := json.Unmarshal(b, v); err != nil {
		t.Fatalf("%s: %v", path, err)
	}
}

func f32Bytes(v []float32) []byte {
	b := make([]byte, 4*len(v))
	for i, x := range v {
		binary.LittleEndian.PutUint32(b[4*i:], math.Float32bits(x))
	}
	return b
}

func i64Bytes(v []int64) []byte {
	b := make([]byte, 8*len(v))
	for i, x := range v {
		binary.LittleEndian.PutUint64(b[8*i:], uint64(x))
	}
	return b
}

// sameF32 compares heed's value with numpy's float32 bits. HDF5's own
// float conversion (H5T_conv_f_f, which heed lets convert h5py's float16 as
// the HDF5 documentation advises) writes every NaN as sign|0x7fffffff, so for
// HDF5 files a NaN only has to be a NaN of the same sign (observed with
// HDF5 1.10.8; numpy keeps the payload).
func sameF32(format string, got float32, want uint32) bool {
	g := math.Float32bits(got)
	if g == want {
		return true
	}
	w := math.Float32frombits(want)
	return format == "hdf5" && w != w && got != got && g>>31 == want>>31
}

func checkArray(t *testing.T, format string, a Array, want fixtureArray) {
	t.Helper()
	where := a.File() + ": " + a.Name()
	if a.DType().String() != want.DType {
		t.Errorf("%s: DType = %s, want %s (numpy %s)", where, a.DType(), want.DType, want.NumpyDType)
		return
	}
	if !reflect.DeepEqual(a.Shape(), want.Shape) && !(len(a.Shape()) == 0 && len(want.Shape) == 0) {
		t.Errorf("%s: Shape = %v, want %v", where, a.Shape(), want.Shape)
		return
	}
	if want.DType == "str" {
		got, err := a.ReadStrings()
		if err != nil {
			t.Errorf("%s: ReadStrings: %v", where, err)
			return
		}
		if !reflect.DeepEqual(got, want.Strings) && !(len(got) == 0 && len(want.Strings) == 0) {
			t.Errorf("%s: ReadStrings = %q, want %q", where, got, want.Strings)
		}
		return
	}
	n := prod(want.Shape)
	all := make([]float32, n)
	if err := a.ReadFloat32(nil, all); err != nil {
		t.Errorf("%s: ReadFloat32: %v", where, err)
		return
	}
	for i, hx := range want.F32Bits {
		w, _ := strconv.ParseUint(hx, 16, 32)
		if !sameF32(format, all[i], uint32(w)) {
			t.Errorf("%s: element %d = %08x (%v), numpy gives %s", where, i, math.Float32bits(all[i]), all[i], hx)
			return
		}
	}
	if want.CRC32F32 != nil && format != "hdf5" {
		if c := crc32.ChecksumIEEE(f32Bytes(all)); c != *want.CRC32F32 {
			t.Errorf("%s: CRC-32 of float32 values = %d, numpy's = %d", where, c, *want.CRC32F32)
		}
	}
	// Sub-array reads by leading indices give the same values.
	if len(want.Shape) >= 1 && n > 0 {
		sub := make([]float32, n/want.Shape[0])
		for i := 0; i < want.Shape[0]; i++ {
			if err := a.ReadFloat32([]int{i}, sub); err != nil {
				t.Errorf("%s: ReadFloat32([%d]): %v", where, i, err)
				return
			}
			for j, v := range sub {
				if math.Float32bits(v) != math.Float32bits(all[i*len(sub)+j]) && !(v != v && all[i*len(sub)+j] != all[i*len(sub)+j]) {
					t.Errorf("%s: ReadFloat32([%d])[%d] = %v, whole read gives %v", where, i, j, v, all[i*len(sub)+j])
					return
				}
			}
		}
	}
	if want.CRC32I64 != nil {
		iv := make([]int64, n)
		if err := a.ReadInt64(nil, iv); err != nil {
			t.Errorf("%s: ReadInt64: %v", where, err)
			return
		}
		if c := crc32.ChecksumIEEE(i64Bytes(iv)); c != *want.CRC32I64 {
			t.Errorf("%s: CRC-32 of int64 values = %d, numpy's = %d", where, c, *want.CRC32I64)
		}
		for i, s := range want.I64 {
			if strconv.FormatInt(iv[i], 10) != s {
				t.Errorf("%s: int element %d = %d, numpy gives %s", where, i, iv[i], s)
				return
			}
		}
	}
	if len(want.Attrs) > 0 {
		ar, ok := a.(attrReader)
		if !ok {
			t.Errorf("%s: no attributes", where)
			return
		}
		for k, v := range want.Attrs {
			if got, _ := ar.Attr(k); got != v {
				t.Errorf("%s: attribute %s = %q, h5py gives %q", where, k, got, v)
			}
		}
	}
}

// TestFixtures reads every fixture and compares with numpy's / h5py's report.
func TestFixtures(t *testing.T) {
	reports, _ := filepath.Glob(filepath.Join(fixtures, "*", "*.json"))
	n := 0
	for _, rp := range reports {
		dir := filepath.Base(filepath.Dir(rp))
		if dir == "exports" || dir == "conv" {
			continue
		}
		var want fixtureFile
		loadJSON(t, rp, &want)
		path := filepath.Join(fixtures, filepath.FromSlash(want.File))
		n++
		t.Run(want.File, func(t *testing.T) {
			c, err := OpenFile(path)
			if want.Format == "hdf5" && !HDF5Supported {
				if !errors.Is(err, ErrNoHDF5) {
					t.Fatalf("OpenFile in a build without HDF5: %v, want ErrNoHDF5", err)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			defer c.Close()
			if c.Format() != want.Format {
				t.Errorf("Format = %q, want %q", c.Format(), want.Format)
			}
			m, ok := c.Meta()
			if want.Meta == nil && ok || want.Meta != nil && (!ok || m != *want.Meta) {
				t.Errorf("Meta = %q, %v; want %v", m, ok, want.Meta)
			}
			arrs := c.Arrays()
			var names, wantNames []string
			byName := map[string]Array{}
			for _, a := range arrs {
				names = append(names, a.Name())
				byName[a.Name()] = a
			}
			for _, w := range want.Arrays {
				wantNames = append(wantNames, w.Name)
			}
			sort.Strings(wantNames)
			if !reflect.DeepEqual(names, wantNames) {
				t.Fatalf("arrays %q, want %q", names, wantNames)
			}
			for _, w := range want.Arrays {
				checkArray(t, want.Format, byName[w.Name], w)
			}
		})
	}
	if n < 40 {
		t.Errorf("only %d fixture reports found", n)
	}
}

func readBitsRef(t *testing.T, path string) []uint32 {
	t.Helper()
	c, err := OpenFile(path)
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	a := c.Arrays()[0]
	if a.DType() != Uint32 || !reflect.DeepEqual(a.Shape(), []int{65536}) {
		t.Fatalf("%s: %s %v, want u32 [65536]", path, a.DType(), a.Shape())
	}
	v := make([]int64, 65536)
	if err := a.ReadInt64(nil, v); err != nil {
		t.Fatal(err)
	}
	out := make([]uint32, len(v))
	for i, x := range v {
		out[i] = uint32(x)
	}
	return out
}

// TestFloat16AllPatterns: every float16 bit pattern, little- and big-endian,
// against numpy's float16 -> float32 conversion (ndarray.astype(np.float32),
// numpy 1.24; testdata/fixtures/conv/f16_to_f32_numpy.npz).
func TestFloat16AllPatterns(t *testing.T) {
	ref := readBitsRef(t, filepath.Join(fixtures, "conv", "f16_to_f32_numpy.npz"))
	checkAllPatterns(t, Float16, ref, "numpy")
}

// TestBFloat16AllPatterns: every bfloat16 bit pattern against PyTorch's
// conversion (tensor.view(torch.bfloat16).float(), torch 1.13;
// testdata/fixtures/conv/bf16_to_f32_torch.npz).
func TestBFloat16AllPatterns(t *testing.T) {
	ref := readBitsRef(t, filepath.Join(fixtures, "conv", "bf16_to_f32_torch.npz"))
	checkAllPatterns(t, BFloat16, ref, "PyTorch")
}

func checkAllPatterns(t *testing.T, d DType, ref []uint32, who string) {
	le := make([]byte, 2*65536)
	be := make([]byte, 2*65536)
	for i := 0; i < 65536; i++ {
		binary.LittleEndian.PutUint16(le[2*i:], uint16(i))
		binary.BigEndian.PutUint16(be[2*i:], uint16(i))
	}
	for _, c := range []struct {
		big bool
		src []byte
	}{{false, le}, {true, be}} {
		dst := make([]float32, 65536)
		convertF32(d, c.big, c.src, dst)
		bad := 0
		for i, v := range dst {
			if math.Float32bits(v) != ref[i] {
				if bad < 5 {
					t.Errorf("%s %04x (big-endian %v) -> %08x, %s gives %08x", d, i, c.big, math.Float32bits(v), who, ref[i])
				}
				bad++
			}
		}
		if bad > 0 {
			t.Errorf("%d of 65536 %s patterns differ from %s", bad, d, who)
		}
	}
}

// TestBadInputs: every bad input gives a one-line *FormatError naming the
// file (and the array when there is one) and saying what is wrong.
func TestBadInputs(t *testing.T) {
	cases := []struct{ file, want string }{
		{"truncated_data.npy", "header lies about the data"},
		{"truncated_header.npy", "truncated NPY header"},
		{"lying_shape.npy", "shape [100 100] needs 40000 bytes"},
		{"unknown_dtype.npy", `unknown dtype "<q7"`},
		{"complex.npy", "complex"},
		{"object.npy", "np.asarray(tokens, dtype=str)"},
		{"huge_header.npy", "exceeds heed's limit"},
		{"bad_version.npy", "unsupported NPY version 9.0"},
		{"overflow_shape.npy", "overflows"},
		{"many_empty_strings.npy", "zero-byte elements"},
		{"grad_mismatch.npz", "decoder/grad: gradient shape [2 3 4 5]"},
		{"tokens_length.npz", `tokens/target: 3 tokens, but block "decoder" has 4`},
		{"bad_meta.npz", "meta: metadata is not a JSON object"},
		{"deflate_bomb.npz", "shape [1000000 1000000] needs 4000000000000 bytes"},
		{"truncated.npz", "not a readable NPZ"},
		{"not_hdf5.h5", "not an HDF5 file"},
		{"truncated.h5", "HDF5"},
		{"h5_unwritten.h5", "decoder/attn: created but never written: no storage allocated for its [32 32 4096 4096] values"},
		{"st_huge_header.safetensors", "header length 4611686018427387904 exceeds the safetensors limit"},
		{"st_truncated.safetensors", "run past the end of the data"},
		{"st_short.safetensors", "truncated: 3 bytes"},
		{"st_gap.safetensors", "gap before data_offsets [4, 8)"},
		{"st_shape_lie.safetensors", "shape [3] of F32 needs 12 bytes, data_offsets give 8"},
		{"st_unknown_dtype.safetensors", `unknown or unsupported dtype "Q4"`},
		{"st_bad_json.safetensors", "bad tensor entry"},
		{"unknown_format.bin", "not an export heed reads"},
		{"torch_system.pt", "data.pkl: refused class posix.system"},
		{"torch_custom.pt", "data.pkl: refused class __main__.Thing"},
		{"torch_huge_string.pt", "data.pkl: malformed pickle: an argument of 4611686018427387904 bytes"},
		{"torch_short_storage.pt", `16 elements from offset 0 need 64 bytes, its storage "0" has 40`},
		{"torch_no_storage.pt", `its storage "0" is not in the archive`},
		{"torch_legacy.pt", "legacy format (torch < 1.6"},
	}
	listed := map[string]bool{}
	for _, c := range cases {
		listed[c.file] = true
		path := filepath.Join(fixtures, "bad", c.file)
		ex, err := Open([]string{path}, NewOptions())
		if err == nil {
			ex.Close()
			t.Errorf("%s: opened without error", c.file)
			continue
		}
		msg := err.Error()
		var fe *FormatError
		if (c.file == "truncated.h5" || c.file == "h5_unwritten.h5") && !HDF5Supported {
			if !errors.Is(err, ErrNoHDF5) {
				t.Errorf("%s: %v, want ErrNoHDF5", c.file, err)
			}
			continue
		}
		if !errors.As(err, &fe) {
			t.Errorf("%s: %T %v, want a *FormatError", c.file, err, err)
		}
		if strings.Contains(msg, "\n") || !strings.Contains(msg, path) || !strings.Contains(msg, c.want) {
			t.Errorf("%s: error %q, want one line naming the file and containing %q", c.file, msg, c.want)
		}
	}
	all, _ := os.ReadDir(filepath.Join(fixtures, "bad"))
	for _, e := range all {
		if !listed[e.Name()] {
			t.Errorf("bad input %s has no case in TestBadInputs", e.Name())
		}
	}
}

// corruptions calls fn with every truncation of data and with data changed
// at each byte (to 0x00, 0xff and with its low bit flipped); byte positions
// past limit are sampled every stride bytes.
func corruptions(data []byte, limit, stride int, fn func(what string, b []byte)) {
	for n := 0; n < len(data); n++ {
		if n > limit && n%stride != 0 {
			continue
		}
		fn(fmt.Sprintf("truncated to %d bytes", n), data[:n])
	}
	b := make([]byte, len(data))
	for i := range data {
		if i > limit && i%stride != 0 {
			continue
		}
		for _, v := range []byte{0x00, 0xff, data[i] ^ 0x01} {
			copy(b, data)
			b[i] = v
			fn(fmt.Sprintf("byte %d set to %#02x", i, v), b)
		}
	}
}

// exercise opens path as an export and reads every head, gradient, mask,
// activation and side: errors are fine, panics and hangs are not.
func exercise(path string) {
	ex, err := Open([]string{path}, NewOptions())
	if err != nil {
		return
	}
	defer ex.Close()
	for _, b := range ex.Blocks {
		if b.Layers > 0 {
			buf := make([]float32, b.Queries*b.Keys)
			mask := make([]bool, b.Queries*b.Keys)
			for l := 0; l < b.Layers; l++ {
				for bt := 0; bt < b.Batch; bt++ {
					for h := 0; h < b.Heads; h++ {
						_ = b.ReadAttn(l, bt, h, buf)
						if b.HasGrad {
							_ = b.ReadGrad(l, bt, h, buf)
						}
						_ = b.ReadAllow(bt, h, mask)
					}
				}
			}
		}
		if b.OutLayers > 0 {
			buf := make([]float32, b.Positions*b.Features)
			for l := 0; l < b.OutLayers; l++ {
				_ = b.ReadOut(l, 0, buf)
			}
		}
	}
}

// TestCorruptFixtures: no corruption of a good fixture may panic or hang.
// (HDF5 files are left out: their parsing is the HDF5 C library's.)
func TestCorruptFixtures(t *testing.T) {
	if testing.Short() {
		t.Skip("corruption sweep skipped in -short mode")
	}
	dir := t.TempDir()
	for _, f := range []string{"npy/f16_le.npy", "npy/f32_fortran.npy", "npy/tokens_u.npy", "npz/stored.npz",
		"npz/deflated.npz", "safetensors/dtypes.safetensors", "exports/gqa.safetensors", "torch/dict.pt", "torch/transposed.pt"} {
		data, err := os.ReadFile(filepath.Join(fixtures, f))
		if err != nil {
			t.Fatal(err)
		}
		path := filepath.Join(dir, "x"+filepath.Ext(f))
		count := 0
		corruptions(data, 160, 23, func(what string, b []byte) {
			count++
			if err := os.WriteFile(path, b, 0o644); err != nil {
				t.Fatal(err)
			}
			defer func() {
				if r := recover(); r != nil {
					t.Fatalf("%s %s: panic: %v", f, what, r)
				}
			}()
			exercise(path)
		})
		if count < 100 {
			t.Errorf("%s: only %d corruptions", f, count)
		}
	}
}
