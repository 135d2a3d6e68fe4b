//go:build cgo && !nohdf5

package loader

// HDF5 through the HDF5 C library's own API, called directly: files,
// groups, datasets, dataspaces and hyperslabs, chunk-cache properties,
// reading with a chosen memory type (so the library converts h5py's
// float16, ints and big-endian data to float32 for us), datatype
// introspection (h5py's bool enum, string kinds) and attribute reads. Every
// call goes through h5mu (heed does not rely on the library being built
// thread-safe).
//
// No Go binding package stands in between on purpose: the one there is
// (gonum.org/v1/hdf5) initialises the library in its package init, which
// cost every heed process about 2.5 ms at start-up (GODEBUG=inittrace=1)
// whether or not it opens an HDF5 file. Called directly, the library
// initialises itself at the first call, i.e. at the first HDF5 file
// (docs/scale.md, start-up).

/*
#cgo pkg-config: hdf5
#include <hdf5.h>
#include <stdlib.h>
#include <string.h>

static hid_t heed_native_float(void) { return H5T_NATIVE_FLOAT; }
static hid_t heed_native_llong(void) { return H5T_NATIVE_LLONG; }
static hid_t heed_native_ullong(void) { return H5T_NATIVE_ULLONG; }
static hid_t heed_native_double(void) { return H5T_NATIVE_DOUBLE; }

static hid_t heed_vlen_str(H5T_cset_t cset) {
	hid_t t = H5Tcopy(H5T_C_S1);
	if (t < 0) return t;
	if (H5Tset_size(t, H5T_VARIABLE) < 0 || H5Tset_cset(t, cset) < 0) { H5Tclose(t); return -1; }
	return t;
}

// heed_enum_is_bool reports whether an enum type is h5py's bool: two members
// named FALSE = 0 and TRUE = 1 over a 1-byte integer.
static int heed_enum_is_bool(hid_t t) {
	if (H5Tget_nmembers(t) != 2 || H5Tget_size(t) != 1) return 0;
	int ok = 1;
	for (unsigned i = 0; i < 2 && ok; i++) {
		char *name = H5Tget_member_name(t, i);
		signed char v = -1;
		if (name == NULL || H5Tget_member_value(t, i, &v) < 0) ok = 0;
		else if (!((strcmp(name, "FALSE") == 0 && v == 0) || (strcmp(name, "TRUE") == 0 && v == 1))) ok = 0;
		if (name != NULL) H5free_memory(name);
	}
	return ok;
}

// heed_chunk returns the chunk dims of a chunked dataset (0 when not chunked).
static int heed_chunk(hid_t ds, int rank, hsize_t *dims) {
	hid_t p = H5Dget_create_plist(ds);
	if (p < 0) return -1;
	int r = 0;
	if (H5Pget_layout(p) == H5D_CHUNKED) r = H5Pget_chunk(p, rank, dims);
	H5Pclose(p);
	return r;
}

// heed_unwritten is 1 when a contiguous or chunked dataset has no storage
// allocated: created, never written (H5Dget_space_status; h5py and HDF5
// allocate such storage late, at the first write, by default), 0 when it
// has, or when its data is elsewhere (compact: in its header; virtual or
// external: in other files), -1 on error.
static int heed_unwritten(hid_t ds) {
	hid_t p = H5Dget_create_plist(ds);
	if (p < 0) return -1;
	H5D_layout_t layout = H5Pget_layout(p);
	int external = H5Pget_external_count(p);
	H5Pclose(p);
	if ((layout != H5D_CONTIGUOUS && layout != H5D_CHUNKED) || external != 0) return 0;
	H5D_space_status_t st;
	if (H5Dget_space_status(ds, &st) < 0) return -1;
	return st == H5D_SPACE_STATUS_NOT_ALLOCATED;
}

static herr_t heed_reclaim(hid_t type, hid_t space, void *buf) {
	return H5Dvlen_reclaim(type, space, H5P_DEFAULT, buf);
}

static herr_t heed_silence(void) { return H5Eset_auto2(H5E_DEFAULT, NULL, NULL); }

static hid_t heed_fopen(const char *path) { return H5Fopen(path, H5F_ACC_RDONLY, H5P_DEFAULT); }
static hid_t heed_gopen(hid_t loc, const char *name) { return H5Gopen2(loc, name, H5P_DEFAULT); }
static hid_t heed_dopen(hid_t loc, const char *name, hid_t dapl) { return H5Dopen2(loc, name, dapl); }

// heed_nlinks is the number of links in a group, -1 on error.
static hssize_t heed_nlinks(hid_t g) {
	H5G_info_t info;
	if (H5Gget_info(g, &info) < 0) return -1;
	return (hssize_t)info.nlinks;
}

// heed_link_name writes the name of link i of g (in name order) into buf
// when size allows and returns its length, -1 on error.
static ssize_t heed_link_name(hid_t g, hsize_t i, char *buf, size_t size) {
	return H5Lget_name_by_idx(g, ".", H5_INDEX_NAME, H5_ITER_INC, i, buf, size, H5P_DEFAULT);
}

// heed_link_kind is 1 for a group, 2 for a dataset, 0 for anything else
// (named datatypes; soft and external links, which are not followed) and -1
// on error, for link i of g in name order.
static int heed_link_kind(hid_t g, hsize_t i) {
	switch (H5Gget_objtype_by_idx(g, i)) {
	case H5G_GROUP: return 1;
	case H5G_DATASET: return 2;
	case H5G_UNKNOWN: return -1;
	default: return 0;
	}
}

// heed_dapl_cache is a dataset access property list with a chunk cache of
// nslots slots and nbytes bytes (w0 = 1: evict fully read chunks first).
static hid_t heed_dapl_cache(size_t nslots, size_t nbytes) {
	hid_t p = H5Pcreate(H5P_DATASET_ACCESS);
	if (p < 0) return p;
	if (H5Pset_chunk_cache(p, nslots, nbytes, 1.0) < 0) { H5Pclose(p); return -1; }
	return p;
}

// heed_shape reads the extent of a dataset: the rank (0 for a scalar), -2
// for a null dataspace, -1 on error; dims receives the dimensions when the
// rank is at most max.
static int heed_shape(hid_t ds, int max, hsize_t *dims) {
	hid_t sp = H5Dget_space(ds);
	if (sp < 0) return -1;
	int r;
	switch (H5Sget_simple_extent_type(sp)) {
	case H5S_SCALAR: r = 0; break;
	case H5S_SIMPLE:
		r = H5Sget_simple_extent_ndims(sp);
		if (r > 0 && r <= max && H5Sget_simple_extent_dims(sp, dims, NULL) < 0) r = -1;
		break;
	case H5S_NULL: r = -2; break;
	default: r = -1;
	}
	H5Sclose(sp);
	return r;
}

// heed_read_sub reads the sub-array that starts at off and spans cnt (rank
// values each; rank 0: the whole dataset) as memory type mem into buf,
// which holds n elements. 0 on success, -1 when the library cannot select
// or read it.
static int heed_read_sub(hid_t ds, int rank, const hsize_t *off, const hsize_t *cnt, hsize_t n, hid_t mem, void *buf) {
	int rc = -1;
	hid_t fs = -1, ms = -1;
	fs = H5Dget_space(ds);
	if (fs < 0) goto out;
	if (rank > 0 && H5Sselect_hyperslab(fs, H5S_SELECT_SET, off, NULL, cnt, NULL) < 0) goto out;
	ms = H5Screate_simple(1, &n, NULL);
	if (ms < 0) goto out;
	if (H5Dread(ds, mem, ms, fs, H5P_DEFAULT, buf) < 0) goto out;
	rc = 0;
out:
	if (ms >= 0) H5Sclose(ms);
	if (fs >= 0) H5Sclose(fs);
	return rc;
}

// heed_reclaim_n frees the strings a variable-length read of n values left.
static herr_t heed_reclaim_n(hid_t type, hsize_t n, void *buf) {
	hid_t sp = H5Screate_simple(1, &n, NULL);
	if (sp < 0) return -1;
	herr_t r = H5Dvlen_reclaim(type, sp, H5P_DEFAULT, buf);
	H5Sclose(sp);
	return r;
}
*/
import "C"

