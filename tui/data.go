package tui

import (
	"container/list"
	"fmt"
	"math"
	"slices"
	"strings"
	"sync"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/internal/bigmem"
	"github.com/heed-dev/heed/loader"
	"github.com/heed-dev/heed/views"
)

// headKey names one head's matrix of one example (0 = A, 1 = B).
type headKey struct {
	example, block, layer, batch, head int
}

// pixKey names a downsampled window of a head.
type pixKey struct {
	headKey
	q0, k0, rows, cols, block int
	agg                       views.Agg
	diff                      bool
}

// lru is a small least-recently-used cache with a cost budget.
type lru[K comparable, V any] struct {
	budget, used int64
	order        *list.List // front = most recent
	items        map[K]*list.Element
	evicted      func(K, V) // when set, called with each entry put drops
}

type lruEntry[K comparable, V any] struct {
	k    K
	v    V
	cost int64
}

func newLRU[K comparable, V any](budget int64) *lru[K, V] {
	return &lru[K, V]{budget: budget, order: list.New(), items: map[K]*list.Element{}}
}

func (c *lru[K, V]) get(k K) (V, bool) {
	if e, ok := c.items[k]; ok {
		c.order.MoveToFront(e)
		return e.Value.(*lruEntry[K, V]).v, true
	}
	var zero V
	return zero, false
}

// put adds v; older entries go until the budget holds (the newest always stays).
func (c *lru[K, V]) put(k K, v V, cost int64) {
	if e, ok := c.items[k]; ok {
		c.used -= e.Value.(*lruEntry[K, V]).cost
		c.order.Remove(e)
	}
	c.items[k] = c.order.PushFront(&lruEntry[K, V]{k, v, cost})
	c.used += cost
	for c.used > c.budget && c.order.Len() > 1 {
		e := c.order.Back()
		en := e.Value.(*lruEntry[K, V])
		c.order.Remove(e)
		delete(c.items, en.k)
		c.used -= en.cost
		if c.evicted != nil {
			c.evicted(en.k, en.v)
		}
	}
}

// Budgets: raw heads are large (Q*K float32), windows are small.
const (
	headBudget = 64 << 20
	pixBudget  = 8 << 20
)

// blockInfo is what the TUI keeps about one block of the open export.
type blockInfo struct {
	blk             *loader.Block
	rules           *analysis.Rules
	runs            []*rowRuns // by batch item, without an explicit mask (rowRunsFunc)
	rulesErr        error
	qside, kside    *loader.Side
	qtoks, ktoks    [][]string // per batch item, nil without tokens
	compareMismatch string     // why B cannot be compared, "" when it can
}

func newBlockInfo(ex *loader.Export, blk *loader.Block) *blockInfo {
	bi := &blockInfo{blk: blk, qside: ex.Side(blk.QuerySide), kside: ex.Side(blk.KeySide)}
	bi.rules, bi.rulesErr = analysis.NewRules(blk, bi.qside, bi.kside, nil)
	return bi
}

func sideTokens(s *loader.Side, batch, from, n int) []string {
	if s == nil || len(s.Tokens) == 0 {
		return nil
	}
	out := make([]string, n)
	for i := range out {
		out[i] = s.Token(batch, from+i)
	}
	return out
}

// tokens returns the query and key tokens of batch item b.
func (bi *blockInfo) tokens(b int) (q, k []string) {
	if bi.qtoks == nil {
		bi.qtoks = make([][]string, bi.blk.Batch)
		bi.ktoks = make([][]string, bi.blk.Batch)
	}
	if bi.qtoks[b] == nil && bi.ktoks[b] == nil {
		bi.qtoks[b] = sideTokens(bi.qside, b, bi.blk.QueryOffset, bi.blk.Queries)
		bi.ktoks[b] = sideTokens(bi.kside, b, 0, bi.blk.Keys)
		if bi.qtoks[b] == nil {
			bi.qtoks[b] = []string{}
		}
		if bi.ktoks[b] == nil {
			bi.ktoks[b] = []string{}
		}
	}
	q, k = bi.qtoks[b], bi.ktoks[b]
	if len(q) == 0 {
		q = nil
	}
	if len(k) == 0 {
		k = nil
	}
	return q, k
}

// ruleFunc returns the Map's rule lookup for (batch, head): the mask rule
// forbidding a cell, "" for allowed cells and for padding query rows (which
// are not judged).
func (bi *blockInfo) ruleFunc(batch, head int) func(q, k int) string {
	return MapRule(bi.rules, batch, head)
}

