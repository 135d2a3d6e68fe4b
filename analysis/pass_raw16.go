package analysis

import (
	"sync"

	"github.com/heed-dev/heed/internal/bigmem"
	"github.com/heed-dev/heed/internal/kernels"
	"github.com/heed-dev/heed/loader"
)

// The pass over a float16 or bfloat16 head straight from its stored 16-bit
// patterns (loader.Block.ReadRaw16), without converting the matrix to
// float32 first. Every value goes through 65,536-entry tables built from
// the very float32 the loader's conversion gives and from kernels.Xlogx of it, and
// the loops below are those of pass_f32.go with the same operations in the
// same key order, so every sum is the same to the last bit as on the
// float32 path (pass_raw16_test.go checks this on random heads with NaN, Inf,
// negative zero and subnormals). A forbidden run is checked for mass as
// integers: a pattern other than +0 or -0 is a nonzero value.

// raw16Reader is implemented by *loader.Block.
type raw16Reader interface {
	ReadRaw16(layer, batch, head int, dst []uint16) (loader.DType, error)
	ViewRaw16(layer, batch, head int) ([]uint16, loader.DType, func(), error)
}

// rawTables are the tables of one 16-bit dtype (internal/kernels).
type rawTables = kernels.Half

var (
	rawOnce         [2]sync.Once
	rawF16, rawBF16 rawTables
)

func rawTablesFor(d loader.DType) *rawTables {
	if d == loader.BFloat16 {
		rawOnce[1].Do(func() { rawBF16 = kernels.NewHalf(loader.RawTable(loader.BFloat16), 0x7f80) })
		return &rawBF16
	}
	rawOnce[0].Do(func() { rawF16 = kernels.NewHalf(loader.RawTable(loader.Float16), 0x7c00) })
	return &rawF16
}

// cells16 is cells (pass_f32.go) over a row of patterns.
func (w *worker) cells16(ra *rowAcc, t *rawTables, row []uint16, rw *rowAt) {
	a, p := 0, rw.p
	for i, e := range rw.ends {
		b, r := int(e), rw.rules[i]
		switch {
		case r == RuleNone && !ra.negRow:
			allowedFast16(ra, t, row, a, b, p, w.stats)
		case r == RuleNone:
			w.allowedRun16(ra, t, row, a, b, p)
		case kernels.AllZero16(row[a:b]):
			w.zeroRun16(ra, t, row, a, b, r)
		default:
			w.forbiddenRun16(ra, t, row, rw, a, b, r)
		}
		a = b
	}
}

// zeroRun16 counts the run [a, b) forbidden by r whose patterns are all +0
// or -0 (a mask that holds): its cells, and its value for the row maximum.
func (w *worker) zeroRun16(ra *rowAcc, t *rawTables, row []uint16, a, b int, r Rule) {
	w.u.leak[r].forb += int64(b - a)
	if x := float64(t.Val[row[a]]); x > ra.mx {
		ra.mx = x
	}
}

// allowedFast16 is allowedFast (pass_f32.go) over patterns: the sums of
// keys [a, b) and its flag word (sums16), then the run added to ra
// (finish16).
func allowedFast16(ra *rowAcc, t *rawTables, row []uint16, a, b, p int, stats bool) {
	var rs runSums
	sums16(&rs, t, row, a, b, p, stats)
	finish16(ra, &rs, t, row, a, b)
}

