package loader

import (
	"archive/zip"
	"bytes"
	"fmt"
	"io"
	"math"
	"math/big"
	"sort"
	"strconv"
	"strings"

	"github.com/nlpodyssey/gopickle/pickle"
	"github.com/nlpodyssey/gopickle/types"
)

// torch.save files (PyTorch >= 1.6's default format): a zip archive whose
// members are ARCHIVE/data.pkl (a pickle of the saved object, tensors
// referring to their storages by persistent ids) and ARCHIVE/data/KEY (each
// storage's raw little-endian bytes, stored uncompressed). This is from
// memory of torch/serialization.py (_save, _load); the fixtures made by
// torch.save in testdata/gen_fixtures.py check it.
//
// No pickle code runs: the pickle machine is github.com/nlpodyssey/gopickle,
// whose classes are Go values; FindClass allows only the tensor-rebuilding
// functions and storage classes below, and every other class is refused
// with its name. Lengths in the pickle are checked against the bytes that
// remain before gopickle allocates (scanPickle).

// maxTorchPickle bounds data.pkl, which is read whole (it holds the object
// structure only; tensor data are separate members).
const maxTorchPickle = 64 << 20

// torchStorages maps torch's storage classes to dtypes.
var torchStorages = map[string]DType{
	"FloatStorage": Float32, "DoubleStorage": Float64, "HalfStorage": Float16, "BFloat16Storage": BFloat16,
	"BoolStorage": Bool, "ByteStorage": Uint8, "CharStorage": Int8, "ShortStorage": Int16,
	"IntStorage": Int32, "LongStorage": Int64,
}

type torchStorageClass struct{ dtype DType }

type torchStorage struct {
	dtype DType
	key   string
}

type torchTensor struct {
	st             *torchStorage
	off            int
	shape, strides []int
}

type torchRebuild struct{ param bool }

// Call rebuilds a tensor: _rebuild_tensor_v2(storage, storage_offset, size,
// stride, requires_grad, backward_hooks[, metadata]) or
// _rebuild_parameter(data, requires_grad, backward_hooks).
func (r torchRebuild) Call(args ...interface{}) (interface{}, error) {
	if r.param {
		if len(args) < 1 {
			return nil, fmt.Errorf("_rebuild_parameter without arguments")
		}
		t, ok := args[0].(*torchTensor)
		if !ok {
			return nil, fmt.Errorf("_rebuild_parameter of a %T", args[0])
		}
		return t, nil
	}
	if len(args) < 4 {
		return nil, fmt.Errorf("_rebuild_tensor_v2 with %d arguments", len(args))
	}
	st, ok := args[0].(*torchStorage)
	if !ok {
		return nil, fmt.Errorf("_rebuild_tensor_v2 of a %T, not a storage", args[0])
	}
	off, ok := pyInt(args[1])
	if !ok || off < 0 {
		return nil, fmt.Errorf("bad storage offset %v", args[1])
	}
	shape, ok1 := pyInts(args[2])
	strides, ok2 := pyInts(args[3])
	if !ok1 || !ok2 || len(shape) != len(strides) || len(shape) > maxRank {
		return nil, fmt.Errorf("bad size %v or stride %v", args[2], args[3])
	}
	return &torchTensor{st: st, off: off, shape: shape, strides: strides}, nil
}

func pyInt(v interface{}) (int, bool) {
	switch x := v.(type) {
	case int:
		return x, true
	case int64:
		return int(x), true
	case *big.Int:
		if x.IsInt64() && x.Int64() <= math.MaxInt32*int64(1<<20) && x.Int64() >= -(1<<50) {
			return int(x.Int64()), true
		}
	}
	return 0, false
}

func pyInts(v interface{}) ([]int, bool) {
	var items []interface{}
	switch x := v.(type) {
	case *types.Tuple:
		items = *x
	case *types.List:
		items = *x
	default:
		return nil, false
	}
	out := make([]int, len(items))
	for i, it := range items {
		n, ok := pyInt(it)
		if !ok {
			return nil, false
		}
		out[i] = n
	}
	return out, true
}

