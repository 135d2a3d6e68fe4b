package analysis

// The statistics declared with a row function (statistic.go): the pass
// hands each judged row with finite values to every such function, after
// the cell loops, and keeps per (layer, batch item, head) a float64 sum in
// row order and a row count, which commit adds exactly to the head's
// accumulator (HeadAcc.Extra, by name). The row order is fixed, so the
// result is the same whatever the sharding and on either read path (the
// values are the same float64s: float16 and bfloat16 patterns go through
// the loader's table, float32 is widened).

// extraAcc is one worker's state for the statistics declared with a row
// function: reused buffers of one row, and the current unit's sums.
type extraAcc struct {
	stats []Statistic // extraStats when the pass began
	vals  []float64   // the row's values
	allow []bool      // the row's allowed keys
	sum   []float64   // per statistic: the unit's sum, in row order
	rows  []int64     // per statistic: the rows it counted
	r     Row         // what the row functions are given (kept here: no allocation per row)
}

func newExtraAcc(keys int) *extraAcc {
	n := len(extraStats)
	return &extraAcc{stats: extraStats[:n:n], vals: make([]float64, keys), allow: make([]bool, keys),
		sum: make([]float64, n), rows: make([]int64, n)}
}

// row gives the row (row on the float32 path; row16 read through rt on the
// pattern path) to every statistic.
func (x *extraAcc) row(row []float32, row16 []uint16, rt *rawTables, rw *rowAt) {
	if rt != nil {
		for k, h := range row16 {
			x.vals[k] = float64(rt.Val[h])
		}
	} else {
		for k, v := range row {
			x.vals[k] = float64(v)
		}
	}
	a := 0
	for i, e := range rw.ends {
		ok := rw.rules[i] == RuleNone
		for k := a; k < int(e); k++ {
			x.allow[k] = ok
		}
		a = int(e)
	}
	x.r = Row{Values: x.vals, Query: rw.q, Pos: rw.p, Allowed: x.allow}
	for i := range x.stats {
		if v, ok := x.stats[i].Row(&x.r); ok {
			x.sum[i] += v
			x.rows[i]++
		}
	}
}

// commit adds the unit's sums to acc exactly and clears them.
func (x *extraAcc) commit(acc *HeadAcc) {
	if acc.Extra == nil {
		acc.Extra = make(map[string]StatAcc, len(x.stats))
	}
	for i := range x.stats {
		n := x.stats[i].Name
		a := acc.Extra[n]
		a.Sum.Add(x.sum[i])
		a.Rows += x.rows[i]
		acc.Extra[n] = a
		x.sum[i], x.rows[i] = 0, 0
	}
}