// MapRule is the Map's rule lookup (views.MapData.Rule) of rules for
// (batch, head): the mask rule forbidding a cell, "" for allowed cells and
// for padding query rows, which are not judged; nil when no rule applies.
// heed render's map figure marks cells by it too.
func MapRule(r *analysis.Rules, batch, head int) func(q, k int) string {
	if r == nil || len(r.Active()) == 0 {
		return nil
	}
	return func(q, k int) string {
		if !r.Judged(batch, q) {
			return ""
		}
		rule, err := r.Cell(batch, head, q, k)
		if err != nil || rule == analysis.RuleNone {
			return ""
		}
		return rule.String()
	}
}

// rowRuns are the rule runs of every row of one (batch item, head), in the
// form views.MapData.RowRuns gives them.
type rowRuns struct {
	start []int32 // row q's runs are ends[start[q]:start[q+1]]
	ends  []int32
	names []string
}

// rowRunsFunc is ruleFunc for a whole row at once (views.MapData.RowRuns).
// The runs of all rows are computed on first use; without an explicit mask
// they are the same for every head, so they are kept per batch item.
func (bi *blockInfo) rowRunsFunc(batch, head int) func(q int) ([]int32, []string) {
	r := bi.rules
	if r == nil || len(r.Active()) == 0 {
		return nil
	}
	explicit := slices.Contains(r.Active(), analysis.RuleExplicit)
	var rs *rowRuns
	if !explicit && bi.runs != nil {
		rs = bi.runs[batch]
	}
	// views.Downsample calls it from several goroutines at once: the runs
	// are made once, by whichever call comes first
	var once sync.Once
	return func(q int) ([]int32, []string) {
		once.Do(func() {
			if rs == nil {
				rs = bi.makeRuns(batch, head)
				if !explicit {
					if bi.runs == nil {
						bi.runs = make([]*rowRuns, bi.blk.Batch)
					}
					bi.runs[batch] = rs
				}
			}
		})
		return rs.ends[rs.start[q]:rs.start[q+1]], rs.names[rs.start[q]:rs.start[q+1]]
	}
}

// makeRuns computes the rule runs of every row of (batch, head); a row that
// is not judged, or whose rules cannot be read, is one allowed run.
func (bi *blockInfo) makeRuns(batch, head int) *rowRuns {
	r := bi.rules
	var names [256]string // by rule, "" for RuleNone
	for i := 1; i < len(names); i++ {
		if names[i] = analysis.Rule(i).String(); strings.HasPrefix(names[i], "rule(") {
			names[i] = "" // past the last rule
			break
		}
	}
	K := bi.blk.Keys
	rr := make([]analysis.Rule, K)
	rs := &rowRuns{start: []int32{0}}
	for q := 0; q < bi.blk.Queries; q++ {
		if !r.Judged(batch, q) || r.CellRow(batch, head, q, rr) != nil {
			clear(rr)
		}
		for a := 0; a < K; {
			b := a + 1
			for b < K && rr[b] == rr[a] {
				b++
			}
			rs.ends, rs.names = append(rs.ends, int32(b)), append(rs.names, names[rr[a]])
			a = b
		}
		rs.start = append(rs.start, int32(len(rs.ends)))
	}
	return rs
}

// data holds the open exports and the caches of heads and windows.
type data struct {
	ex, exB *loader.Export
	blocks  []*blockInfo
	heads   *lru[headKey, []float32]
	raws    *lru[headKey, rawHead]
	pix     *lru[pixKey, *views.Pixels]
	// The pattern buffers of raw heads come from internal/bigmem (huge
	// pages: filling a fresh 8 MB buffer for a 2048 x 2048 head costs a few
	// page faults instead of two thousand) and are freed by close. spare is
	// the buffer of a raw head the cache dropped, reused for the next head
	// of its size. pinned is the head whose buffer must be neither reused
	// nor freed when dropped (the Map's current head, which its MapData
	// still reads): it waits in orphans until close.
	spare   rawHead
	pinned  headKey
	orphans []func()
}

// close frees the pattern buffers; the caches are emptied, so a later read
// goes back to the (closed) export and fails instead of reading freed
// memory.
func (d *data) close() {
	for _, e := range d.raws.items {
		e.Value.(*lruEntry[headKey, rawHead]).v.release()
	}
	d.spare.release()
	for _, f := range d.orphans {
		f()
	}
	d.raws = newLRU[headKey, rawHead](headBudget)
	d.spare, d.orphans = rawHead{}, nil
}

