package loader

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"io"
	"strconv"
	"strings"
	"unicode/utf8"
)

// NPY, as numpy's format module documents it (numpy/lib/format.py docstring;
// NEP 1): the magic "\x93NUMPY", a major and minor version byte, the header
// length (u16 LE in version 1.0, u32 LE in 2.0 and 3.0), then the header: a
// Python dict literal with 'descr', 'fortran_order' and 'shape', padded with
// spaces and a newline so that the data starts at a multiple of 64 (16 before
// numpy 1.9). Version 3.0 only changes the header's encoding to UTF-8.

const npyMagic = "\x93NUMPY"

// maxNPYHeader bounds the header text heed parses. numpy itself refuses
// headers over 10000 bytes unless told otherwise (max_header_size); heed
// accepts up to 1 MiB so unusual but honest files still open.
const maxNPYHeader = 1 << 20

// npyHeader is the parsed header of an NPY file or NPZ member.
type npyHeader struct {
	dtype   DType
	big     bool
	fortran bool
	shape   []int
	strKind byte
	elem    int
	// dataOff is the offset of the data from the start of the NPY bytes.
	dataOff int64
	nbytes  int64
}

// readNPYHeader parses the header from r. avail is the number of bytes of
// the whole NPY stream (used to check the claimed shape before anything is
// allocated for it) and has says where that number comes from in an error
// ("the file has %d bytes", "the member declares %d bytes uncompressed");
// file and name go into errors.
func readNPYHeader(r io.Reader, avail int64, has, file, name string) (*npyHeader, error) {
	ferr := func(off int64, format string, a ...any) error {
		return &FormatError{File: file, Array: name, Offset: off, Msg: fmt.Sprintf(format, a...)}
	}
	var pre [8]byte
	n, _ := io.ReadFull(r, pre[:])
	if !strings.HasPrefix(string(pre[:n]), npyMagic) && !strings.HasPrefix(npyMagic, string(pre[:n])) || n == 0 {
		return nil, ferr(0, "not an NPY file (no \\x93NUMPY magic)")
	}
	if n < len(pre) {
		return nil, ferr(int64(n), "truncated NPY header")
	}
	if string(pre[:6]) != npyMagic {
		return nil, ferr(0, "not an NPY file (no \\x93NUMPY magic)")
	}
	major, minor := pre[6], pre[7]
	var hlen int64
	off := int64(8)
	switch major {
	case 1:
		var b [2]byte
		if _, err := io.ReadFull(r, b[:]); err != nil {
			return nil, ferr(off, "truncated NPY header")
		}
		hlen = int64(binary.LittleEndian.Uint16(b[:]))
		off += 2
	case 2, 3:
		var b [4]byte
		if _, err := io.ReadFull(r, b[:]); err != nil {
			return nil, ferr(off, "truncated NPY header")
		}
		hlen = int64(binary.LittleEndian.Uint32(b[:]))
		off += 4
	default:
		return nil, ferr(6, "unsupported NPY version %d.%d (heed reads 1.0, 2.0 and 3.0)", major, minor)
	}
	if hlen > maxNPYHeader {
		return nil, ferr(off-4, "NPY header length %d exceeds heed's limit of %d bytes", hlen, maxNPYHeader)
	}
	if off+hlen > avail {
		return nil, ferr(off, "truncated NPY header: it claims %d bytes, %s", hlen, fmt.Sprintf(has, avail-off))
	}
	text := make([]byte, hlen)
	if _, err := io.ReadFull(r, text); err != nil {
		return nil, ferr(off, "truncated NPY header")
	}
	h, err := parseNPYDict(string(text))
	if err != nil {
		return nil, ferr(off, "bad NPY header %s: %v", quoteClip(string(text), headerQuote), err)
	}
	h.dataOff = off + hlen
	nb, err := checkDataSize(h.shape, h.elem, avail-h.dataOff, has)
	if err != nil {
		return nil, ferr(h.dataOff, "header lies about the data: %v", err)
	}
	h.nbytes = nb
	return h, nil
}

// A header can be 1 MiB of anything: errors quote at most headerQuote
// characters of it, and at most partQuote of the key, type string or number
// that is wrong.
const (
	headerQuote = 60
	partQuote   = 40
)