// torchFile is an opened torch.save file.
type torchFile struct {
	mf      *mappedFile
	arrays  []Array
	meta    string
	hasMeta bool
}

func (t *torchFile) Path() string         { return t.mf.path }
func (t *torchFile) Format() string       { return "torch" }
func (t *torchFile) Arrays() []Array      { return append([]Array(nil), t.arrays...) }
func (t *torchFile) Meta() (string, bool) { return t.meta, t.hasMeta }
func (t *torchFile) Close() error         { return t.mf.close() }

// torchArchives returns the data.pkl members of torch.save archives (one
// level down: ARCHIVE/data.pkl) in zip order: none when zr is not a
// torch.save file, one when it is, more when it is several (an error).
func torchArchives(zr *zip.Reader) []*zip.File {
	var out []*zip.File
	for _, m := range zr.File {
		if strings.HasSuffix(m.Name, "/data.pkl") && strings.Count(m.Name, "/") == 1 {
			out = append(out, m)
		}
	}
	return out
}

// newTorch reads a torch.save file from a mapped file (tests and fuzzing;
// openZip is what opens files).
func newTorch(ref fileRef, mf *mappedFile) (*torchFile, error) {
	zr, err := readZip(ref.path, mf)
	if err != nil {
		mf.close()
		return nil, err
	}
	return newTorchZip(ref, mf, zr)
}

func newTorchZip(ref fileRef, mf *mappedFile, zr *zip.Reader) (*torchFile, error) {
	t := &torchFile{mf: mf}
	if err := t.read(ref, zr); err != nil {
		mf.close()
		return nil, err
	}
	return t, nil
}

func (t *torchFile) read(ref fileRef, zr *zip.Reader) error {
	path := ref.path
	ferr := func(arr, format string, a ...any) error {
		return &FormatError{File: path, Array: arr, Offset: -1, Msg: fmt.Sprintf(format, a...)}
	}
	pkls := torchArchives(zr)
	switch len(pkls) {
	case 0:
		return ferr("", "a zip archive without ARCHIVE/data.pkl: not a torch.save file")
	case 1:
	default:
		var names []string
		for _, p := range pkls {
			names = append(names, p.Name)
		}
		return ferr("", "holds %d torch.save archives (%s), each of which could be the one meant: save one object per file", len(pkls), strings.Join(names, ", "))
	}
	pkl := pkls[0]
	prefix := strings.TrimSuffix(pkl.Name, "data.pkl")
	members := map[string]*zip.File{}
	for _, m := range zr.File {
		members[m.Name] = m
	}
	if pkl.UncompressedSize64 > maxTorchPickle {
		return ferr("data.pkl", "pickle of %d bytes is larger than heed reads (%d)", pkl.UncompressedSize64, maxTorchPickle)
	}
	rc, err := pkl.Open()
	if err != nil {
		return ferr("data.pkl", "cannot open: %v", err)
	}
	raw, err := io.ReadAll(io.LimitReader(rc, maxTorchPickle+1))
	rc.Close()
	if err != nil {
		return ferr("data.pkl", "cannot read: %v", err)
	}
	if err := scanPickle(raw); err != nil {
		return ferr("data.pkl", "%v", err)
	}
	var refused string
	u := pickle.NewUnpickler(bytes.NewReader(raw))
	u.FindClass = func(module, name string) (interface{}, error) {
		switch {
		case module == "torch._utils" && name == "_rebuild_tensor_v2":
			return torchRebuild{}, nil
		case module == "torch._utils" && name == "_rebuild_parameter":
			return torchRebuild{param: true}, nil
		case module == "torch" && torchStorages[name] != Invalid:
			return torchStorageClass{dtype: torchStorages[name]}, nil
		}
		refused = module + "." + name
		return nil, fmt.Errorf("refused class %s: heed reads tensors, lists, tuples, dicts and strings only, and runs no pickle code", refused)
	}
	u.PersistentLoad = func(pid interface{}) (interface{}, error) {
		tup, ok := pid.(*types.Tuple)
		if !ok || tup.Len() < 5 {
			return nil, fmt.Errorf("persistent id %v is not a storage reference", pid)
		}
		if s, _ := tup.Get(0).(string); s != "storage" {
			return nil, fmt.Errorf("persistent id of type %v, not a storage", tup.Get(0))
		}
		cls, ok := tup.Get(1).(torchStorageClass)
		if !ok {
			return nil, fmt.Errorf("storage of class %v", tup.Get(1))
		}
		key, ok := tup.Get(2).(string)
		if !ok {
			return nil, fmt.Errorf("storage key %v", tup.Get(2))
		}
		return &torchStorage{dtype: cls.dtype, key: key}, nil
	}
	obj, err := func() (v interface{}, err error) {
		defer func() {
			if r := recover(); r != nil {
				err = fmt.Errorf("malformed pickle (%v)", r)
			}
		}()
		return u.Load()
	}()
	if err != nil {
		if refused != "" {
			return ferr("data.pkl", "refused class %s: heed rebuilds tensors, lists, tuples, dicts and strings only and runs no pickle code; save tensors (or a dict of them) instead", refused)
		}
		return ferr("data.pkl", "%v", err)
	}
	b := &torchBuild{t: t, path: path, prefix: prefix, members: members, stem: ref.npyName}
	if err := b.top(obj); err != nil {
		return err
	}
	sortedArrays(t.arrays)
	return nil
}

