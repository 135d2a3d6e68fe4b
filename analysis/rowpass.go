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
// order (runSums.add32 and add16), so they still agree to the last bit.

// runSums holds the sums of one allowed run.
type runSums struct {
	s, ent, dist float64 // sum of x, of x ln x, of x |k - p|
	mx16         uint16  // the largest magnitude pattern (add16)
	mx32         uint32  // the largest magnitude bits (add32)
	nz           int64   // nonzero values
}

// addRun adds an allowed run's sums to the row: mx the largest value, n the
// run's length, lo and hi its first and last nonzero key (-1 when none).
func (ra *rowAcc) addRun(rs *runSums, mx float64, n int64, lo, hi int) {
	ra.s += rs.s
	ra.amass += rs.s
	ra.ent -= rs.ent
	ra.dist += rs.dist
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
	ra.zeros += n - rs.nz
}

// allowedFast is allowedRun for a row without negative values; without
// stats only the sum and the zeros.
func allowedFast(ra *rowAcc, row []float32, a, b, p int, stats bool) {
	var rs runSums
	switch {
	case !stats:
		rs.sum32(row[a:b])
	default:
		if a < p {
			rs.add32(row[a:min(b, p)], float64(p-a), -1)
		}
		if b > p {
			a0 := max(a, p)
			rs.add32(row[a0:b], float64(a0-p), 1)
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
	ra.addRun(&rs, float64(math.Float32frombits(rs.mx32)), int64(b-a), lo, hi)
}

// sum32 is sum16 (rawpass.go) over float32 values.
func (rs *runSums) sum32(run []float32) {
	var s0, s1, s2, s3 float64
	var nz int64
	n := len(run) &^ 3
	for i := 0; i < n; i += 4 {
		y0, y1, y2, y3 := run[i], run[i+1], run[i+2], run[i+3]
		s0 += float64(y0)
		s1 += float64(y1)
		s2 += float64(y2)
		s3 += float64(y3)
		b0, b1, b2, b3 := math.Float32bits(y0)&0x7fffffff, math.Float32bits(y1)&0x7fffffff, math.Float32bits(y2)&0x7fffffff, math.Float32bits(y3)&0x7fffffff
		nz += int64((b0+0x7fffffff)>>31 + (b1+0x7fffffff)>>31 + (b2+0x7fffffff)>>31 + (b3+0x7fffffff)>>31)
	}
	for _, y := range run[n:] {
		s0 += float64(y)
		nz += int64((math.Float32bits(y)&0x7fffffff + 0x7fffffff) >> 31)
	}
	rs.s += (s0 + s1) + (s2 + s3)
	rs.nz += nz
}

// xlogx0 is xlogx with 0 ln 0 = 0, for finite x >= 0.
func xlogx0(x float32) float64 {
	if x == 0 {
		return 0
	}
	return xlogx(x)
}

// add32 is add16 (rawpass.go) over float32 values.
func (rs *runSums) add32(run []float32, d, step float64) {
	var s0, s1, s2, s3, e0, e1, e2, e3, t0, t1, t2, t3 float64
	var m0, m1, m2, m3 uint32
	var nz int64
	n := len(run) &^ 3
	for i := 0; i < n; i += 4 {
		y0, y1, y2, y3 := run[i], run[i+1], run[i+2], run[i+3]
		x0, x1, x2, x3 := float64(y0), float64(y1), float64(y2), float64(y3)
		s0 += x0
		s1 += x1
		s2 += x2
		s3 += x3
		e0 += xlogx0(y0)
		e1 += xlogx0(y1)
		e2 += xlogx0(y2)
		e3 += xlogx0(y3)
		t0 += x0 * d
		t1 += x1 * (d + step)
		t2 += x2 * (d + 2*step)
		t3 += x3 * (d + 3*step)
		d += 4 * step
		b0, b1, b2, b3 := math.Float32bits(y0)&0x7fffffff, math.Float32bits(y1)&0x7fffffff, math.Float32bits(y2)&0x7fffffff, math.Float32bits(y3)&0x7fffffff
		m0, m1, m2, m3 = max(m0, b0), max(m1, b1), max(m2, b2), max(m3, b3)
		nz += int64((b0+0x7fffffff)>>31 + (b1+0x7fffffff)>>31 + (b2+0x7fffffff)>>31 + (b3+0x7fffffff)>>31)
	}
	for _, y := range run[n:] {
		x := float64(y)
		s0 += x
		e0 += xlogx0(y)
		t0 += x * d
		d += step
		b := math.Float32bits(y) & 0x7fffffff
		m0 = max(m0, b)
		nz += int64((b + 0x7fffffff) >> 31)
	}
	rs.s += (s0 + s1) + (s2 + s3)
	rs.ent += (e0 + e1) + (e2 + e3)
	rs.dist += (t0 + t1) + (t2 + t3)
	rs.mx32 = max(rs.mx32, m0, m1, m2, m3)
	rs.nz += nz
}

// cells runs over row (query row q at absolute position p) with the runs
// of keys sharing a rule (ends, rules: rowRuns), adding into ra and into the
// leak accumulators of w.u.
func (w *worker) cells(ra *rowAcc, row []float32, ends []int32, rules []Rule, q, p, base int, tol float64, example string) {
	a := 0
	for i, e := range ends {
		b, r := int(e), rules[i]
		switch {
		case r == RuleNone && !ra.negRow:
			allowedFast(ra, row, a, b, p, w.stats)
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

func allZero(xs []float32) bool {
	for _, x := range xs {
		if x != 0 {
			return false
		}
	}
	return true
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
			ent -= xlogx(x32)
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

// forbidCell counts key k of query row q (position p), forbidden by rule r
// and holding x, into the rule's leak accumulators lu and offset histogram
// hs: a leak when x > tol. Both paths' forbidden runs call it.
func (w *worker) forbidCell(ra *rowAcc, lu *leakUnit, hs []int64, r Rule, x float64, q, k, p, base int, tol float64, example string) {
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
		w.forbidCell(ra, lu, hs, r, x, q, k, p, base, tol, example)
	}
}
