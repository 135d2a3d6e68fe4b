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
	ViewRaw16(layer, batch, head int) ([]uint16, loader.DType, func(), error)
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

// finite16 is finite32 on patterns: the first non-finite key, or -1, true,
// and whether the row holds a negative nonzero value. Four patterns at a
// time (the pattern path runs on little-endian hosts only): a lane whose
// exponent bits are all set carries into its top bit when the exponent's
// lowest bit is added; a lane whose magnitude is nonzero carries into its
// top bit when 0x7fff is added to the magnitude, and it is negative when
// its sign bit is set too.
func finite16(row []uint16, exp uint16) (int, bool, bool) {
	e := uint64(exp) * 0x0001000100010001
	low := uint64(exp&-exp) * 0x0001000100010001
	const mag, top = 0x7fff7fff7fff7fff, 0x8000800080008000
	n := len(row) &^ 7
	var bad, neg uint64
	if n > 0 {
		// eight patterns a step, the flags gathered over the row and looked
		// at once at its end (a non-finite row is rare)
		bs := unsafe.Slice((*byte)(unsafe.Pointer(&row[0])), 2*n)
		for i := 0; i+16 <= len(bs); i += 16 {
			v, u := binary.LittleEndian.Uint64(bs[i:]), binary.LittleEndian.Uint64(bs[i+8:])
			bad |= ((v & e) + low) | ((u & e) + low)
			neg |= ((v&mag)+mag)&v | ((u&mag)+mag)&u
		}
	}
	start := n
	if bad&top != 0 {
		start = 0
	}
	for k := start; k < len(row); k++ {
		if row[k]&exp == exp {
			return k, false, false
		}
		if row[k]&0x7fff != 0 && row[k]&0x8000 != 0 {
			neg = top
		}
	}
	return -1, true, neg&top != 0
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
func (w *worker) cells16(ra *rowAcc, t *rawTables, row []uint16, ends []int32, rules []Rule, q, p, base int, tol float64, example string) {
	a := 0
	for i, e := range ends {
		b, r := int(e), rules[i]
		switch {
		case r == RuleNone && !ra.negRow:
			allowedFast16(ra, t, row, a, b, p, w.stats)
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

// allowedFast16 is allowedFast (rowpass.go) over patterns.
func allowedFast16(ra *rowAcc, t *rawTables, row []uint16, a, b, p int, stats bool) {
	var rs runSums
	switch {
	case !stats:
		rs.sum16(t, row[a:b])
	default:
		if a < p {
			rs.add16(t, row[a:min(b, p)], float64(p-a), -1)
		}
		if b > p {
			a0 := max(a, p)
			rs.add16(t, row[a0:b], float64(a0-p), 1)
		}
	}
	lo, hi := -1, -1
	for k := a; k < b; k++ {
		if row[k]&0x7fff != 0 {
			lo = k
			break
		}
	}
	if lo >= 0 {
		for k := b - 1; k >= lo; k-- {
			if row[k]&0x7fff != 0 {
				hi = k
				break
			}
		}
	}
	ra.addRun(&rs, float64(t.val[rs.mx16]), int64(b-a), lo, hi)
}

// add16 adds the sums of an allowed run of patterns without negative
// values, whose keys lie at distances d, d+step, ... from the query.
func (rs *runSums) add16(t *rawTables, run []uint16, d, step float64) {
	val, xl := t.val, t.xl
	var s0, s1, s2, s3, e0, e1, e2, e3, t0, t1, t2, t3 float64
	var m0, m1, m2, m3 uint16
	var nz int64
	n := len(run) &^ 3
	for i := 0; i < n; i += 4 {
		h0, h1, h2, h3 := run[i], run[i+1], run[i+2], run[i+3]
		x0, x1, x2, x3 := float64(val[h0]), float64(val[h1]), float64(val[h2]), float64(val[h3])
		s0 += x0
		s1 += x1
		s2 += x2
		s3 += x3
		e0 += xl[h0]
		e1 += xl[h1]
		e2 += xl[h2]
		e3 += xl[h3]
		t0 += x0 * d
		t1 += x1 * (d + step)
		t2 += x2 * (d + 2*step)
		t3 += x3 * (d + 3*step)
		d += 4 * step
		h0, h1, h2, h3 = h0&0x7fff, h1&0x7fff, h2&0x7fff, h3&0x7fff
		m0, m1, m2, m3 = max(m0, h0), max(m1, h1), max(m2, h2), max(m3, h3)
		nz += int64((uint32(h0)+0x7fff)>>15 + (uint32(h1)+0x7fff)>>15 + (uint32(h2)+0x7fff)>>15 + (uint32(h3)+0x7fff)>>15)
	}
	for _, h := range run[n:] {
		x := float64(val[h])
		s0 += x
		e0 += xl[h]
		t0 += x * d
		d += step
		h &= 0x7fff
		m0 = max(m0, h)
		nz += int64((uint32(h) + 0x7fff) >> 15)
	}
	rs.s += (s0 + s1) + (s2 + s3)
	rs.ent += (e0 + e1) + (e2 + e3)
	rs.dist += (t0 + t1) + (t2 + t3)
	rs.mx16 = max(rs.mx16, m0, m1, m2, m3)
	rs.nz += nz
}

// sum16 is add16 for the sum and the count of nonzero values only (the
// pass without row statistics: Options.NoStats), in the same lanes.
func (rs *runSums) sum16(t *rawTables, run []uint16) {
	val := t.val
	var s0, s1, s2, s3 float64
	var nz int64
	n := len(run) &^ 3
	for i := 0; i < n; i += 4 {
		h0, h1, h2, h3 := run[i], run[i+1], run[i+2], run[i+3]
		s0 += float64(val[h0])
		s1 += float64(val[h1])
		s2 += float64(val[h2])
		s3 += float64(val[h3])
		nz += int64((uint32(h0&0x7fff)+0x7fff)>>15 + (uint32(h1&0x7fff)+0x7fff)>>15 + (uint32(h2&0x7fff)+0x7fff)>>15 + (uint32(h3&0x7fff)+0x7fff)>>15)
	}
	for _, h := range run[n:] {
		s0 += float64(val[h])
		nz += int64((uint32(h&0x7fff) + 0x7fff) >> 15)
	}
	rs.s += (s0 + s1) + (s2 + s3)
	rs.nz += nz
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
		w.forbidCell(ra, lu, hs, r, x, q, k, p, base, tol, example)
	}
}

// readRaw16 gives head (l, b, h) as patterns when rd can and the pass needs
// no float32 matrix (gradients are read as float32): the tables to read them
// with, the patterns (a view of the file's bytes where the loader can give
// one, else a copy in w.r16) and a function to call when done with them
// (nil when there is nothing to release). nil tables = use ReadAttn.
func (w *worker) readRaw16(rd reader, cfg passConfig, l, b, h int) (*rawTables, []uint16, func(), error) {
	rr, ok := rd.(raw16Reader)
	if !ok || cfg.grad || noRaw16 {
		return nil, nil, nil, nil
	}
	if !noView16 {
		v, d, release, err := rr.ViewRaw16(l, b, h)
		if err != nil {
			return nil, nil, nil, err
		}
		if d != loader.Invalid {
			return rawTablesFor(d), v, release, nil
		}
	}
	if len(w.r16) != len(w.a) {
		w.r16 = make([]uint16, len(w.a))
	}
	d, err := rr.ReadRaw16(l, b, h, w.r16)
	if err != nil || d == loader.Invalid {
		return nil, nil, nil, err
	}
	return rawTablesFor(d), w.r16, nil, nil
}

// noRaw16 turns the pattern path off, noView16 its views of the file's
// bytes (tests compare the paths).
var noRaw16, noView16 bool