// sums16 computes the sums of the allowed run [a, b) of row (query at
// position p) into rs and returns its flag word (kernels.Sums.Add16).
func sums16(rs *runSums, t *rawTables, row []uint16, a, b, p int, stats bool) uint64 {
	if !stats {
		return rs.Sum16(t, row[a:b])
	}
	var flags uint64
	if a < p {
		flags |= rs.Add16(t, row[a:min(b, p)], float64(p-a), -1)
	}
	if b > p {
		a0 := max(a, p)
		flags |= rs.Add16(t, row[a0:b], float64(a0-p), 1)
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
	ra.addRun(rs, float64(t.Val[rs.Mx16]), int64(b-a), lo, hi)
}

// cells16Clean is cells16 for a judged row that is finite and holds no
// negative value, which it finds out on the way instead of in a scan of
// the row before (kernels.Finite16): first the sums of every allowed run with
// their flag words (sums16) and, for each forbidden run that is not all
// zeros, a kernels.Finite16 of that run alone; nothing is added anywhere until all
// runs are known clean. It returns false, having added nothing, when the
// row is not: the caller then scans it with kernels.Finite16 and takes cells16.
// When it returns true, ra and w.u hold exactly what cells16 adds for a
// row without negative values (the same sums in the same order).
func (w *worker) cells16Clean(ra *rowAcc, t *rawTables, row []uint16, rw *rowAt) bool {
	ends, rules, p := rw.ends, rw.rules, rw.p
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
		case kernels.AllZero16(row[a:b]):
		default:
			sums[i].NZ = -1 // a forbidden run with mass: forbiddenRun16 below
			if _, fin, neg := kernels.Finite16(row[a:b], t.Exp); !fin || neg {
				return false
			}
		}
		a = b
	}
	if kernels.Bad(flags) {
		return false
	}
	a = 0
	for i, e := range ends {
		b, r := int(e), rules[i]
		switch {
		case r == RuleNone:
			finish16(ra, &sums[i], t, row, a, b)
		case sums[i].NZ == 0:
			w.zeroRun16(ra, t, row, a, b, r)
		default:
			w.forbiddenRun16(ra, t, row, rw, a, b, r)
		}
		a = b
	}
	return true
}

// allowedRun16 is allowedRun over patterns: the run widened to its
// float32 values (exact: the table holds the loader's conversion, and
// Xlogx of a table value is the XL table's entry), then the float32 loop,
// so the two read paths' sums are the same by construction. It is the
// path of rows with a negative value only, rare enough that the extra pass
// over the run costs nothing. (forbiddenRun16 stays a loop of its own:
// widening a leaking forbidden run first made heed both 10% slower on an
// export whose every row leaks.)
func (w *worker) allowedRun16(ra *rowAcc, t *rawTables, row []uint16, a, b, p int) {
	w.allowedRun(ra, w.widen(t, row, a, b), a, b, p)
}

// forbiddenRun16 is forbiddenRun over patterns: a pattern other than +0
// or -0 is nonzero, one without the sign bit positive (the row is finite).
func (w *worker) forbiddenRun16(ra *rowAcc, t *rawTables, row []uint16, rw *rowAt, a, b int, r Rule) {
	p := rw.p
	for k := a; k < b; k++ {
		h := row[k]
		x := float64(t.Val[h])
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
				ra.ent -= t.XL[h]
			} else {
				ra.neg++
				ra.negm -= x
			}
		}
		w.forbidCell(ra, rw, r, k, x)
	}
}

// widen returns a row of len(row) whose keys [a, b) hold the values of
// row's patterns there (the others are not set).
func (w *worker) widen(t *rawTables, row []uint16, a, b int) []float32 {
	if len(w.wide) < len(row) {
		w.wide = make([]float32, len(row))
	}
	wide := w.wide[:len(row)]
	kernels.Widen16Ref(t, wide[a:b], row[a:b])
	return wide
}

// readRaw16 gives head (l, b, h) as patterns when rd can and the pass needs
// no float32 matrix (gradients are read as float32): the tables to read them
// with, the patterns (a view where the loader gives one, i.e. bytes already
// in memory such as an inflated NPZ member; else a copy in w.r16, which the
// loader reads from the file with one positioned read) and a function to
// call when done with them
// (nil when there is nothing to release). nil tables = use ReadAttn.
func (w *worker) readRaw16(rd reader, cfg passConfig, at unitAt) (*rawTables, []uint16, func(), error) {
	l, b, h := at.l, at.b, at.h
	rr, ok := rd.(raw16Reader)
	if !ok || cfg.grad || cfg.read&readFloat32 != 0 {
		return nil, nil, nil, nil
	}
	if cfg.read&readNoViews == 0 {
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

// readPaths take read paths off, for tests that compare the paths
// (Options.read): readFloat32 the pattern path, readNoViews its views of
// the file's bytes.
type readPaths uint8

const (
	readFloat32 readPaths = 1 << iota
	readNoViews
)