type torchBuild struct {
	t       *torchFile
	path    string
	prefix  string
	members map[string]*zip.File
	stem    string
}

func (b *torchBuild) err(name, format string, a ...any) error {
	return &FormatError{File: b.path, Array: name, Offset: -1, Msg: fmt.Sprintf(format, a...)}
}

// top maps the saved object to arrays: a tensor is one array named after
// the file; a list or tuple of tensors is one block with a layer each (as
// models return attentions); a dict names its arrays by its keys.
func (b *torchBuild) top(obj interface{}) error {
	switch x := obj.(type) {
	case *torchTensor:
		return b.tensor(b.stem, x)
	case *types.List, *types.Tuple:
		items, _ := seqItems(x)
		for i, it := range items {
			t, ok := it.(*torchTensor)
			if !ok {
				return b.err(b.stem, "item %d of the saved %s is a %s: save a list of tensors (one per layer), or a dict", i, pyTypeName(obj), pyTypeName(it))
			}
			if err := b.tensor(b.stem+"."+strconv.Itoa(i), t); err != nil {
				return err
			}
		}
		return nil
	case *types.Dict, *types.OrderedDict:
		return b.dict("", x)
	}
	return b.err("", "the saved object is a %s: heed reads a tensor, a list or tuple of tensors, or a dict of them", pyTypeName(obj))
}

func (b *torchBuild) dict(prefix string, d interface{}) error {
	keys, vals, err := dictItems(d)
	if err != nil {
		return b.err(prefix, "%v", err)
	}
	for i, k := range keys {
		name := k
		if prefix != "" {
			name = prefix + "/" + k
		}
		v := vals[i]
		switch x := v.(type) {
		case *torchTensor:
			if err := b.tensor(name, x); err != nil {
				return err
			}
		case string:
			if name == "meta" {
				b.t.meta, b.t.hasMeta = x, true
				continue
			}
			b.t.arrays = append(b.t.arrays, &fileStrings{Array: NewMemStrings(name, []int{}, []string{x}), file: b.path})
		case *types.Dict, *types.OrderedDict:
			if err := b.dict(name, x); err != nil {
				return err
			}
		case *types.List, *types.Tuple:
			items, _ := seqItems(x)
			if strs, shape, ok := stringRows(items); ok {
				b.t.arrays = append(b.t.arrays, &fileStrings{Array: NewMemStrings(name, shape, strs), file: b.path})
				continue
			}
			for j, it := range items {
				t, ok := it.(*torchTensor)
				if !ok {
					return b.err(name, "item %d is a %s: a list must hold tensors (one per layer) or strings (tokens)", j, pyTypeName(it))
				}
				if err := b.tensor(name+"/"+strconv.Itoa(j), t); err != nil {
					return err
				}
			}
		default:
			return b.err(name, "a %s: heed reads tensors, lists of tensors, strings (tokens, meta) and dicts of them", pyTypeName(v))
		}
	}
	return nil
}

