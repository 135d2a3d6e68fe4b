package analysis

import (
	"math"
	"sort"

	"github.com/heed-dev/heed/loader"
)

// The cut check (RuleCut): an under-allowing mask, one that blocks keys the
// rules allow. It has no forbidden mass to measure, so it looks at where each
// row's mass stops: a softmax over allowed keys is never exactly 0 (outside
// underflow), so a row whose allowed keys after some key k are all exactly
// 0 had them masked. One row proves little; the same stop offset k - p in
// (nearly) every row that could show it does. Two places where a mask must
// allow keys after the query's position are read:
//   - every row of a cross block (kind cross: queries of one sequence over
//     keys of another, from the metadata, never guessed from a square map):
//     a causal mask passed to cross-attention cuts the [target, source] map
//     into a triangle (users' pattern 4);
//   - the prefix rows of a causal block with a prefix P: a plain causal mask
//     instead of the prefix-LM one keeps prefix positions from later prefix
//     positions (pattern 16).
// A unit (layer, head, batch item) is cut when at least minCutRows rows stop
// at the same offset c and they are at least cutShare of the rows that have
// allowed keys after p + c.

//
// Underflow: in float16 (and, in principle, bfloat16) a probability below
// half the smallest subnormal rounds to exactly 0 without any mask: a sharp
// row of cross-attention ends in exact zeros wherever its logits fall far
// enough below the maximum. Such zeros are no evidence of a mask. A row is
// left out of the cut check when it holds a nonzero value at most
// underflowTiny of the dtype (stored or computed): 2^10 times the smallest
// subnormal, where the row's values have run down to the end of the
// dtype's range, so its zeros are more likely underflow than a mask. A mask
// cut shows in the rows (and heads) that are not that sharp.

const (
	minCutRows = 2
	cutShare   = 0.9
)

// CutAcc accumulates, for one (layer, head, batch item), the judged finite
// rows the cut check reads whose mass stops before the last key the mask
// rules allow them (every allowed key after the stop is exactly 0).
type CutAcc struct {
	Rows  int64 `json:"rows"`  // rows that stop early
	Cells int64 `json:"cells"` // allowed keys after the stop, left without mass
	// Stops counts those rows by the offset of their last nonzero key, k - p.
	Stops map[int]int64 `json:"stops,omitempty"`
	// First is the first such row (example, query order); Key is the first
	// allowed key left without mass, Value 0.
	First Cell `json:"first"`
}

func (c *CutAcc) merge(o *CutAcc) {
	c.Rows += o.Rows
	c.Cells += o.Cells
	c.Stops = mergeCounts(c.Stops, o.Stops)
	if o.First.first(c.First) {
		c.First = o.First
	}
}

// commitTo adds c into acc and clears c (keeping its map for the next unit).
func (c *CutAcc) commitTo(acc *CutAcc) {
	acc.merge(c)
	c.Rows, c.Cells, c.First = 0, 0, Cell{}
	clear(c.Stops)
}

// underflowTiny returns the value at or below which a row of dtype d is
// taken to reach underflow (2^10 x the smallest subnormal: float16 2^-24,
// bfloat16 2^-133, from the IEEE 754 binary16 and bfloat16 layouts), 0 for
// dtypes where a softmax does not underflow in practice.
func underflowTiny(d loader.DType) float64 {
	switch d {
	case loader.Float16:
		return math.Ldexp(1, -24+10)
	case loader.BFloat16:
		return math.Ldexp(1, -133+10)
	}
	return 0
}

// rowReachesUnderflow reports whether the row (float32 values, or 16-bit
// patterns through rt) holds a nonzero value at most tiny in magnitude.
func rowReachesUnderflow(row []float32, row16 []uint16, rt *rawTables, tiny float64) bool {
	if row16 != nil && rt != nil {
		for _, hb := range row16 {
			if v := float64(rt.Val[hb]); v != 0 && math.Abs(v) <= tiny {
				return true
			}
		}
		return false
	}
	for _, v := range row {
		if v != 0 && math.Abs(float64(v)) <= tiny {
			return true
		}
	}
	return false
}

// cutCheck reports whether the cut check runs with the rule selection rs
// (Options.Rules).
func cutCheck(rs []Rule) bool {
	if len(rs) == 0 {
		return true
	}
	for _, r := range rs {
		if r == RuleCut {
			return true
		}
	}
	return false
}

// cutBlock reports whether the cut check reads any row of a block with rules r.
func cutBlock(r *Rules) bool { return r.Kind == loader.KindCross || r.active[RulePrefix] }

// cutRow reports whether the cut check reads the row at position p.
func cutRow(r *Rules, p int) bool {
	return r.Kind == loader.KindCross || (r.active[RulePrefix] && p < r.Prefix)
}