import (
	"fmt"
	"math"
	"runtime"
	"strconv"
	"strings"
	"sync"
	"unsafe"
)

// HDF5Supported reports whether this build reads HDF5 files.
const HDF5Supported = true

var (
	h5mu sync.Mutex
)

// h5enter takes h5mu for a run of calls into the library and keeps the
// goroutine on its OS thread until h5leave, with the library's automatic
// error printing turned off on that thread. The library keeps its error
// stack, and with it that setting, per thread when it is built thread-safe
// (Debian's build is; from memory of the HDF5 reference manual, H5Eset_auto2,
// and seen here: turned off once, a read that failed on another thread
// printed the library's error stack on stderr beside heed's one line).
func h5enter() {
	h5mu.Lock()
	runtime.LockOSThread()
	C.heed_silence()
}

func h5leave() {
	runtime.UnlockOSThread()
	h5mu.Unlock()
}

// blockAttrs are the dataset attributes Assemble understands (see attrReader).
var blockAttrs = []string{"kind", "query", "key", "axes", "window", "prefix", "kv_heads"}

type h5File struct {
	path    string
	f       C.hid_t // the open file, 0 once closed
	life    lifetime
	arrays  []Array
	dsets   []*h5Array
	meta    string
	hasMeta bool
}

type h5Array struct {
	file    *h5File
	name    string
	ds      C.hid_t // the open dataset, 0 once closed
	dtype   DType
	shape   []int
	enum    bool // an enum (h5py bool): read raw and convert
	strVar  bool
	strSize int
	cset    C.H5T_cset_t
	ftype   C.hid_t // copy of the file type, for enums, fixed strings and half floats (0 otherwise)
	attrs   map[string]string
	// half: IEEE binary16 or bfloat16, little-endian: read the stored bytes
	// (memory type = file type, so the library copies) and widen them with
	// the same tables as the other containers. The library's own conversion
	// of 2-byte floats to float32 is a soft conversion, about 50 ns a value.
	half bool
}

