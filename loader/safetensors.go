package loader

import (
	"bytes"
	"encoding/binary"
	"encoding/json"
	"fmt"

	"math"
	"sort"
)

// safetensors, as its README and format documentation specify: an unsigned
// 64-bit little-endian header size N, N bytes of UTF-8 JSON (padded with
// spaces to a multiple of 8), then the data. The JSON maps tensor names to
// {"dtype", "shape", "data_offsets": [begin, end)} with offsets relative to
// the start of the data, plus an optional "__metadata__" string map. Data is
// little-endian and C order. The checks below are the ones the reference
// implementation makes: N <= 100,000,000, offsets contiguous from 0 without
// gaps or overlaps, end-begin = prod(shape) * itemsize, and the last end
// reaching exactly the end of the file; all of them before any allocation.

const maxSafetensorsHeader = 100_000_000

var stDTypes = map[string]DType{
	"BOOL": Bool, "U8": Uint8, "I8": Int8, "I16": Int16, "U16": Uint16, "I32": Int32, "U32": Uint32,
	"I64": Int64, "U64": Uint64, "F16": Float16, "BF16": BFloat16, "F32": Float32, "F64": Float64,
}

type stEntry struct {
	Dtype       string   `json:"dtype"`
	Shape       []int64  `json:"shape"`
	DataOffsets []uint64 `json:"data_offsets"`
}

type stFile struct {
	mf      *mappedFile
	arrays  []Array
	meta    string
	hasMeta bool
	// Metadata is the whole __metadata__ map.
	metadata map[string]string
}

func openSafetensors(path string) (Container, error) {
	mf, err := mapFile(path)
	if err != nil {
		return nil, err
	}
	return newSafetensors(path, mf)
}

func newSafetensors(path string, mf *mappedFile) (*stFile, error) {
	s := &stFile{mf: mf}
	if err := s.parse(path, mf.bytes()); err != nil {
		mf.close()
		return nil, err
	}
	return s, nil
}