// tensor adds one tensor as a raw array over its storage member's bytes
// (mapped, read lazily): C-order or Fortran-order views only.
func (b *torchBuild) tensor(name string, t *torchTensor) error {
	m := b.members[b.prefix+"data/"+t.st.key]
	if m == nil {
		return b.err(name, "its storage %q is not in the archive", t.st.key)
	}
	if m.Method != zip.Store {
		return b.err(name, "storage %q is compressed (method %d); torch.save stores storages uncompressed", t.st.key, m.Method)
	}
	off, err := m.DataOffset()
	if err != nil {
		return b.err(name, "bad zip member header: %v", err)
	}
	size := int64(m.CompressedSize64)
	if off < 0 || size < 0 || off > b.t.mf.size() || size > b.t.mf.size()-off {
		return b.err(name, "storage member of %d bytes at %d runs past the end of the file (%d bytes)", size, off, b.t.mf.size())
	}
	elem := itemSize(t.st.dtype)
	for _, d := range t.shape {
		if d < 0 {
			return b.err(name, "negative dimension in shape %v", t.shape)
		}
	}
	n, ok := numElems(t.shape, math.MaxInt64/int64(elem))
	if !ok {
		return b.err(name, "shape %v is too large", t.shape)
	}
	fortran := false
	if n > 1 && !sameStrides(t.shape, t.strides, cStrides(t.shape)) {
		if !sameStrides(t.shape, t.strides, fStrides(t.shape)) {
			return b.err(name, "a non-contiguous view (size %v, stride %v): save tensor.contiguous()", t.shape, t.strides)
		}
		fortran = true
	}
	begin := int64(t.off) * int64(elem)
	nb := n * int64(elem)
	if begin < 0 || begin > size || nb > size-begin {
		return b.err(name, "%d elements from offset %d need %d bytes, its storage %q has %d (truncated file?)", n, t.off, begin+nb, t.st.key, size)
	}
	data := b.t.mf.bytes()[off+begin : off+begin+nb]
	b.t.arrays = append(b.t.arrays, &rawArray{name: name, file: b.path, dtype: t.st.dtype, shape: t.shape,
		fortran: fortran, elem: elem, life: &b.t.mf.life, data: func() ([]byte, error) { return data, nil }, src: b.t.mf})
	return nil
}

func fStrides(shape []int) []int {
	st := make([]int, len(shape))
	s := 1
	for i := range shape {
		st[i] = s
		s *= shape[i]
	}
	return st
}

// sameStrides compares strides, ignoring axes of length 1 (any stride).
func sameStrides(shape, a, b []int) bool {
	for i := range shape {
		if shape[i] != 1 && a[i] != b[i] {
			return false
		}
	}
	return true
}

func seqItems(v interface{}) ([]interface{}, bool) {
	switch x := v.(type) {
	case *types.List:
		return *x, true
	case *types.Tuple:
		return *x, true
	}
	return nil, false
}

func dictItems(d interface{}) ([]string, []interface{}, error) {
	var keys []string
	vals := map[string]interface{}{}
	add := func(k, v interface{}) error {
		s, ok := k.(string)
		if !ok {
			return fmt.Errorf("a dict key %v is not a string", k)
		}
		if _, dup := vals[s]; dup {
			return fmt.Errorf("key %q twice", s)
		}
		keys = append(keys, s)
		vals[s] = v
		return nil
	}
	switch x := d.(type) {
	case *types.Dict:
		for _, e := range *x {
			if err := add(e.Key, e.Value); err != nil {
				return nil, nil, err
			}
		}
	case *types.OrderedDict:
		for e := x.List.Front(); e != nil; e = e.Next() {
			entry := e.Value.(*types.OrderedDictEntry)
			if err := add(entry.Key, entry.Value); err != nil {
				return nil, nil, err
			}
		}
	}
	sort.Strings(keys)
	out := make([]interface{}, len(keys))
	for i, k := range keys {
		out[i] = vals[k]
	}
	return keys, out, nil
}