// lastAllowed returns the last key rr allows, -1 when none.
func lastAllowed(rr []Rule) int {
	k := len(rr) - 1
	for k >= 0 && rr[k] != RuleNone {
		k--
	}
	return k
}

// row adds one judged finite row (query row q at position p, keys' rules
// rr, last nonzero key nzHi) when its mass stops before its last allowed key.
func (c *CutAcc) row(rr []Rule, p, q, nzHi int, example string) {
	last := lastAllowed(rr)
	if nzHi < 0 || nzHi >= last {
		return
	}
	var n int64
	first := -1
	for k := nzHi + 1; k <= last; k++ {
		if rr[k] == RuleNone {
			n++
			if first < 0 {
				first = k
			}
		}
	}
	c.Rows++
	c.Cells += n
	if c.Stops == nil {
		c.Stops = map[int]int64{}
	}
	c.Stops[nzHi-p]++
	if cell := (Cell{Set: true, Example: example, Query: q, Key: first}); cell.first(c.First) {
		c.First = cell
	}
}

// reach counts the judged rows of batch item b the cut check reads, by the
// offset of their last allowed key (the mask rules without the explicit
// mask, which can differ per head), nil when it reads none.
func reach(r *Rules, b int) map[int]int64 {
	if !cutBlock(r) {
		return nil
	}
	var m map[int]int64
	dst := make([]Rule, r.Keys)
	for q := 0; q < r.Queries; q++ {
		p := r.Pos(b, q)
		if !r.Judged(b, q) || !cutRow(r, p) {
			continue
		}
		r.Row(b, q, nil, dst)
		last := lastAllowed(dst)
		if last < 0 {
			continue
		}
		if m == nil {
			m = map[int]int64{}
		}
		m[last-p]++
	}
	return m
}

// cutOffset returns the offset most rows stop at (the smallest on ties) and
// how many do.
func cutOffset(stops map[int]int64) (int, int64) {
	best, n := 0, int64(0)
	for c, m := range stops {
		if m > n || (m == n && c < best) {
			best, n = c, m
		}
	}
	return best, n
}

// couldStop counts the rows of the batch items (per layer and head) that
// have an allowed key after p + c, over the examples in which a unit of
// the batch item was cut (GeometryAcc.CutReach).
func couldStop(bp *BlockPartial, batches []int, c int) int64 {
	var n int64
	for _, b := range batches {
		n += reachPast(bp.Geometry[b].CutReach, c)
	}
	return n
}

// reachPast counts the rows of reach with an allowed key after p + c.
func reachPast(reach map[int]int64, c int) int64 {
	var n int64
	for d, m := range reach {
		if d > c {
			n += m
		}
	}
	return n
}

// isCut reports whether rows stopping as cut counts them are a cut (see
// the top of this file), reach counting the rows that could stop.
func isCut(cut *CutAcc, reach map[int]int64) bool {
	c, n := cutOffset(cut.Stops)
	return n >= minCutRows && float64(n) >= cutShare*float64(reachPast(reach, c))
}

// cutProblem reports whether unit a of batch item b is cut: judged over the
// examples in which it was cut (HeadAcc.InCut, GeometryAcc.CutReach), so
// that the clean examples of a set do not hide it.
func cutProblem(bp *BlockPartial, b int, a *HeadAcc) bool {
	return isCut(&a.InCut, bp.Geometry[b].CutReach)
}

// problem reports whether unit a (batch item b) has a problem of rule r.
func problem(bp *BlockPartial, b int, a *HeadAcc, r Rule) bool {
	if r == RuleCut {
		return cutProblem(bp, b, a)
	}
	return hasProblem(a, r)
}

func stopsList(stops map[int]int64) []OffsetCount {
	var out []OffsetCount
	for o, n := range stops {
		out = append(out, OffsetCount{o, n})
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Offset < out[j].Offset })
	return out
}

// diagnoseCut names a cut finding: cross_causal on a cross block,
// prefix_causal on the prefix rows of a prefix-LM; Value is the offset the
// rows stop at.
func diagnoseCut(bp *BlockPartial, f *Finding, d *Diagnosis) {
	c, n := cutOffset(f.agg.InCut.Stops)
	d.Value = float64(c)
	d.Facts.Stopped = n
	d.Facts.Could = couldStop(bp, f.Batches, c) * int64(len(f.Layers)*len(f.Heads))
	if bp.Kind == string(loader.KindCross) {
		d.Pattern = PatCrossCausal
		d.Facts.Queries, d.Facts.Keys = bp.Queries, bp.Keys
		return
	}
	d.Pattern = PatPrefixCausal
	d.Facts.Prefix = bp.Prefix
}