func openHDF5(path string) (Container, error) {
	h5enter()
	defer h5leave()
	cpath := C.CString(path)
	f := C.heed_fopen(cpath)
	C.free(unsafe.Pointer(cpath))
	if f < 0 {
		return nil, &FormatError{File: path, Offset: -1, Msg: "the HDF5 library cannot open it (corrupt or truncated HDF5 file?)"}
	}
	h := &h5File{path: path, f: f}
	if err := h.walk(f, "", 0); err != nil {
		h.closeLocked()
		return nil, err
	}
	if v, ok, err := readAttr(f, "meta"); err != nil {
		h.closeLocked()
		return nil, &FormatError{File: path, Array: "meta", Offset: -1, Msg: "cannot read the root attribute", Err: err}
	} else if ok {
		h.meta, h.hasMeta = v, true
	}
	sortedArrays(h.arrays)
	return h, nil
}

// maxDepth bounds the group walk (hard links can make cycles).
const maxDepth = 32

func (h *h5File) walk(g C.hid_t, prefix string, depth int) error {
	if depth > maxDepth {
		return &FormatError{File: h.path, Array: prefix, Offset: -1, Msg: "groups nested too deeply (a cycle of links?)"}
	}
	n := C.heed_nlinks(g)
	if n < 0 {
		return &FormatError{File: h.path, Array: prefix, Offset: -1, Msg: "cannot list the group"}
	}
	for i := C.hsize_t(0); i < C.hsize_t(n); i++ {
		name, ok := linkName(g, i)
		if !ok {
			continue
		}
		kind := C.heed_link_kind(g, i)
		if kind < 0 {
			continue // dangling or external link
		}
		full := name
		if prefix != "" {
			full = prefix + "/" + name
		}
		switch kind {
		case 1: // group
			cname := C.CString(name)
			sub := C.heed_gopen(g, cname)
			C.free(unsafe.Pointer(cname))
			if sub < 0 {
				return &FormatError{File: h.path, Array: full, Offset: -1, Msg: "cannot open the group"}
			}
			err := h.walk(sub, full, depth+1)
			C.H5Gclose(sub)
			if err != nil {
				return err
			}
		case 2: // dataset
			a, err := h.dataset(g, name, full)
			if err != nil {
				return err
			}
			if a != nil {
				h.arrays = append(h.arrays, a)
				h.dsets = append(h.dsets, a)
			}
		}
	}
	return nil
}

// linkName is the name of link i of group g, in name order.
func linkName(g C.hid_t, i C.hsize_t) (string, bool) {
	n := C.heed_link_name(g, i, nil, 0)
	if n < 0 {
		return "", false
	}
	buf := make([]byte, int(n)+1)
	if C.heed_link_name(g, i, (*C.char)(unsafe.Pointer(&buf[0])), C.size_t(len(buf))) < 0 {
		return "", false
	}
	return trimNul(buf), true
}

