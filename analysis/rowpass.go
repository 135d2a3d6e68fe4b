package analysis

import "math"

// The per-cell loop of worker.head, split by runs of keys that share a rule.
// Rules.Row gives each key of a row the rule that forbids it; the keys form
// a few runs (for a causal row: allowed 0..p, forbidden p+1..K-1). Allowed
// runs go through a loop without the rule bookkeeping, and a forbidden run
// that is all exact zeros (a mask that holds) is only counted. Every
// accumulator sees the same values in the same key order as a plain loop
// over the row, so the sums are the same to the last bit (pass_test.go's
// checks against scipy/numpy and the partial equality tests run over this).

// rowAcc holds what one judged, finite row adds up.
type rowAcc struct {
	s, ent, dist, amass, negm float64
	mx                        float64 // start at -Inf
	nAllow, zeros, neg        int64
	hit                       [numMask]bool
	nzLo, nzHi                int // first and last nonzero key, -1 when none
}

// cells runs over row (query row q at absolute position p) with the rules
// in w.rr, adding into ra and into the leak accumulators of w.u.
func (w *worker) cells(ra *rowAcc, row []float32, q, p, base int, tol float64, example string) {
	rr := w.rr[:len(row)]
	for a := 0; a < len(row); {
		r := rr[a]
		b := a + 1
		for b < len(row) && rr[b] == r {
			b++
		}
		switch {
		case r == RuleNone:
			w.allowedRun(ra, row, a, b, p)
		case allZero(row[a:b]):
			w.u.leak[r].forb += int64(b - a)
			if x := float64(row[a]); x > ra.mx {
				ra.mx = x
			}
		default:
			w.forbiddenRun(ra, row, a, b, q, p, base, r, tol, example)
		}
		a = b
	}
}

func allZero(xs []float32) bool {
	for _, x := range xs {
		if x != 0 {
			return false
		}
	}
	return true
}

// allowedRun is the loop body of an allowed key, for keys [a, b). The
// table lookup of xlogx is written out here so that the loop makes no call
// (a call spills the accumulators to the stack on every key).
func (w *worker) allowedRun(ra *rowAcc, row []float32, a, b, p int) {
	s, ent, dist, amass, negm, mx := ra.s, ra.ent, ra.dist, ra.amass, ra.negm, ra.mx
	nzLo, nzHi := ra.nzLo, ra.nzHi
	var zeros, neg int64
	tab := xlogxF16
	for k := a; k < b; k++ {
		x32 := row[k]
		x := float64(x32)
		if x > mx {
			mx = x
		}
		amass += x
		if x == 0 {
			zeros++
			continue
		}
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
		if x > 0 {
			bits := math.Float32bits(x32)
			if i := int(bits>>13) - xlogxF16Lo; bits&0x1fff == 0 && uint(i) < uint(len(tab)) {
				ent -= tab[i]
			} else {
				ent -= xlogx(x32)
			}
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

// forbiddenRun is the loop body of a key forbidden by rule r, for keys [a, b).
func (w *worker) forbiddenRun(ra *rowAcc, row []float32, a, b, q, p, base int, r Rule, tol float64, example string) {
	lu := &w.u.leak[r]
	hs := w.hist[r]
	for k := a; k < b; k++ {
		x32 := row[k]
		x := float64(x32)
		if x > ra.mx {
			ra.mx = x
		}
		if x != 0 {
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
			if x > 0 {
				ra.ent -= xlogx(x32)
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