func newData(ex, exB *loader.Export) *data {
	d := &data{ex: ex, exB: exB, heads: newLRU[headKey, []float32](headBudget), raws: newLRU[headKey, rawHead](headBudget), pix: newLRU[pixKey, *views.Pixels](pixBudget)}
	d.raws.evicted = func(k headKey, r rawHead) {
		switch {
		case k == d.pinned:
			d.orphans = append(d.orphans, r.free)
		default:
			d.spare.release()
			d.spare = r
		}
	}
	for _, b := range ex.Blocks {
		bi := newBlockInfo(ex, b)
		if exB != nil {
			bb := exB.Block(b.Name)
			switch {
			case bb == nil:
				bi.compareMismatch = "B has no block " + b.Name
			case bb.Layers != b.Layers || bb.Heads != b.Heads || bb.Batch != b.Batch || bb.Queries != b.Queries || bb.Keys != b.Keys:
				bi.compareMismatch = fmt.Sprintf("B's %s is [%d, %d, %d, %d, %d], A's [%d, %d, %d, %d, %d] (layer batch head query key)",
					b.Name, bb.Layers, bb.Batch, bb.Heads, bb.Queries, bb.Keys, b.Layers, b.Batch, b.Heads, b.Queries, b.Keys)
			}
		}
		d.blocks = append(d.blocks, bi)
	}
	return d
}

// head returns the weights of a head, reading them on first use.
func (d *data) head(k headKey) ([]float32, error) {
	if w, ok := d.heads.get(k); ok {
		return w, nil
	}
	ex := d.ex
	if k.example == 1 {
		ex = d.exB
	}
	bi := d.blocks[k.block]
	blk := bi.blk
	if k.example == 1 {
		blk = ex.Block(blk.Name)
	}
	w := make([]float32, blk.Queries*blk.Keys)
	if err := blk.ReadAttn(k.layer, k.batch, k.head, w); err != nil {
		return nil, err
	}
	d.heads.put(k, w, int64(len(w))*4)
	return w, nil
}

// rawHead is a head as its stored 16-bit patterns and their float32 values.
type rawHead struct {
	p     []uint16
	value *[65536]float32
	free  func() // frees p (internal/bigmem); nil for none
}

func (r rawHead) release() {
	if r.free != nil {
		r.free()
	}
}

// raw returns a head of example 0 as its stored float16/bfloat16 patterns,
// reading them on first use (half the memory of the float32 matrix, and no
// conversion before drawing); ok is false when the block is not stored that
// way (the caller uses head).
func (d *data) raw(k headKey) (rawHead, bool, error) {
	if k.example != 0 {
		return rawHead{}, false, nil
	}
	if r, ok := d.raws.get(k); ok {
		return r, true, nil
	}
	blk := d.blocks[k.block].blk
	var r rawHead
	if n := blk.Queries * blk.Keys; len(d.spare.p) == n {
		r, d.spare = d.spare, rawHead{}
	} else {
		r.p, r.free = bigmem.Uint16s(n)
	}
	dt, err := blk.ReadRaw16(k.layer, k.batch, k.head, r.p)
	value := loader.RawTable(dt)
	if err != nil || value == nil {
		r.release()
		return rawHead{}, false, err
	}
	r.value = value
	p := r.p
	d.raws.put(k, r, int64(len(p))*2)
	return r, true, nil
}

// weight returns cell i (row-major) of a head, from its patterns when it is
// held that way.
func (d *data) weight(k headKey, i int) (float32, error) {
	if r, ok, err := d.raw(k); err != nil || ok {
		if err != nil {
			return 0, err
		}
		return r.value[r.p[i]], nil
	}
	w, err := d.head(k)
	if err != nil {
		return 0, err
	}
	return w[i], nil
}

// diff returns |A - B| of a head.
func (d *data) diff(k headKey) (a, b, diff []float32, err error) {
	ka, kb := k, k
	ka.example, kb.example = 0, 1
	if a, err = d.head(ka); err != nil {
		return
	}
	if b, err = d.head(kb); err != nil {
		return
	}
	diff = make([]float32, len(a))
	for i := range a {
		diff[i] = float32(math.Abs(float64(a[i] - b[i])))
	}
	return
}

// window returns the downsampled pixels of md for a layout, cached.
func (d *data) window(k headKey, md *views.MapData, l views.MapLayout, agg views.Agg, isDiff bool) *views.Pixels {
	pk := pixKey{headKey: k, q0: l.Q0, k0: l.K0, rows: l.PixRows, cols: l.PixCols, block: l.Block, agg: agg, diff: isDiff}
	if p, ok := d.pix.get(pk); ok {
		return p
	}
	p := views.Downsample(md, l.Q0, l.K0, l.PixRows, l.PixCols, l.Block, agg)
	d.pix.put(pk, p, int64(p.Rows*p.Cols)*24+64)
	return p
}