func (h *h5File) dataset(g C.hid_t, name, full string) (*h5Array, error) {
	ferr := func(format string, a ...any) error {
		return &FormatError{File: h.path, Array: full, Offset: -1, Msg: fmt.Sprintf(format, a...)}
	}
	cname := C.CString(name)
	defer C.free(unsafe.Pointer(cname))
	ds := C.heed_dopen(g, cname, C.H5P_DEFAULT)
	if ds < 0 {
		return nil, ferr("cannot open the dataset")
	}
	a := &h5Array{file: h, name: full}
	shape, err := dsShape(ds)
	if err != nil {
		C.H5Dclose(ds)
		return nil, ferr("%v", err)
	}
	a.shape = shape
	if prod(shape) > 0 {
		switch C.heed_unwritten(ds) {
		case 1:
			C.H5Dclose(ds)
			return nil, ferr("created but never written: no storage allocated for its %v values (did the writing job stop?)", shape)
		case -1:
			C.H5Dclose(ds)
			return nil, ferr("the HDF5 library cannot tell whether it was written")
		}
	}
	if err := a.classify(ds); err != nil {
		C.H5Dclose(ds)
		a.closeType()
		return nil, ferr("%v", err)
	}
	for _, n := range blockAttrs {
		v, ok, err := readAttr(ds, n)
		if err != nil {
			C.H5Dclose(ds)
			a.closeType()
			return nil, ferr("attribute %s: %v", n, err)
		}
		if ok {
			if a.attrs == nil {
				a.attrs = map[string]string{}
			}
			a.attrs[n] = v
		}
	}
	// A chunk cache that holds every chunk one head touches: reading the
	// next head of the same chunks then inflates nothing twice.
	cache := 0
	if len(shape) >= 2 {
		chunk := make([]C.hsize_t, len(shape))
		if r := C.heed_chunk(ds, C.int(len(shape)), &chunk[0]); r > 0 {
			n := 1
			bytes := max(itemSize(a.dtype), a.strSize, 8)
			for i, c := range chunk {
				bytes *= int(c)
				if i >= len(shape)-2 && c > 0 {
					n *= (shape[i] + int(c) - 1) / int(c)
				}
			}
			cache = min(n*bytes, 256<<20)
			if cache > 1<<20 { // HDF5's default is 1 MiB
				if dapl := C.heed_dapl_cache(C.size_t(nextPrime(100*n)), C.size_t(cache)); dapl >= 0 {
					if ds2 := C.heed_dopen(g, cname, dapl); ds2 >= 0 {
						C.H5Dclose(ds)
						ds = ds2
					}
					C.H5Pclose(dapl)
				}
			}
		}
	}
	a.ds = ds
	return a, nil
}

func nextPrime(n int) int {
	if n < 2 {
		return 2
	}
	for ; ; n++ {
		p := true
		for d := 2; d*d <= n; d++ {
			if n%d == 0 {
				p = false
				break
			}
		}
		if p {
			return n
		}
	}
}

func dsShape(ds C.hid_t) ([]int, error) {
	var cdims [maxRank]C.hsize_t
	r := int(C.heed_shape(ds, maxRank, &cdims[0]))
	switch {
	case r == -2:
		return nil, fmt.Errorf("empty (null) dataspace")
	case r == -1:
		return nil, fmt.Errorf("no dataspace")
	case r == 0:
		return []int{}, nil
	case r > maxRank:
		return nil, fmt.Errorf("rank %d", r)
	}
	dims := cdims[:r]
	shape := make([]int, len(dims))
	for i, d := range dims {
		if uint64(d) > math.MaxInt32*uint64(1<<20) {
			return nil, fmt.Errorf("dimension %d too large", d)
		}
		shape[i] = int(d)
	}
	if _, ok := numElems(shape, math.MaxInt64/16); !ok {
		return nil, fmt.Errorf("shape %v overflows", shape)
	}
	return shape, nil
}

