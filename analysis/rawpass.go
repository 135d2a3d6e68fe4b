package analysis

import (
	"math"
	"math/bits"
	"sync"
	"unsafe"

	"github.com/heed-dev/heed/internal/bigmem"
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
	const mag, top = lanes16Mag, lanes16Top
	n := len(row) &^ 7
	var bad, neg uint64
	// eight patterns a step, the flags gathered over the row and looked at
	// once at its end (a non-finite row is rare)
	for i := 0; i < n; i += 8 {
		v, u := load4(row, i), load4(row, i+4)
		bad |= ((v & e) + low) | ((u & e) + low)
		neg |= ((v&mag)+mag)&v | ((u&mag)+mag)&u
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
	for i := 0; i < n; i += 4 {
		if load4(xs, i)&lanes16Mag != 0 {
			return false
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
			w.zeroRun16(ra, t, row, a, b, r)
		default:
			w.forbiddenRun16(ra, t, row, a, b, q, p, base, r, tol, example)
		}
		a = b
	}
}

// zeroRun16 counts the run [a, b) forbidden by r whose patterns are all +0
// or -0 (a mask that holds): its cells, and its value for the row maximum.
func (w *worker) zeroRun16(ra *rowAcc, t *rawTables, row []uint16, a, b int, r Rule) {
	w.u.leak[r].forb += int64(b - a)
	if x := float64(t.val[row[a]]); x > ra.mx {
		ra.mx = x
	}
}

// allowedFast16 is allowedFast (rowpass.go) over patterns: the sums of
// keys [a, b) and its flag word (sums16), then the run added to ra
// (finish16).
func allowedFast16(ra *rowAcc, t *rawTables, row []uint16, a, b, p int, stats bool) {
	var rs runSums
	sums16(&rs, t, row, a, b, p, stats)
	finish16(ra, &rs, t, row, a, b)
}

// sums16 computes the sums of the allowed run [a, b) of row (query at
// position p) into rs and returns its flag word (add16).
func sums16(rs *runSums, t *rawTables, row []uint16, a, b, p int, stats bool) uint64 {
	if !stats {
		return rs.sum16(t, row[a:b])
	}
	var flags uint64
	if a < p {
		flags |= rs.add16(t, row[a:min(b, p)], float64(p-a), -1)
	}
	if b > p {
		a0 := max(a, p)
		flags |= rs.add16(t, row[a0:b], float64(a0-p), 1)
	}
	return flags
}

// finish16 adds the allowed run [a, b), whose sums are rs, to ra.
func finish16(ra *rowAcc, rs *runSums, t *rawTables, row []uint16, a, b int) {
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
	ra.addRun(rs, float64(t.val[rs.mx16]), int64(b-a), lo, hi)
}

// cells16Clean is cells16 for a judged row that is finite and holds no
// negative value, which it finds out on the way instead of in a scan of
// the row before (finite16): first the sums of every allowed run with
// their flag words (sums16) and, for each forbidden run that is not all
// zeros, a finite16 of that run alone; nothing is added anywhere until all
// runs are known clean. It returns false, having added nothing, when the
// row is not: the caller then scans it with finite16 and takes cells16.
// When it returns true, ra and w.u hold exactly what cells16 adds for a
// row without negative values (the same sums in the same order).
func (w *worker) cells16Clean(ra *rowAcc, t *rawTables, row []uint16, ends []int32, rules []Rule, q, p, base int, tol float64, example string) bool {
	if cap(w.sums) < len(ends) {
		w.sums = make([]runSums, len(ends))
	}
	sums := w.sums[:len(ends)]
	var flags uint64
	a := 0
	for i, e := range ends {
		b := int(e)
		sums[i] = runSums{}
		switch {
		case rules[i] == RuleNone:
			flags |= sums16(&sums[i], t, row, a, b, p, w.stats)
		case allZero16(row[a:b]):
		default:
			sums[i].nz = -1 // a forbidden run with mass: forbiddenRun16 below
			if _, fin, neg := finite16(row[a:b], t.exp); !fin || neg {
				return false
			}
		}
		a = b
	}
	if flags&lanes16Top != 0 {
		return false
	}
	a = 0
	for i, e := range ends {
		b, r := int(e), rules[i]
		switch {
		case r == RuleNone:
			finish16(ra, &sums[i], t, row, a, b)
		case sums[i].nz == 0:
			w.zeroRun16(ra, t, row, a, b, r)
		default:
			w.forbiddenRun16(ra, t, row, a, b, q, p, base, r, tol, example)
		}
		a = b
	}
	return true
}

// Lane constants of the four-patterns-at-a-time tests (finite16, add16,
// sum16): a lane's magnitude bits and its top (sign) bit.
const (
	lanes16Mag = 0x7fff7fff7fff7fff
	lanes16Top = 0x8000800080008000
)

// load4 returns run[i], run[i+1], run[i+2], run[i+3] as one little-endian
// word, run[i] in its low 16 bits (the pattern path runs on little-endian
// hosts only; x86-64 and arm64 load unaligned words).
func load4(run []uint16, i int) uint64 {
	_ = run[i+3]
	return *(*uint64)(unsafe.Pointer(&run[i]))
}

// bad4 is the flag word of four patterns in v: a lane's top bit is set
// when its exponent bits are all set (Inf or NaN: adding the exponent's
// lowest bit to them carries into the top bit) or when it is negative and
// nonzero (its magnitude plus 0x7fff carries into the top bit, and its sign
// bit is set). e and low are exp and exp's lowest bit in every lane.
func bad4(v, e, low uint64) uint64 {
	return ((v & e) + low) | (((v & lanes16Mag) + lanes16Mag) & v)
}

// add16 adds the sums of an allowed run of patterns, whose keys lie at
// distances d, d+step, ... from the query, and returns the run's flag word
// (bad4 over it): when its lanes' top bits are clear the run is finite and
// holds no negative value, and the sums are the row's; otherwise the caller
// throws them away and takes the path of rows with such values. The sums
// are those of allowedRun16 for a run without negative values, in four
// lanes (keys i mod 4) in the order of add32, to the bit.
func (rs *runSums) add16(t *rawTables, run []uint16, d, step float64) uint64 {
	val, xl := t.val, t.xl
	e := uint64(t.exp) * 0x0001000100010001
	low := uint64(t.exp&-t.exp) * 0x0001000100010001
	var s0, s1, s2, s3, e0, e1, e2, e3, t0, t1, t2, t3 float64
	var m0, m1, m2, m3 uint16
	var nz int
	var flags uint64
	n := len(run) &^ 3
	for i := 0; i < n; i += 4 {
		v := load4(run, i)
		h0, h1, h2, h3 := uint16(v), uint16(v>>16), uint16(v>>32), uint16(v>>48)
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
		flags |= bad4(v, e, low)
		m := v & lanes16Mag
		nz += bits.OnesCount64((m + lanes16Mag) & lanes16Top)
		m0, m1, m2, m3 = max(m0, uint16(m)), max(m1, uint16(m>>16)), max(m2, uint16(m>>32)), max(m3, uint16(m>>48))
	}
	for _, h := range run[n:] {
		x := float64(val[h])
		s0 += x
		e0 += xl[h]
		t0 += x * d
		d += step
		flags |= bad4(uint64(h), e, low)
		h &= 0x7fff
		m0 = max(m0, h)
		nz += int((uint32(h) + 0x7fff) >> 15)
	}
	rs.s += (s0 + s1) + (s2 + s3)
	rs.ent += (e0 + e1) + (e2 + e3)
	rs.dist += (t0 + t1) + (t2 + t3)
	rs.mx16 = max(rs.mx16, m0, m1, m2, m3)
	rs.nz += int64(nz)
	return flags
}

// sum16 is add16 for the sum and the count of nonzero values only (the
// pass without row statistics: Options.NoStats), in the same lanes; it
// returns the run's flag word as add16 does.
func (rs *runSums) sum16(t *rawTables, run []uint16) uint64 {
	val := t.val
	e := uint64(t.exp) * 0x0001000100010001
	low := uint64(t.exp&-t.exp) * 0x0001000100010001
	var s0, s1, s2, s3 float64
	var nz int
	var flags uint64
	n := len(run) &^ 3
	for i := 0; i < n; i += 4 {
		v := load4(run, i)
		s0 += float64(val[uint16(v)])
		s1 += float64(val[uint16(v>>16)])
		s2 += float64(val[uint16(v>>32)])
		s3 += float64(val[uint16(v>>48)])
		flags |= bad4(v, e, low)
		nz += bits.OnesCount64(((v & lanes16Mag) + lanes16Mag) & lanes16Top)
	}
	for _, h := range run[n:] {
		s0 += float64(val[h])
		flags |= bad4(uint64(h), e, low)
		nz += int((uint32(h&0x7fff) + 0x7fff) >> 15)
	}
	rs.s += (s0 + s1) + (s2 + s3)
	rs.nz += int64(nz)
	return flags
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
// with, the patterns (a view where the loader gives one, i.e. bytes already
// in memory such as an inflated NPZ member; else a copy in w.r16, which the
// loader reads from the file with one positioned read) and a function to
// call when done with them
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
		if w.freeR16 != nil {
			w.freeR16()
		}
		w.r16, w.freeR16 = bigmem.Uint16s(len(w.a))
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