// quoteClip quotes s (Go syntax) cut after its first n characters (runes),
// with "…" after the closing quote when something was cut; trailing padding
// (spaces, the newline) is dropped first.
func quoteClip(s string, n int) string {
	s = strings.TrimRight(s, " \n")
	i, k := 0, 0
	for i < len(s) && k < n {
		_, w := utf8.DecodeRuneInString(s[i:])
		i += w
		k++
	}
	if i < len(s) {
		return strconv.Quote(s[:i]) + "…"
	}
	return strconv.Quote(s)
}

// q quotes a part of a header for an error (quoteClip, partQuote).
func q(s string) string { return quoteClip(s, partQuote) }

// parseNPYDict parses the header dict literal, e.g.
// {'descr': '<f4', 'fortran_order': False, 'shape': (3, 4), }
func parseNPYDict(s string) (*npyHeader, error) {
	p := &pyLit{s: s}
	p.ws()
	if !p.eat('{') {
		return nil, fmt.Errorf("expected '{'")
	}
	var (
		descr             string
		fortran           bool
		shape             []int
		gotD, gotF, gotSh bool
	)
	for {
		p.ws()
		if p.eat('}') {
			break
		}
		key, err := p.str()
		if err != nil {
			return nil, err
		}
		p.ws()
		if !p.eat(':') {
			return nil, fmt.Errorf("expected ':' after %s", q(key))
		}
		p.ws()
		switch key {
		case "descr":
			if p.peek() == '[' {
				return nil, fmt.Errorf("structured (record) dtypes are not supported")
			}
			descr, err = p.str()
			gotD = true
		case "fortran_order":
			fortran, err = p.boolean()
			gotF = true
		case "shape":
			shape, err = p.tuple()
			gotSh = true
		default:
			return nil, fmt.Errorf("unexpected key %s", q(key))
		}
		if err != nil {
			return nil, fmt.Errorf("%s: %v", key, err)
		}
		p.ws()
		if p.eat(',') {
			continue
		}
		p.ws()
		if !p.eat('}') {
			return nil, fmt.Errorf("expected ',' or '}'")
		}
		break
	}
	if !gotD || !gotF || !gotSh {
		return nil, fmt.Errorf("missing 'descr', 'fortran_order' or 'shape'")
	}
	h := &npyHeader{fortran: fortran, shape: shape}
	if err := parseDescr(descr, h); err != nil {
		return nil, err
	}
	return h, nil
}

// parseDescr fills dtype, byte order and element size from a numpy type string.
func parseDescr(d string, h *npyHeader) error {
	orig := d
	if d == "" {
		return fmt.Errorf("empty descr")
	}
	switch d[0] {
	case '<', '|':
		d = d[1:]
		h.big = false
	case '=':
		d = d[1:]
		h.big = !hostLittle
	case '>':
		d = d[1:]
		h.big = true
	}
	if d == "" {
		return fmt.Errorf("bad descr %s", q(orig))
	}
	kind := d[0]
	size := 0
	if len(d) > 1 {
		n, err := strconv.Atoi(d[1:])
		if err != nil || n < 0 {
			return fmt.Errorf("unknown dtype %s", q(orig))
		}
		size = n
	}
	switch kind {
	case 'O':
		return fmt.Errorf("dtype %s is an object array (a pickle), which heed never loads; save tokens as strings instead, e.g. np.save(path, np.asarray(tokens, dtype=str))", q(orig))
	case 'b', '?':
		if size != 1 && !(kind == '?' && size == 0) {
			return fmt.Errorf("unknown dtype %s", q(orig))
		}
		h.dtype, h.elem = Bool, 1
	case 'i', 'u':
		types := map[int][2]DType{1: {Int8, Uint8}, 2: {Int16, Uint16}, 4: {Int32, Uint32}, 8: {Int64, Uint64}}
		t, ok := types[size]
		if !ok {
			return fmt.Errorf("unknown dtype %s", q(orig))
		}
		h.dtype, h.elem = t[0], size
		if kind == 'u' {
			h.dtype = t[1]
		}
	case 'f':
		switch size {
		case 2:
			h.dtype = Float16
		case 4:
			h.dtype = Float32
		case 8:
			h.dtype = Float64
		default:
			return fmt.Errorf("dtype %s (float of %d bytes) is not supported: save as float32", q(orig), size)
		}
		h.elem = size
	case 'U':
		h.dtype, h.strKind, h.elem = String, 'U', 4*size
		if size > 1<<20 {
			return fmt.Errorf("dtype %s: strings of over 2^20 characters", q(orig))
		}
	case 'S', 'a':
		h.dtype, h.strKind, h.elem = String, 'S', size
		if size > 1<<22 {
			return fmt.Errorf("dtype %s: strings of over 2^22 bytes", q(orig))
		}
	case 'c':
		return fmt.Errorf("dtype %s (complex) is not supported", q(orig))
	case 'V':
		return fmt.Errorf("dtype %s (raw void) is not supported", q(orig))
	case 'M', 'm':
		return fmt.Errorf("dtype %s (date/time) is not supported", q(orig))
	default:
		return fmt.Errorf("unknown dtype %s", q(orig))
	}
	return nil
}

