package analysis

import (
	"encoding/binary"
	"math"
	"sync"
	"unsafe"

	"github.com/heed-dev/heed/loader"
)

// The pass over a float16 or bfloat16 head straight from its stored 16-bit
// patterns (loader.Block.ReadRaw16), without converting the matrix to
// float32 first. Every value goes through 65,536-entry tables built from
// the very float32 the loader's conversion gives and from xlogx of it, and
// the loops below are those of rowpass.go with the same operations in the
// same key order, so every sum is the same to the last bit as on the
// float32 path (rawpass_test.go checks this on random heads with NaN, Inf,
// negative zero and subnormals). A forbidden run is checked for mass as
// integers: a pattern other than +0 or -0 is a nonzero value.

// raw16Reader is implemented by *loader.Block.
type raw16Reader interface {
	ReadRaw16(layer, batch, head int, dst []uint16) (loader.DType, error)
}

// rawTables are the tables of one 16-bit dtype.
type rawTables struct {
	val *[65536]float32 // the float32 value of a pattern
	xl  *[65536]float64 // xlogx(value) for positive finite values, else 0
	exp uint16          // the exponent bits: all set = Inf or NaN
}

var (
	rawOnce         [2]sync.Once
	rawF16, rawBF16 rawTables
)

func rawTablesFor(d loader.DType) *rawTables {
	initXlogx()
	if d == loader.BFloat16 {
		rawOnce[1].Do(func() {
			v := new([65536]float32)
			for i := range v {
				v[i] = math.Float32frombits(uint32(i) << 16)
			}
			rawBF16 = rawTables{val: v, xl: xlTable(v, 0x7f80), exp: 0x7f80}
		})
		return &rawBF16
	}
	rawOnce[0].Do(func() {
		v := loader.F16ToF32Table()
		rawF16 = rawTables{val: v, xl: xlTable(v, 0x7c00), exp: 0x7c00}
	})
	return &rawF16
}

func xlTable(v *[65536]float32, exp uint16) *[65536]float64 {
	t := new([65536]float64)
	for i := range t {
		if x := v[i]; x > 0 && uint16(i)&exp != exp {
			t[i] = xlogx(x)
		}
	}
	return t
}

// finite16 is finite32 on patterns: the first non-finite key, or -1, true.
// Four patterns at a time (the pattern path runs on little-endian hosts only): a lane whose exponent bits are all set carries
// into its top bit when the exponent's lowest bit is added.
func finite16(row []uint16, exp uint16) (int, bool) {
	e := uint64(exp) * 0x0001000100010001
	low := uint64(exp&-exp) * 0x0001000100010001
	n := len(row) &^ 3
	start := n
	if n > 0 {
		bs := unsafe.Slice((*byte)(unsafe.Pointer(&row[0])), 2*n)
		for i := 0; i+8 <= len(bs); i += 8 {
			if ((binary.LittleEndian.Uint64(bs[i:])&e)+low)&0x8000800080008000 != 0 {
				start = i / 2
				break
			}
		}
	}
	for k := start; k < len(row); k++ {
		if row[k]&exp == exp {
			return k, false
		}
	}
	return -1, true
}

// allZero16 reports whether every pattern of xs is +0 or -0.
func allZero16(xs []uint16) bool {
	n := len(xs) &^ 3
	if n > 0 {
		bs := unsafe.Slice((*byte)(unsafe.Pointer(&xs[0])), 2*n)
		for i := 0; i+8 <= len(bs); i += 8 {
			if binary.LittleEndian.Uint64(bs[i:])&0x7fff7fff7fff7fff != 0 {
				return false
			}
		}
	}
	for _, x := range xs[n:] {
		if x&0x7fff != 0 {
			return false
		}
	}
	return true
}