// classify sets dtype and the reading strategy from the dataset's type.
func (a *h5Array) classify(ds C.hid_t) error {
	t := C.H5Dget_type(ds)
	if t < 0 {
		return fmt.Errorf("no datatype")
	}
	defer C.H5Tclose(t)
	size := int(C.H5Tget_size(t))
	switch C.H5Tget_class(t) {
	case C.H5T_FLOAT:
		switch size {
		case 2:
			// h5py's float16 is a custom IEEE type (sign 15, exponent 10..14,
			// mantissa 0..9); a 2-byte float with an 8-bit exponent is bfloat16.
			var spos, epos, esize, mpos, msize C.size_t
			C.H5Tget_fields(t, &spos, &epos, &esize, &mpos, &msize)
			a.dtype = Float16
			if esize == 8 && msize == 7 {
				a.dtype = BFloat16
			}
			ieee := spos == 15 && mpos == 0 && C.H5Tget_norm(t) == C.H5T_NORM_IMPLIED &&
				C.H5Tget_precision(t) == 16 && C.H5Tget_offset(t) == 0 && C.H5Tget_order(t) == C.H5T_ORDER_LE
			bias := C.H5Tget_ebias(t)
			f16 := a.dtype == Float16 && epos == 10 && esize == 5 && msize == 10 && bias == 15
			bf16 := a.dtype == BFloat16 && epos == 7 && esize == 8 && msize == 7 && bias == 127
			if ieee && hostLittle && (f16 || bf16) {
				a.half = true
				a.ftype = C.H5Tcopy(t)
			}
		case 4:
			a.dtype = Float32
		case 8:
			a.dtype = Float64
		default:
			return fmt.Errorf("%d-byte floats are not supported", size)
		}
	case C.H5T_INTEGER:
		signed := C.H5Tget_sign(t) == C.H5T_SGN_2
		types := map[int][2]DType{1: {Uint8, Int8}, 2: {Uint16, Int16}, 4: {Uint32, Int32}, 8: {Uint64, Int64}}
		d, ok := types[size]
		if !ok {
			return fmt.Errorf("%d-byte integers are not supported", size)
		}
		a.dtype = d[0]
		if signed {
			a.dtype = d[1]
		}
	case C.H5T_ENUM:
		if C.heed_enum_is_bool(t) == 1 {
			a.dtype, a.enum = Bool, true
			a.ftype = C.H5Tcopy(t)
			return nil
		}
		return fmt.Errorf("enum datatypes other than h5py's bool are not supported")
	case C.H5T_STRING:
		a.dtype = String
		a.cset = C.H5Tget_cset(t)
		if C.H5Tis_variable_str(t) > 0 {
			a.strVar = true
		} else {
			a.strSize = size
			if size > 1<<22 {
				return fmt.Errorf("fixed strings of %d bytes", size)
			}
			a.ftype = C.H5Tcopy(t)
		}
	default:
		return fmt.Errorf("datatype class %d is not supported (heed reads floats, integers, h5py bools and strings)", int(C.H5Tget_class(t)))
	}
	return nil
}

// readAttr reads a scalar (or one-element) string or number attribute of
// object obj as a string.
func readAttr(obj C.hid_t, name string) (string, bool, error) {
	cname := C.CString(name)
	defer C.free(unsafe.Pointer(cname))
	if C.H5Aexists(obj, cname) <= 0 {
		return "", false, nil
	}
	at := C.H5Aopen(obj, cname, C.H5P_DEFAULT)
	if at < 0 {
		return "", false, fmt.Errorf("cannot open")
	}
	defer C.H5Aclose(at)
	sp := C.H5Aget_space(at)
	if sp < 0 {
		return "", false, fmt.Errorf("no dataspace")
	}
	defer C.H5Sclose(sp)
	if C.H5Sget_simple_extent_npoints(sp) != 1 {
		return "", false, fmt.Errorf("not a single value")
	}
	t := C.H5Aget_type(at)
	if t < 0 {
		return "", false, fmt.Errorf("no datatype")
	}
	defer C.H5Tclose(t)
	switch C.H5Tget_class(t) {
	case C.H5T_STRING:
		if C.H5Tis_variable_str(t) > 0 {
			mt := C.heed_vlen_str(C.H5Tget_cset(t))
			if mt < 0 {
				return "", false, fmt.Errorf("cannot build a string type")
			}
			defer C.H5Tclose(mt)
			var p *C.char
			if C.H5Aread(at, mt, unsafe.Pointer(&p)) < 0 {
				return "", false, fmt.Errorf("cannot read")
			}
			s := ""
			if p != nil {
				s = C.GoString(p)
			}
			C.heed_reclaim(mt, sp, unsafe.Pointer(&p))
			return s, true, nil
		}
		n := int(C.H5Tget_size(t))
		if n <= 0 || n > 1<<24 {
			return "", false, fmt.Errorf("string of %d bytes", n)
		}
		buf := C.malloc(C.size_t(n))
		defer C.free(buf)
		if C.H5Aread(at, t, buf) < 0 {
			return "", false, fmt.Errorf("cannot read")
		}
		return trimNul(C.GoBytes(buf, C.int(n))), true, nil
	case C.H5T_INTEGER:
		var v C.longlong
		if C.H5Aread(at, C.heed_native_llong(), unsafe.Pointer(&v)) < 0 {
			return "", false, fmt.Errorf("cannot read")
		}
		return strconv.FormatInt(int64(v), 10), true, nil
	case C.H5T_FLOAT:
		var v C.double
		if C.H5Aread(at, C.heed_native_double(), unsafe.Pointer(&v)) < 0 {
			return "", false, fmt.Errorf("cannot read")
		}
		return strconv.FormatFloat(float64(v), 'g', -1, 64), true, nil
	}
	return "", false, fmt.Errorf("unsupported attribute type")
}