// stringRows reads a list of strings ([seq]) or a list of equally long
// lists of strings ([batch, seq]).
func stringRows(items []interface{}) ([]string, []int, bool) {
	if len(items) == 0 {
		return nil, nil, false
	}
	if _, ok := items[0].(string); ok {
		out := make([]string, len(items))
		for i, it := range items {
			s, ok := it.(string)
			if !ok {
				return nil, nil, false
			}
			out[i] = s
		}
		return out, []int{len(out)}, true
	}
	var out []string
	width := -1
	for _, it := range items {
		row, ok := seqItems(it)
		if !ok {
			return nil, nil, false
		}
		strs, _, ok := stringRows(row)
		if !ok || (width >= 0 && len(strs) != width) {
			return nil, nil, false
		}
		width = len(strs)
		out = append(out, strs...)
	}
	return out, []int{len(items), width}, true
}

func pyTypeName(v interface{}) string {
	switch x := v.(type) {
	case nil:
		return "None"
	case *torchTensor:
		return "tensor"
	case string:
		return "str"
	case bool:
		return "bool"
	case int, int64, *big.Int:
		return "int"
	case float64:
		return "float"
	case *types.List:
		return "list"
	case *types.Tuple:
		return "tuple"
	case *types.Dict, *types.OrderedDict:
		return "dict"
	case *types.GenericClass:
		return x.Module + "." + x.Name
	}
	return fmt.Sprintf("%T", v)
}

// fileStrings is a string array read from a file (messages name the file).
type fileStrings struct {
	Array
	file string
}

func (f *fileStrings) File() string { return f.file }

// scanPickle walks the opcodes of a pickle and checks that every argument
// fits in the bytes that remain, so that no length in the file makes the
// pickle machine allocate more than the file holds (the opcodes and their
// argument layouts are those of Python's pickletools documentation).
func scanPickle(b []byte) error {
	i := 0
	need := func(n uint64) error {
		if n > uint64(len(b)-i) {
			return fmt.Errorf("malformed pickle: an argument of %d bytes at byte %d, %d remain", n, i, len(b)-i)
		}
		i += int(n)
		return nil
	}
	line := func() error {
		j := bytes.IndexByte(b[i:], '\n')
		if j < 0 {
			return fmt.Errorf("malformed pickle: unterminated line at byte %d", i)
		}
		i += j + 1
		return nil
	}
	le := func(n int) (uint64, error) {
		if len(b)-i < n {
			return 0, fmt.Errorf("malformed pickle: truncated at byte %d", i)
		}
		var v uint64
		for k := n - 1; k >= 0; k-- {
			v = v<<8 | uint64(b[i+k])
		}
		i += n
		return v, nil
	}
	for i < len(b) {
		op := b[i]
		i++
		var err error
		switch op {
		case '.': // STOP
			return nil
		case 'c', 'i': // GLOBAL, INST: two lines
			if err = line(); err == nil {
				err = line()
			}
		case 'I', 'L', 'F', 'S', 'V', 'p', 'g', 'P': // newline-terminated argument
			err = line()
		case 'K', 'q', 'h', '\x80', '\x82': // one byte
			err = need(1)
		case 'M', '\x83': // two bytes
			err = need(2)
		case 'J', 'r', 'j', '\x84': // four bytes
			err = need(4)
		case 'G': // BINFLOAT
			err = need(8)
		case 'U', '\x8c', 'C', '\x8a': // 1-byte length
			var n uint64
			if n, err = le(1); err == nil {
				err = need(n)
			}
		case 'T', 'X', 'B', '\x8b': // 4-byte length
			var n uint64
			if n, err = le(4); err == nil {
				err = need(n)
			}
		case '\x8d', '\x8e', '\x96': // 8-byte length
			var n uint64
			if n, err = le(8); err == nil {
				err = need(n)
			}
		case '\x95': // FRAME: 8-byte frame length, then the frame's opcodes
			var n uint64
			if n, err = le(8); err == nil && n > uint64(len(b)-i) {
				err = fmt.Errorf("malformed pickle: frame of %d bytes, %d remain", n, len(b)-i)
			}
		}
		if err != nil {
			return err
		}
	}
	return fmt.Errorf("malformed pickle: no STOP opcode")
}