// cells16 is cells (rowpass.go) over a row of patterns.
func (w *worker) cells16(ra *rowAcc, t *rawTables, row []uint16, q, p, base int, tol float64, example string) {
	rr := w.rr[:len(row)]
	for a := 0; a < len(row); {
		r := rr[a]
		b := a + 1
		for b < len(row) && rr[b] == r {
			b++
		}
		switch {
		case r == RuleNone:
			w.allowedRun16(ra, t, row, a, b, p)
		case allZero16(row[a:b]):
			w.u.leak[r].forb += int64(b - a)
			if x := float64(t.val[row[a]]); x > ra.mx {
				ra.mx = x
			}
		default:
			w.forbiddenRun16(ra, t, row, a, b, q, p, base, r, tol, example)
		}
		a = b
	}
}

// allowedRun16 is allowedRun over patterns: x == 0 is a pattern of +0 or
// -0, x > 0 a nonzero one without the sign bit (the row is finite).
func (w *worker) allowedRun16(ra *rowAcc, t *rawTables, row []uint16, a, b, p int) {
	s, ent, dist, amass, negm, mx := ra.s, ra.ent, ra.dist, ra.amass, ra.negm, ra.mx
	nzLo, nzHi := ra.nzLo, ra.nzHi
	var zeros, neg int64
	val, xl := t.val, t.xl
	run := row[a:b]
	for i, h := range run {
		x := float64(val[h])
		if x > mx {
			mx = x
		}
		amass += x
		if h&0x7fff == 0 {
			zeros++
			continue
		}
		k := a + i
		if nzLo < 0 {
			nzLo = k
		}
		nzHi = k
		s += x
		d := k - p
		if d < 0 {
			d = -d
		}
		dist += x * float64(d)
		if h&0x8000 == 0 {
			ent -= xl[h]
		} else {
			neg++
			negm -= x
		}
	}
	ra.s, ra.ent, ra.dist, ra.amass, ra.negm, ra.mx = s, ent, dist, amass, negm, mx
	ra.nzLo, ra.nzHi = nzLo, nzHi
	ra.nAllow += int64(b - a)
	ra.zeros += zeros
	ra.neg += neg
}

// forbiddenRun16 is forbiddenRun over patterns.
func (w *worker) forbiddenRun16(ra *rowAcc, t *rawTables, row []uint16, a, b, q, p, base int, r Rule, tol float64, example string) {
	lu := &w.u.leak[r]
	hs := w.hist[r]
	for k := a; k < b; k++ {
		h := row[k]
		x := float64(t.val[h])
		if x > ra.mx {
			ra.mx = x
		}
		if h&0x7fff != 0 {
			if ra.nzLo < 0 {
				ra.nzLo = k
			}
			ra.nzHi = k
			ra.s += x
			d := k - p
			if d < 0 {
				d = -d
			}
			ra.dist += x * float64(d)
			if h&0x8000 == 0 {
				ra.ent -= t.xl[h]
			} else {
				ra.neg++
				ra.negm -= x
			}
		}
		lu.forb++
		if x > tol {
			lu.cells++
			lu.mass += x
			ra.hit[r] = true
			if !lu.worst.Set || x > lu.worst.Value {
				lu.worst = Cell{Set: true, Example: example, Query: q, Key: k, Value: x}
			}
			if hs != nil {
				i := k - p + base
				hs[i]++
				w.lo[r] = min(w.lo[r], i)
				w.hi[r] = max(w.hi[r], i)
			}
		}
	}
}

// readRaw16 reads head (l, b, h) as patterns into w.r16 when rd can and the
// pass needs no float32 matrix (gradients are read as float32), and returns
// the tables to read them with; nil = use ReadAttn.
func (w *worker) readRaw16(rd reader, cfg passConfig, l, b, h int) (*rawTables, error) {
	rr, ok := rd.(raw16Reader)
	if !ok || cfg.grad || noRaw16 {
		return nil, nil
	}
	if len(w.r16) != len(w.a) {
		w.r16 = make([]uint16, len(w.a))
	}
	d, err := rr.ReadRaw16(l, b, h, w.r16)
	if err != nil || d == loader.Invalid {
		return nil, err
	}
	return rawTablesFor(d), nil
}

// noRaw16 turns the pattern path off (tests compare both paths).
var noRaw16 bool