func trimNul(b []byte) string {
	if i := strings.IndexByte(string(b), 0); i >= 0 {
		b = b[:i]
	}
	return string(b)
}

func (h *h5File) Path() string         { return h.path }
func (h *h5File) Format() string       { return "hdf5" }
func (h *h5File) Arrays() []Array      { return append([]Array(nil), h.arrays...) }
func (h *h5File) Meta() (string, bool) { return h.meta, h.hasMeta }

func (h *h5File) Close() error {
	return h.life.end(func() error {
		h5enter()
		defer h5leave()
		return h.closeLocked()
	})
}

func (h *h5File) closeLocked() error {
	for _, d := range h.dsets {
		d.closeType()
		if d.ds > 0 {
			C.H5Dclose(d.ds)
			d.ds = 0
		}
	}
	h.dsets = nil
	if h.f > 0 {
		r := C.H5Fclose(h.f)
		h.f = 0
		if r < 0 {
			return fmt.Errorf("loader: %s: the HDF5 library cannot close it", h.path)
		}
	}
	return nil
}

func (a *h5Array) closeType() {
	if a.ftype > 0 {
		C.H5Tclose(a.ftype)
		a.ftype = 0
	}
}

func (a *h5Array) Name() string  { return a.name }
func (a *h5Array) File() string  { return a.file.path }
func (a *h5Array) DType() DType  { return a.dtype }
func (a *h5Array) Shape() []int  { return append([]int(nil), a.shape...) }
func (a *h5Array) label() string { return a.file.path + ": " + a.name }

// Attr returns a dataset attribute Assemble reads (kind, query, key, axes,
// window, prefix, kv_heads).
func (a *h5Array) Attr(name string) (string, bool) {
	v, ok := a.attrs[name]
	return v, ok
}

// read selects the sub-array idx with a hyperslab and reads it as memory
// type mem into buf, which holds n elements.
func (a *h5Array) read(idx []int, n int, mem C.hid_t, buf unsafe.Pointer) error {
	if err := a.file.life.enter(); err != nil {
		return err
	}
	defer a.file.life.leave()
	h5enter()
	defer h5leave()
	return a.readLocked(idx, n, mem, buf)
}

func (a *h5Array) readLocked(idx []int, n int, mem C.hid_t, buf unsafe.Pointer) error {
	if n == 0 {
		return nil
	}
	var off, cnt [maxRank]C.hsize_t
	for i := range a.shape {
		cnt[i] = C.hsize_t(a.shape[i])
		if i < len(idx) {
			off[i], cnt[i] = C.hsize_t(idx[i]), 1
		}
	}
	if C.heed_read_sub(a.ds, C.int(len(a.shape)), &off[0], &cnt[0], C.hsize_t(n), mem, buf) < 0 {
		return &FormatError{File: a.file.path, Array: a.name, Offset: -1, Msg: "the HDF5 library cannot read the data (corrupt file or unsupported filter?)"}
	}
	return nil
}