// parseSafetensorsHeader validates the header of a safetensors file of the
// given bytes and returns its entries sorted by offset and its metadata.
func parseSafetensorsHeader(path string, b []byte) ([]string, map[string]stEntry, map[string]string, int64, error) {
	ferr := func(arr string, off int64, format string, a ...any) error {
		return &FormatError{File: path, Array: arr, Offset: off, Msg: fmt.Sprintf(format, a...)}
	}
	size := int64(len(b))
	if size < 8 {
		return nil, nil, nil, 0, ferr("", -1, "truncated: %d bytes, a safetensors file starts with an 8-byte header length", size)
	}
	n := binary.LittleEndian.Uint64(b)
	if n > maxSafetensorsHeader {
		return nil, nil, nil, 0, ferr("", 0, "header length %d exceeds the safetensors limit of %d bytes", n, maxSafetensorsHeader)
	}
	if int64(n) > size-8 {
		return nil, nil, nil, 0, ferr("", 0, "header length %d but only %d bytes follow (truncated file?)", n, size-8)
	}
	hdr := b[8 : 8+n]
	if len(bytes.TrimLeft(hdr, " ")) == 0 || bytes.TrimLeft(hdr, " ")[0] != '{' {
		return nil, nil, nil, 0, ferr("", 8, "header is not a JSON object")
	}
	dec := json.NewDecoder(bytes.NewReader(hdr))
	if t, err := dec.Token(); err != nil || t != json.Delim('{') {
		return nil, nil, nil, 0, ferr("", 8, "header is not a JSON object")
	}
	entries := map[string]stEntry{}
	var names []string
	var meta map[string]string
	for dec.More() {
		t, err := dec.Token()
		if err != nil {
			return nil, nil, nil, 0, ferr("", 8+dec.InputOffset(), "bad header JSON: %v", err)
		}
		key, _ := t.(string)
		if key == "__metadata__" {
			if meta != nil {
				return nil, nil, nil, 0, ferr("", 8+dec.InputOffset(), "__metadata__ given twice")
			}
			if err := dec.Decode(&meta); err != nil {
				return nil, nil, nil, 0, ferr("__metadata__", 8+dec.InputOffset(), "__metadata__ must map strings to strings: %v", err)
			}
			if meta == nil {
				meta = map[string]string{}
			}
			continue
		}
		if _, dup := entries[key]; dup {
			return nil, nil, nil, 0, ferr(key, 8+dec.InputOffset(), "tensor named twice in the header")
		}
		var e stEntry
		if err := dec.Decode(&e); err != nil {
			return nil, nil, nil, 0, ferr(key, 8+dec.InputOffset(), "bad tensor entry: %v", err)
		}
		entries[key] = e
		names = append(names, key)
	}
	if _, err := dec.Token(); err != nil {
		return nil, nil, nil, 0, ferr("", 8+dec.InputOffset(), "bad header JSON: %v", err)
	}
	if rest := bytes.TrimSpace(hdr[dec.InputOffset():]); len(rest) > 0 {
		return nil, nil, nil, 0, ferr("", 8+dec.InputOffset(), "trailing bytes after the header JSON")
	}
	dataStart := 8 + int64(n)
	dataLen := uint64(size - dataStart)
	sort.Slice(names, func(i, j int) bool {
		oi, oj := entries[names[i]].DataOffsets, entries[names[j]].DataOffsets
		if len(oi) != 2 || len(oj) != 2 {
			return len(oi) < len(oj)
		}
		if oi[0] != oj[0] {
			return oi[0] < oj[0]
		}
		return oi[1] < oj[1]
	})
	var end uint64
	for _, name := range names {
		e := entries[name]
		dt, ok := stDTypes[e.Dtype]
		if !ok {
			return nil, nil, nil, 0, ferr(name, -1, "unknown or unsupported dtype %s (heed reads BOOL, U8..U64, I8..I64, F16, BF16, F32, F64)", q(e.Dtype))
		}
		if len(e.DataOffsets) != 2 {
			return nil, nil, nil, 0, ferr(name, -1, "data_offsets must be [begin, end]")
		}
		if len(e.Shape) > maxRank {
			return nil, nil, nil, 0, ferr(name, -1, "more than %d dimensions", maxRank)
		}
		shape := make([]int, len(e.Shape))
		for i, d := range e.Shape {
			if d < 0 || d > math.MaxInt32*int64(1<<20) {
				return nil, nil, nil, 0, ferr(name, -1, "bad dimension %d in shape %v", d, e.Shape)
			}
			shape[i] = int(d)
		}
		begin, stop := e.DataOffsets[0], e.DataOffsets[1]
		if begin != end {
			if begin < end {
				return nil, nil, nil, 0, ferr(name, -1, "data_offsets [%d, %d) overlap the previous tensor, which ends at %d", begin, stop, end)
			}
			return nil, nil, nil, 0, ferr(name, -1, "gap before data_offsets [%d, %d): the previous tensor ends at %d", begin, stop, end)
		}
		if stop < begin {
			return nil, nil, nil, 0, ferr(name, -1, "data_offsets [%d, %d) end before they begin", begin, stop)
		}
		if stop > dataLen {
			return nil, nil, nil, 0, ferr(name, -1, "data_offsets [%d, %d) run past the end of the data (%d bytes; truncated file?)", begin, stop, dataLen)
		}
		nb, err := checkDataSize(shape, itemSize(dt), math.MaxInt64, hasFile)
		if err != nil {
			return nil, nil, nil, 0, ferr(name, -1, "%v", err)
		}
		if uint64(nb) != stop-begin {
			return nil, nil, nil, 0, ferr(name, -1, "shape %v of %s needs %d bytes, data_offsets give %d", shape, e.Dtype, nb, stop-begin)
		}
		end = stop
	}
	if end != dataLen {
		return nil, nil, nil, 0, ferr("", dataStart+int64(end), "%d bytes after the last tensor: the header does not describe the whole file", dataLen-end)
	}
	return names, entries, meta, dataStart, nil
}

func (s *stFile) parse(path string, b []byte) error {
	names, entries, meta, dataStart, err := parseSafetensorsHeader(path, b)
	if err != nil {
		return err
	}
	for _, name := range names {
		e := entries[name]
		dt := stDTypes[e.Dtype]
		shape := make([]int, len(e.Shape))
		for i, d := range e.Shape {
			shape[i] = int(d)
		}
		data := b[dataStart+int64(e.DataOffsets[0]) : dataStart+int64(e.DataOffsets[1])]
		s.arrays = append(s.arrays, &rawArray{name: name, file: path, dtype: dt, shape: shape,
			elem: itemSize(dt), life: &s.mf.life, data: func() ([]byte, error) { return data, nil }, src: s.mf})
	}
	sortedArrays(s.arrays)
	s.metadata = meta
	if m, ok := meta["meta"]; ok {
		s.meta, s.hasMeta = m, true
	}
	return nil
}

func (s *stFile) Path() string         { return s.mf.path }
func (s *stFile) Format() string       { return "safetensors" }
func (s *stFile) Arrays() []Array      { return append([]Array(nil), s.arrays...) }
func (s *stFile) Meta() (string, bool) { return s.meta, s.hasMeta }
func (s *stFile) Close() error         { return s.mf.close() }