// pyLit is a tiny scanner for the Python literals NPY headers contain.
type pyLit struct {
	s string
	i int
}

func (p *pyLit) peek() byte {
	if p.i < len(p.s) {
		return p.s[p.i]
	}
	return 0
}

func (p *pyLit) ws() {
	for p.i < len(p.s) && (p.s[p.i] == ' ' || p.s[p.i] == '\t' || p.s[p.i] == '\n' || p.s[p.i] == '\r') {
		p.i++
	}
}

func (p *pyLit) eat(c byte) bool {
	if p.peek() == c {
		p.i++
		return true
	}
	return false
}

func (p *pyLit) str() (string, error) {
	q := p.peek()
	if q != '\'' && q != '"' {
		return "", fmt.Errorf("expected a string at offset %d", p.i)
	}
	p.i++
	start := p.i
	for p.i < len(p.s) && p.s[p.i] != q {
		if p.s[p.i] == '\\' {
			return "", fmt.Errorf("escapes in strings are not supported")
		}
		p.i++
	}
	if p.i >= len(p.s) {
		return "", fmt.Errorf("unterminated string")
	}
	v := p.s[start:p.i]
	p.i++
	return v, nil
}

func (p *pyLit) boolean() (bool, error) {
	switch {
	case strings.HasPrefix(p.s[p.i:], "True"):
		p.i += 4
		return true, nil
	case strings.HasPrefix(p.s[p.i:], "False"):
		p.i += 5
		return false, nil
	}
	return false, fmt.Errorf("expected True or False")
}

// maxRank matches numpy's NPY_MAXDIMS of recent versions.
const maxRank = 64

func (p *pyLit) tuple() ([]int, error) {
	if !p.eat('(') {
		return nil, fmt.Errorf("expected '('")
	}
	shape := []int{}
	for {
		p.ws()
		if p.eat(')') {
			return shape, nil
		}
		start := p.i
		for p.i < len(p.s) && p.s[p.i] >= '0' && p.s[p.i] <= '9' {
			p.i++
		}
		if p.i == start {
			return nil, fmt.Errorf("expected a non-negative integer")
		}
		n, err := strconv.ParseInt(p.s[start:p.i], 10, 64)
		if err != nil || n > 1<<50 {
			return nil, fmt.Errorf("dimension %s too large", q(p.s[start:p.i]))
		}
		p.eat('L') // Python 2 long suffix, written by old numpy versions
		shape = append(shape, int(n))
		if len(shape) > maxRank {
			return nil, fmt.Errorf("more than %d dimensions", maxRank)
		}
		p.ws()
		if p.eat(',') {
			continue
		}
		p.ws()
		if !p.eat(')') {
			return nil, fmt.Errorf("expected ',' or ')'")
		}
		return shape, nil
	}
}

// npyArray builds the array of an NPY stream whose bytes are b (the whole
// stream, mapped or in memory); has is readNPYHeader's.
func npyArray(b []byte, has, file, name string, life *lifetime) (*rawArray, error) {
	h, err := readNPYHeader(bytes.NewReader(b), int64(len(b)), has, file, name)
	if err != nil {
		return nil, err
	}
	data := b[h.dataOff : h.dataOff+h.nbytes]
	return h.array(file, name, life, func() ([]byte, error) { return data, nil }), nil
}

func (h *npyHeader) array(file, name string, life *lifetime, data func() ([]byte, error)) *rawArray {
	return &rawArray{
		name: name, file: file, dtype: h.dtype, shape: h.shape, big: h.big,
		fortran: h.fortran, strKind: h.strKind, elem: h.elem, life: life, data: data,
	}
}
