package analysis

import (
	"math"

	"github.com/heed-dev/heed/internal/kernels"
)

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
	nzLo, nzHi                int  // first and last nonzero key, -1 when none
	negRow                    bool // the row holds a negative value: allowed runs take allowedRun
}

// The allowed runs of a row without negative values take allowedFast: its
// loop keeps four partial sums of each quantity (keys i mod 4), added
// together at the end of the run, so that four additions are in flight
// instead of one chain waiting on the last (the loop was bound by the
// latency of floating-point addition). The sums are therefore in another
// order than key by key, but in a fixed one: the same matrix gives the same
// bits whatever the sharding, and the float32 and pattern paths share the
// order (kernels.Sums.Add32 and Add16), so they still agree to the last bit.

// runSums holds the sums of one allowed run (internal/kernels).
type runSums = kernels.Sums

// addRun adds an allowed run's sums to the row: mx the largest value, n the
// run's length, lo and hi its first and last nonzero key (-1 when none).
func (ra *rowAcc) addRun(rs *runSums, mx float64, n int64, lo, hi int) {
	ra.s += rs.S
	ra.amass += rs.S
	ra.ent -= rs.Ent
	ra.dist += rs.Dist
	if mx > ra.mx {
		ra.mx = mx
	}
	if lo >= 0 {
		if ra.nzLo < 0 {
			ra.nzLo = lo
		}
		ra.nzHi = hi
	}
	ra.nAllow += n
	ra.zeros += n - rs.NZ
}

// allowedFast is allowedRun for a row without negative values; without
// stats only the sum and the zeros.
func allowedFast(ra *rowAcc, row []float32, a, b, p int, stats bool) {
	var rs runSums
	switch {
	case !stats:
		rs.Sum32(row[a:b])
	default:
		if a < p {
			rs.Add32(row[a:min(b, p)], float64(p-a), -1)
		}
		if b > p {
			a0 := max(a, p)
			rs.Add32(row[a0:b], float64(a0-p), 1)
		}
	}
	lo, hi := -1, -1
	for k := a; k < b; k++ {
		if row[k] != 0 {
			lo = k
			break
		}
	}
	if lo >= 0 {
		for k := b - 1; k >= lo; k-- {
			if row[k] != 0 {
				hi = k
				break
			}
		}
	}
	ra.addRun(&rs, float64(math.Float32frombits(rs.Mx32)), int64(b-a), lo, hi)
}

// rowAt is the row the cell loops are in: query row q at absolute position
// p, and its runs of keys sharing a rule (ends, rules: rowRuns).
type rowAt struct {
	q, p  int
	ends  []int32
	rules []Rule
}

// cells runs over row (rw: where it is and its runs of keys sharing a
// rule), adding into ra and into the leak accumulators of w.u.
func (w *worker) cells(ra *rowAcc, row []float32, rw *rowAt) {
	a, p := 0, rw.p
	for i, e := range rw.ends {
		b, r := int(e), rw.rules[i]
		switch {
		case r == RuleNone && !ra.negRow:
			allowedFast(ra, row, a, b, p, w.stats)
		case r == RuleNone:
			w.allowedRun(ra, row, a, b, p)
		case kernels.AllZero32(row[a:b]):
			w.u.leak[r].forb += int64(b - a)
			if x := float64(row[a]); x > ra.mx {
				ra.mx = x
			}
		default:
			w.forbiddenRun(ra, row, rw, a, b, r)
		}
		a = b
	}
}

// ruleRuns holds, for every query row of one batch item, the runs of keys
// that share a rule (Rules.Row): the mask rules other than the explicit
// mask are the same for every layer and head, so a worker computes them
// once per batch item instead of once per row of every head.
type ruleRuns struct {
	batch int     // the batch item they are for; -1 = none yet
	start []int32 // row q's runs are ends[start[q]:start[q+1]]
	ends  []int32 // the key after each run's last
	rules []Rule  // each run's rule
}

// appendRuns appends the runs of rr to ends and rules.
func appendRuns(ends []int32, rules []Rule, rr []Rule) ([]int32, []Rule) {
	for a := 0; a < len(rr); {
		r := rr[a]
		b := a + 1
		for b < len(rr) && rr[b] == r {
			b++
		}
		ends, rules = append(ends, int32(b)), append(rules, r)
		a = b
	}
	return ends, rules
}

// rowRuns returns the runs of query row q of batch item b. Without an
// explicit mask they come from the worker's cache (filled for the whole
// batch item on first use); with one (allowRow not nil) they are computed
// for this row. When full is set, w.rr holds the row's rule per key too.
func (w *worker) rowRuns(rs *Rules, b, q int, allowRow []bool, full bool) ([]int32, []Rule) {
	if allowRow != nil {
		rs.Row(b, q, allowRow, w.rr)
		w.one.ends, w.one.rules = appendRuns(w.one.ends[:0], w.one.rules[:0], w.rr)
		return w.one.ends, w.one.rules
	}
	c := &w.runs
	if c.batch != b || c.start == nil {
		c.batch = b
		c.start, c.ends, c.rules = append(c.start[:0], 0), c.ends[:0], c.rules[:0]
		for qq := 0; qq < rs.Queries; qq++ {
			rs.Row(b, qq, nil, w.rr)
			c.ends, c.rules = appendRuns(c.ends, c.rules, w.rr)
			c.start = append(c.start, int32(len(c.ends)))
		}
	}
	ends, rules := c.ends[c.start[q]:c.start[q+1]], c.rules[c.start[q]:c.start[q+1]]
	if full {
		a := 0
		for i, e := range ends {
			for k := a; k < int(e); k++ {
				w.rr[k] = rules[i]
			}
			a = int(e)
		}
	}
	return ends, rules
}

// allowedRun is the loop body of an allowed key, for keys [a, b), in rows
// that hold negative values (the others take allowedFast).
func (w *worker) allowedRun(ra *rowAcc, row []float32, a, b, p int) {
	s, ent, dist, amass, negm, mx := ra.s, ra.ent, ra.dist, ra.amass, ra.negm, ra.mx
	nzLo, nzHi := ra.nzLo, ra.nzHi
	var zeros, neg int64
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
			ent -= kernels.Xlogx(x32)
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

// forbidCell counts key k of row rw, forbidden by rule r and holding x,
// into the rule's leak accumulators and offset histogram: a leak when x >
// w.tol. Both paths' forbidden runs call it.
func (w *worker) forbidCell(ra *rowAcc, rw *rowAt, r Rule, k int, x float64) {
	lu := &w.u.leak[r]
	lu.forb++
	if x > w.tol {
		lu.cells++
		lu.mass += x
		ra.hit[r] = true
		if !lu.worst.Set || x > lu.worst.Value {
			lu.worst = Cell{Set: true, Example: w.example, Query: rw.q, Key: k, Value: x}
		}
		if hs := w.hist[r]; hs != nil {
			i := k - rw.p + w.base
			hs[i]++
			w.lo[r] = min(w.lo[r], i)
			w.hi[r] = max(w.hi[r], i)
		}
	}
}

// forbiddenRun is the loop body of a key forbidden by rule r, for keys [a, b)
// of row rw.
func (w *worker) forbiddenRun(ra *rowAcc, row []float32, rw *rowAt, a, b int, r Rule) {
	p := rw.p
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
				ra.ent -= kernels.Xlogx(x32)
			} else {
				ra.neg++
				ra.negm -= x
			}
		}
		w.forbidCell(ra, rw, r, k, x)
	}
}