// readEnumInto reads n values of an enum (bool) sub-array, stored as one
// byte each, into dst.
func readEnumInto[T float32 | int64](a *h5Array, idx []int, n int, dst []T) error {
	buf := make([]byte, max(n, 1))
	if err := a.read(idx, n, a.ftype, unsafe.Pointer(&buf[0])); err != nil {
		return err
	}
	for i, v := range buf[:n] {
		dst[i] = T(v)
	}
	return nil
}

func (a *h5Array) ReadFloat32(idx []int, dst []float32) error {
	if a.dtype == String {
		return fmt.Errorf("loader: %s: a string array has no numeric values", a.label())
	}
	n, err := checkSub(a.label(), a.shape, idx, len(dst))
	if err != nil || n == 0 {
		return err
	}
	if a.enum {
		return readEnumInto(a, idx, n, dst)
	}
	if a.half {
		// The n 2-byte values land in the first half of dst's bytes and are
		// widened from the last to the first: dst[i] overwrites raw values
		// 2i and 2i+1, which are already read (or, for i = 0, read first).
		if err := a.read(idx, n, a.ftype, unsafe.Pointer(&dst[0])); err != nil {
			return err
		}
		raw := unsafe.Slice((*uint16)(unsafe.Pointer(&dst[0])), n)
		if a.dtype == Float16 {
			t := f16ToF32()
			for i := n - 1; i >= 0; i-- {
				dst[i] = t[raw[i]]
			}
		} else {
			for i := n - 1; i >= 0; i-- {
				dst[i] = bf16ToF32(raw[i])
			}
		}
		return nil
	}
	return a.read(idx, n, C.heed_native_float(), unsafe.Pointer(&dst[0]))
}

func (a *h5Array) ReadInt64(idx []int, dst []int64) error {
	if !a.dtype.IsInt() {
		return fmt.Errorf("loader: %s: %s array read as integers", a.label(), a.dtype)
	}
	n, err := checkSub(a.label(), a.shape, idx, len(dst))
	if err != nil || n == 0 {
		return err
	}
	if a.enum {
		return readEnumInto(a, idx, n, dst)
	}
	mem := C.heed_native_llong()
	if a.dtype == Uint64 {
		// Read u64 as u64 and reinterpret: values above 2^63-1 wrap, as
		// numpy's astype(int64) and heed's NPY reader do (HDF5's own
		// conversion to a signed type would saturate instead).
		mem = C.heed_native_ullong()
	}
	return a.read(idx, n, mem, unsafe.Pointer(&dst[0]))
}

func (a *h5Array) ReadStrings() ([]string, error) {
	if a.dtype != String {
		return nil, fmt.Errorf("loader: %s: %s array read as strings", a.label(), a.dtype)
	}
	n := prod(a.shape)
	out := make([]string, n)
	if n == 0 {
		return out, nil
	}
	if a.strVar {
		if err := a.file.life.enter(); err != nil {
			return nil, err
		}
		defer a.file.life.leave()
		h5enter()
		defer h5leave()
		mt := C.heed_vlen_str(a.cset)
		if mt < 0 {
			return nil, fmt.Errorf("loader: %s: cannot build a string type", a.label())
		}
		defer C.H5Tclose(mt)
		mem := C.calloc(C.size_t(n), C.size_t(unsafe.Sizeof(uintptr(0))))
		if mem == nil {
			return nil, fmt.Errorf("loader: %s: out of memory", a.label())
		}
		defer C.free(mem)
		ptrs := unsafe.Slice((**C.char)(mem), n)
		if err := a.readLocked(nil, n, mt, mem); err != nil {
			return nil, err
		}
		for i, p := range ptrs {
			if p != nil {
				out[i] = C.GoString(p)
			}
		}
		C.heed_reclaim_n(mt, C.hsize_t(n), mem)
		return out, nil
	}
	if a.strSize == 0 {
		return out, nil
	}
	if int64(n)*int64(a.strSize) > 1<<31 {
		return nil, fmt.Errorf("loader: %s: %d strings of %d bytes is too much to read", a.label(), n, a.strSize)
	}
	buf := make([]byte, n*a.strSize)
	if err := a.read(nil, n, a.ftype, unsafe.Pointer(&buf[0])); err != nil {
		return nil, err
	}
	for i := range out {
		out[i] = trimNul(buf[i*a.strSize : (i+1)*a.strSize])
	}
	return out, nil
}
