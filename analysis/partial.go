package analysis

import (
	"encoding/json"
	"fmt"
	"slices"
	"sort"
)

// PartialVersion is written in every Partial; Merge refuses other versions.
// 2: padding keys left out of the forbidden-cell counts, options no_stats.
// 3: coverage (who gave the kind, inferred masks, query positions, axes,
// compute dtype) and rows summing within a lower precision's rounding.
// 4: per block, the examples and those in which each rule found a problem;
// per batch item, the cells the rules forbid in the examples where they
// leaked (GeometryAcc.Leaky).
const PartialVersion = "heed-partial/4"

// Partial is the exact state of an analysis: per block, per (layer, head,
// batch item) sums and counts over every example seen. It is what a shard of
// a large job writes (it marshals to JSON and back without loss) and what
// Merge combines; Result turns it into statistics, findings and diagnoses.
// Merging partials of disjoint sets of examples, in any grouping and order,
// gives the same Partial bit for bit as one run over all of them.
type Partial struct {
	Version  string          `json:"version"`
	Examples int64           `json:"examples"`
	Options  PartialOptions  `json:"options"`
	Blocks   []*BlockPartial `json:"blocks"`
}

// PartialOptions are the options that change the sums; partials made with
// different ones cannot be merged.
type PartialOptions struct {
	Tol      float64  `json:"tol"`
	SumTol   float64  `json:"sum_tol"`
	SumBelow bool     `json:"sum_below"`
	Rules    []string `json:"rules,omitempty"`
	// RedundancyRows and MaxLayerBytes decide the rows of the redundancy pass.
	RedundancyRows int   `json:"redundancy_rows"`
	MaxLayerBytes  int64 `json:"max_layer_bytes"`
	NoRedundancy   bool  `json:"no_redundancy,omitempty"`
	NoStats        bool  `json:"no_stats,omitempty"`
	NoInfer        bool  `json:"no_infer,omitempty"`
	// Extra names the statistics declared with a row function that the
	// pass computed (statistic.go); partials computing other ones cannot
	// be merged.
	Extra []string `json:"extra,omitempty"`
}

// BlockPartial is the state of one block. Examples of a set share its
// layers, heads, kind and rules, but may differ in batch size, sequence
// lengths, window and prefix: Batch, Queries and Keys are the largest seen;
// Window, Prefix and QueryOffset are -1 when examples disagree.
type BlockPartial struct {
	Name        string   `json:"name"`
	Kind        string   `json:"kind"`
	DType       string   `json:"dtype"`
	Layers      int      `json:"layers"`
	Heads       int      `json:"heads"`
	Batch       int      `json:"batch"`
	Queries     int      `json:"queries"`
	Keys        int      `json:"keys"`
	QueryOffset int      `json:"query_offset"`
	Window      int      `json:"window"`
	Prefix      int      `json:"prefix"`
	KVHeads     int      `json:"kv_heads"`
	Rules       []string `json:"rules"`
	SelfAttn    bool     `json:"self_attention"`
	HasGrad     bool     `json:"grad"`
	// RowChecks are the row rules the pass ran on the block.
	RowChecks []string `json:"row_checks"`
	// RulesGiven is true when --rule chose the checks (Options.Rules).
	RulesGiven bool `json:"rules_given,omitempty"`
	// Coverage: who gave the kind ("option", "metadata", "attribute",
	// "inferred", "" = nobody) and, for an inferred or undecided kind, what
	// the data showed; the axes and who gave them ("rank" = guessed) and
	// the other common reading; how query rows were placed (loader.Block's
	// PosFrom; "unknown" with the reason in PosEvidence); the compute dtype
	// ("" = unknown) and the row-sum tolerances (RowSumTolerance). Examples
	// that disagree give "mixed"; Evidence keeps the smallest string.
	KindFrom     string  `json:"kind_from"`
	Evidence     string  `json:"evidence,omitempty"`
	Axes         string  `json:"axes"`
	AxesFrom     string  `json:"axes_from"`
	AxesOther    string  `json:"axes_other,omitempty"`
	PosFrom      string  `json:"positions,omitempty"`
	PosEvidence  string  `json:"positions_evidence,omitempty"`
	ComputeDType string  `json:"compute_dtype,omitempty"`
	SumTol       float64 `json:"sum_tol"`
	SumLoose     float64 `json:"sum_loose,omitempty"`
	// Units holds the accumulators of (layer, head) at index layer*Heads+head,
	// one per batch item (batch item b of every example adds to entry b).
	Units [][]HeadAcc `json:"units"`
	// Geometry holds, per batch item, what the rules forbid independently of
	// the values (for coverage in the diagnosis), summed over examples.
	Geometry []GeometryAcc `json:"geometry"`
	// Examples counts the examples that hold the block; ProblemExamples[r]
	// those in which rule r found a problem in some unit (a leaking cell, a
	// NaN row, a row off its sum, a negative cell, a cut unit).
	Examples        int64           `json:"examples"`
	ProblemExamples [numRules]int64 `json:"problem_examples"`
}

// Unit returns the accumulator of (layer, head, batch).
func (bp *BlockPartial) Unit(layer, head, batch int) *HeadAcc {
	return &bp.Units[layer*bp.Heads+head][batch]
}

// grow makes room for batch items [0, batch).
func (bp *BlockPartial) grow(batch int) {
	if batch <= bp.Batch {
		return
	}
	for i := range bp.Units {
		bp.Units[i] = append(bp.Units[i], make([]HeadAcc, batch-len(bp.Units[i]))...)
	}
	bp.Geometry = append(bp.Geometry, make([]GeometryAcc, batch-len(bp.Geometry))...)
	bp.Batch = batch
}

// absorb takes in the sizes of o (another example's or partial's block).
func (bp *BlockPartial) absorb(o *BlockPartial) {
	bp.grow(o.Batch)
	bp.Queries = max(bp.Queries, o.Queries)
	bp.Keys = max(bp.Keys, o.Keys)
	agree := func(a *int, b int) {
		if *a != b {
			*a = -1
		}
	}
	agree(&bp.Window, o.Window)
	agree(&bp.Prefix, o.Prefix)
	agree(&bp.QueryOffset, o.QueryOffset)
	agreeS := func(a *string, b string) {
		if *a != b {
			*a = "mixed"
		}
	}
	agreeS(&bp.KindFrom, o.KindFrom)
	agreeS(&bp.Axes, o.Axes)
	agreeS(&bp.AxesFrom, o.AxesFrom)
	agreeS(&bp.PosFrom, o.PosFrom)
	agreeS(&bp.ComputeDType, o.ComputeDType)
	if o.AxesOther != "" && (bp.AxesOther == "" || o.AxesOther < bp.AxesOther) {
		bp.AxesOther = o.AxesOther
	}
	if o.Evidence != "" && (bp.Evidence == "" || o.Evidence < bp.Evidence) {
		bp.Evidence = o.Evidence
	}
	if o.PosEvidence != "" && (bp.PosEvidence == "" || o.PosEvidence < bp.PosEvidence) {
		bp.PosEvidence = o.PosEvidence
	}
	bp.SumTol, bp.SumLoose = max(bp.SumTol, o.SumTol), max(bp.SumLoose, o.SumLoose)
	if fmt.Sprint(bp.RowChecks) != fmt.Sprint(o.RowChecks) {
		bp.RowChecks = unionStrings(bp.RowChecks, o.RowChecks)
	}
	if bp.DType != o.DType {
		bp.DType = "mixed"
	}
	bp.HasGrad = bp.HasGrad || o.HasGrad
}

// HeadAcc accumulates one (layer, head, batch item) over examples. Sums are
// exact; counts are int64; maxima are order-independent by construction.
type HeadAcc struct {
	Rows       int64 `json:"rows"`         // judged rows with finite values
	NaNRows    int64 `json:"nan_rows"`     // judged rows holding NaN or Inf
	PadRows    int64 `json:"pad_rows"`     // padding query rows (not judged)
	PadNaNRows int64 `json:"pad_nan_rows"` // padding query rows holding NaN or Inf

	Entropy     Sum   `json:"entropy"`
	EntropyNorm Sum   `json:"entropy_norm"`
	Confidence  Sum   `json:"confidence"`
	Distance    Sum   `json:"distance"`
	PosRows     int64 `json:"pos_rows"` // rows with a key at k = q-1 (prev share)
	Prev        Sum   `json:"prev"`
	SelfRows    int64 `json:"self_rows"` // rows with a key at k = q
	Self        Sum   `json:"self"`
	SinkRows    int64 `json:"sink_rows"`
	Sink        Sum   `json:"sink"`
	DocSinkRows int64 `json:"doc_sink_rows"`
	DocSink     Sum   `json:"doc_sink"`
	JSRows      int64 `json:"js_rows"` // (row, other head) pairs
	JS          Sum   `json:"js"`

	GradExamples int64 `json:"grad_examples"`
	Importance   Sum   `json:"importance"` // sum over examples of |sum_{q,k} A*G|
	GradRows     int64 `json:"grad_rows_skipped"`

	RowSum     Sum   `json:"row_sum"`
	SumBadRows int64 `json:"sum_bad_rows"`
	SumBadDev  Sum   `json:"sum_bad_dev"` // sum of |row sum - 1| over bad rows
	// SumLowRows counts rows off by more than the stored dtype's tolerance
	// but within a bfloat16 softmax's rounding, when the compute dtype is
	// unknown (RowSumTolerance); SumLowMax is their largest |sum - 1|.
	SumLowRows int64   `json:"sum_low_rows,omitempty"`
	SumLowMax  float64 `json:"sum_low_max,omitempty"`
	SumMin     float64 `json:"sum_min"`
	SumMax     float64 `json:"sum_max"`
	SumSeen    bool    `json:"sum_seen"`
	NegCells   int64   `json:"neg_cells"`
	NegRows    int64   `json:"neg_rows"`
	NegMass    Sum     `json:"neg_mass"`
	AllowCells int64   `json:"allowed_cells"`
	AllowZeros int64   `json:"allowed_zeros"`
	AllowMass  Sum     `json:"allowed_mass"`
	NaNWorst   Cell    `json:"nan_first"` // first NaN row seen (lowest example, query)
	SumWorst   Cell    `json:"sum_worst"`

	Leaks [numMask]LeakAcc `json:"leaks"` // indexed by Rule; [0] unused

	// InCausalLeak and InSumOff: what the diagnosis reads of the examples
	// in which this unit leaked under the causal rule, and in which it had
	// rows off their sum, so that the clean examples of a set do not
	// dilute it (an inverted mask: the allowed mass and the diagonal
	// share; train mode: the share of allowed cells exactly 0).
	InCausalLeak ExampleSlice `json:"in_causal_leak"`
	InSumOff     ExampleSlice `json:"in_sum_off"`
	// InCut is Cut over the examples in which this unit was cut.
	InCut CutAcc `json:"in_cut"`

	Cut CutAcc `json:"cut"` // rows cut off before keys they may see (rules_cut.go)

	// Extra holds the statistics declared with a row function
	// (statistic.go), by name: PartialOptions.Extra lists them.
	Extra map[string]StatAcc `json:"extra,omitempty"`
}

// StatAcc accumulates a statistic declared with a row function: the exact
// sum of its row values and the rows counted.
type StatAcc struct {
	Sum  Sum   `json:"sum"`
	Rows int64 `json:"rows"`
}

// LeakAcc accumulates the forbidden mass of one mask rule.
type LeakAcc struct {
	Mass      Sum   `json:"mass"`
	Cells     int64 `json:"cells"`     // forbidden cells with mass > tol
	Rows      int64 `json:"rows"`      // rows with at least one such cell
	Forbidden int64 `json:"forbidden"` // forbidden cells in judged finite rows
	Worst     Cell  `json:"worst"`
	// Offsets counts leaking cells by k - (absolute query position), for
	// positional rules.
	Offsets map[int]int64 `json:"offsets,omitempty"`
}

// Cell locates one value of an export: example (its first file), query row,
// key, and the value there. Set is false for an empty Cell.
type Cell struct {
	Set     bool    `json:"set"`
	Example string  `json:"example,omitempty"`
	Query   int     `json:"query"`
	Key     int     `json:"key"`
	Value   float64 `json:"value"`
}

// worse reports whether c should replace w as the worst cell: larger value,
// ties broken by example, query, key so the result does not depend on order.
func (c Cell) worse(w Cell) bool {
	if !c.Set {
		return false
	}
	if !w.Set || c.Value > w.Value {
		return true
	}
	if c.Value < w.Value {
		return false
	}
	if c.Example != w.Example {
		return c.Example < w.Example
	}
	if c.Query != w.Query {
		return c.Query < w.Query
	}
	return c.Key < w.Key
}

// first reports whether c comes before w (example, query, key order).
func (c Cell) first(w Cell) bool {
	if !c.Set {
		return false
	}
	if !w.Set {
		return true
	}
	if c.Example != w.Example {
		return c.Example < w.Example
	}
	if c.Query != w.Query {
		return c.Query < w.Query
	}
	return c.Key < w.Key
}

// ExampleSlice holds a unit's sums over some of its examples only
// (HeadAcc.InCausalLeak, InSumOff).
type ExampleSlice struct {
	AllowMass  Sum   `json:"allowed_mass"`
	AllowCells int64 `json:"allowed_cells"`
	AllowZeros int64 `json:"allowed_zeros"`
	Self       Sum   `json:"self"`
	SelfRows   int64 `json:"self_rows"`
}

// sliceOf is what an ExampleSlice takes of one example's unit.
func sliceOf(a *HeadAcc) ExampleSlice {
	return ExampleSlice{AllowMass: a.AllowMass, AllowCells: a.AllowCells, AllowZeros: a.AllowZeros, Self: a.Self, SelfRows: a.SelfRows}
}

func (e *ExampleSlice) merge(o *ExampleSlice) {
	e.AllowMass.Merge(o.AllowMass)
	e.AllowCells += o.AllowCells
	e.AllowZeros += o.AllowZeros
	e.Self.Merge(o.Self)
	e.SelfRows += o.SelfRows
}

// GeometryAcc counts, for one batch item over examples, the cells each
// positional rule forbids in judged rows, by offset k - q.
type GeometryAcc struct {
	Rows      int64                  `json:"rows"`
	Forbidden [numMask]map[int]int64 `json:"forbidden"`
	// Leaky is Forbidden over the examples in which the rule leaked at
	// this batch item only: how many cells could have leaked in the
	// examples that leak, which the diagnosis compares the leaking cells
	// with (a clean example of a set does not dilute a shifted mask).
	Leaky [numMask]map[int]int64 `json:"leaky"`
	// Reach counts the judged rows the cut check reads (cross blocks, prefix
	// rows) by the offset d = last allowed key - p (rules_cut.go); CutReach
	// the same over the examples in which a unit of this batch item was cut.
	Reach    map[int]int64 `json:"reach,omitempty"`
	CutReach map[int]int64 `json:"cut_reach,omitempty"`
}

// Merge adds o into a.
func (a *HeadAcc) Merge(o *HeadAcc) {
	a.Rows += o.Rows
	a.NaNRows += o.NaNRows
	a.PadRows += o.PadRows
	a.PadNaNRows += o.PadNaNRows
	a.Entropy.Merge(o.Entropy)
	a.EntropyNorm.Merge(o.EntropyNorm)
	a.Confidence.Merge(o.Confidence)
	a.Distance.Merge(o.Distance)
	a.PosRows += o.PosRows
	a.Prev.Merge(o.Prev)
	a.SelfRows += o.SelfRows
	a.Self.Merge(o.Self)
	a.SinkRows += o.SinkRows
	a.Sink.Merge(o.Sink)
	a.DocSinkRows += o.DocSinkRows
	a.DocSink.Merge(o.DocSink)
	a.JSRows += o.JSRows
	a.JS.Merge(o.JS)
	a.GradExamples += o.GradExamples
	a.Importance.Merge(o.Importance)
	a.GradRows += o.GradRows
	a.RowSum.Merge(o.RowSum)
	a.SumBadRows += o.SumBadRows
	a.SumBadDev.Merge(o.SumBadDev)
	a.SumLowRows += o.SumLowRows
	a.SumLowMax = max(a.SumLowMax, o.SumLowMax)
	if o.SumSeen {
		if !a.SumSeen || o.SumMin < a.SumMin {
			a.SumMin = o.SumMin
		}
		if !a.SumSeen || o.SumMax > a.SumMax {
			a.SumMax = o.SumMax
		}
		a.SumSeen = true
	}
	a.NegCells += o.NegCells
	a.NegRows += o.NegRows
	a.NegMass.Merge(o.NegMass)
	a.AllowCells += o.AllowCells
	a.AllowZeros += o.AllowZeros
	a.AllowMass.Merge(o.AllowMass)
	a.InCausalLeak.merge(&o.InCausalLeak)
	a.InSumOff.merge(&o.InSumOff)
	a.InCut.merge(&o.InCut)
	if o.NaNWorst.first(a.NaNWorst) {
		a.NaNWorst = o.NaNWorst
	}
	if o.SumWorst.worse(a.SumWorst) {
		a.SumWorst = o.SumWorst
	}
	for r := range a.Leaks {
		a.Leaks[r].merge(&o.Leaks[r])
	}
	a.Cut.merge(&o.Cut)
	for n, x := range o.Extra {
		if a.Extra == nil {
			a.Extra = make(map[string]StatAcc, len(o.Extra))
		}
		y := a.Extra[n]
		y.Sum.Merge(x.Sum)
		y.Rows += x.Rows
		a.Extra[n] = y
	}
}

func (l *LeakAcc) merge(o *LeakAcc) {
	l.Mass.Merge(o.Mass)
	l.Cells += o.Cells
	l.Rows += o.Rows
	l.Forbidden += o.Forbidden
	if o.Worst.worse(l.Worst) {
		l.Worst = o.Worst
	}
	l.Offsets = mergeCounts(l.Offsets, o.Offsets)
}

func mergeCounts(a, b map[int]int64) map[int]int64 {
	if len(b) == 0 {
		return a
	}
	if a == nil {
		a = make(map[int]int64, len(b))
	}
	for k, v := range b {
		a[k] += v
	}
	return a
}

func (g *GeometryAcc) merge(o *GeometryAcc) {
	g.Rows += o.Rows
	for r := range g.Forbidden {
		g.Forbidden[r] = mergeCounts(g.Forbidden[r], o.Forbidden[r])
		g.Leaky[r] = mergeCounts(g.Leaky[r], o.Leaky[r])
	}
	g.Reach = mergeCounts(g.Reach, o.Reach)
	g.CutReach = mergeCounts(g.CutReach, o.CutReach)
}

// sameShape reports why two block partials cannot be merged ("" when they can).
func (bp *BlockPartial) sameShape(o *BlockPartial) string {
	switch {
	case bp.Kind != o.Kind || bp.Layers != o.Layers || bp.Heads != o.Heads || bp.KVHeads != o.KVHeads || bp.SelfAttn != o.SelfAttn:
		return fmt.Sprintf("kind %q with %d layers x %d heads (kv %d) differs from kind %q with %d x %d (kv %d)",
			bp.Kind, bp.Layers, bp.Heads, bp.KVHeads, o.Kind, o.Layers, o.Heads, o.KVHeads)
	case fmt.Sprint(bp.Rules) != fmt.Sprint(o.Rules):
		return fmt.Sprintf("rules %v differ from %v", bp.Rules, o.Rules)
	}
	return ""
}

// Merge adds the state of o (other examples of the same model layout) into
// p. Blocks are matched by name; a block only one side has is kept as is.
// It fails when versions, options or block shapes differ.
func (p *Partial) Merge(o *Partial) error {
	if p.Version != PartialVersion || o.Version != PartialVersion {
		return fmt.Errorf("analysis: merge: partial version %q and %q, want %q", p.Version, o.Version, PartialVersion)
	}
	if fmt.Sprint(p.Options) != fmt.Sprint(o.Options) {
		return fmt.Errorf("analysis: merge: partials made with different options (%+v vs %+v)", p.Options, o.Options)
	}
	for _, ob := range o.Blocks {
		pb := p.block(ob.Name)
		if pb == nil {
			continue
		}
		if why := pb.sameShape(ob); why != "" {
			return fmt.Errorf("analysis: merge: block %s: %s", ob.Name, why)
		}
	}
	p.Examples += o.Examples
	for _, ob := range o.Blocks {
		pb := p.block(ob.Name)
		if pb == nil {
			p.Blocks = append(p.Blocks, cloneBlock(ob))
			continue
		}
		pb.merge(ob)
	}
	sort.Slice(p.Blocks, func(i, j int) bool { return p.Blocks[i].Name < p.Blocks[j].Name })
	return nil
}

// merge adds ob (the same block of other examples, of the same shape) into
// bp.
func (bp *BlockPartial) merge(ob *BlockPartial) {
	bp.absorb(ob)
	for i := range ob.Units {
		for b := range ob.Units[i] {
			bp.Units[i][b].Merge(&ob.Units[i][b])
		}
	}
	for b := range ob.Geometry {
		bp.Geometry[b].merge(&ob.Geometry[b])
	}
	bp.Examples += ob.Examples
	for r := range bp.ProblemExamples {
		bp.ProblemExamples[r] += ob.ProblemExamples[r]
	}
}

// exampleDone records, in the block of one example just analysed, which
// rules found a problem in it and where: the example counts (Examples,
// ProblemExamples), the cells that could leak at the batch items where a
// mask rule leaked (GeometryAcc.Leaky) and where a unit was cut
// (CutReach), and per unit the slices of it the diagnosis reads
// (InCausalLeak, InSumOff, InCut).
func (bp *BlockPartial) exampleDone() {
	bp.Examples = 1
	var found [numRules]bool
	for l := 0; l < bp.Layers; l++ {
		for h := 0; h < bp.Heads; h++ {
			for b := 0; b < bp.Batch; b++ {
				u := bp.Unit(l, h, b)
				for r := RuleCausal; r < numRules; r++ {
					if problemCount(u, r) == 0 {
						continue
					}
					found[r] = true
					if g := &bp.Geometry[b]; r.IsMask() && g.Leaky[r] == nil {
						g.Leaky[r] = mergeCounts(nil, g.Forbidden[r])
					}
				}
				if u.Leaks[RuleCausal].Cells > 0 {
					u.InCausalLeak = sliceOf(u)
				}
				if u.SumBadRows > 0 {
					u.InSumOff = sliceOf(u)
				}
				if g := &bp.Geometry[b]; isCut(&u.Cut, g.Reach) { // rules_cut.go
					found[RuleCut] = true
					u.InCut = CutAcc{}
					u.InCut.merge(&u.Cut)
					if g.CutReach == nil {
						g.CutReach = mergeCounts(nil, g.Reach)
					}
				}
			}
		}
	}
	for r, f := range found {
		if f {
			bp.ProblemExamples[r] = 1
		}
	}
}

func (p *Partial) block(name string) *BlockPartial {
	for _, b := range p.Blocks {
		if b.Name == name {
			return b
		}
	}
	return nil
}

func unionStrings(a, b []string) []string {
	out := append([]string(nil), a...)
	for _, x := range b {
		if !slices.Contains(out, x) {
			out = append(out, x)
		}
	}
	return out
}

func cloneBlock(b *BlockPartial) *BlockPartial {
	c := *b
	c.Rules = append([]string(nil), b.Rules...)
	c.RowChecks = append([]string(nil), b.RowChecks...)
	c.Units = make([][]HeadAcc, len(b.Units))
	for i := range b.Units {
		c.Units[i] = make([]HeadAcc, len(b.Units[i]))
		for j := range b.Units[i] {
			c.Units[i][j].Merge(&b.Units[i][j])
		}
	}
	c.Geometry = make([]GeometryAcc, len(b.Geometry))
	for i := range b.Geometry {
		c.Geometry[i].merge(&b.Geometry[i])
	}
	return &c
}

// maxPartialUnits bounds the (layer, head, batch item) accumulators a
// partial may declare: far above any model (64 layers x 128 heads x 2048
// batch items), far below what would exhaust memory.
const maxPartialUnits = 1 << 24

// DecodePartial reads a Partial from its JSON (a shard's file, which may be
// damaged or not heed's) and checks that it hangs together: the version,
// every block's shape against its accumulators, names, rules and counts. A
// Partial it returns can be merged and reported without surprises.
func DecodePartial(b []byte) (*Partial, error) {
	var p Partial
	if err := json.Unmarshal(b, &p); err != nil {
		return nil, err
	}
	if err := p.Validate(); err != nil {
		return nil, err
	}
	return &p, nil
}

// Validate checks that p hangs together (see DecodePartial).
func (p *Partial) Validate() error {
	if p.Version != PartialVersion {
		return fmt.Errorf("partial version %q, want %q", p.Version, PartialVersion)
	}
	if p.Examples < 0 {
		return fmt.Errorf("partial counts %d examples", p.Examples)
	}
	seen := map[string]bool{}
	for i, bp := range p.Blocks {
		if bp == nil {
			return fmt.Errorf("partial block %d is empty", i)
		}
		switch {
		case bp.Name == "" || seen[bp.Name]:
			return fmt.Errorf("partial block %d: name %q missing or repeated", i, bp.Name)
		case bp.Layers < 1 || bp.Heads < 1 || bp.Batch < 0 || bp.Queries < 0 || bp.Keys < 0:
			return fmt.Errorf("partial block %s: shape %d layers, %d heads, %d batch items, %d x %d", bp.Name, bp.Layers, bp.Heads, bp.Batch, bp.Queries, bp.Keys)
		case int64(bp.Layers)*int64(bp.Heads)*int64(max(bp.Batch, 1)) > maxPartialUnits:
			return fmt.Errorf("partial block %s: %d x %d x %d units is more than heed reads", bp.Name, bp.Layers, bp.Heads, bp.Batch)
		case len(bp.Units) != bp.Layers*bp.Heads:
			return fmt.Errorf("partial block %s: %d units for %d layers x %d heads", bp.Name, len(bp.Units), bp.Layers, bp.Heads)
		case len(bp.Geometry) != bp.Batch:
			return fmt.Errorf("partial block %s: geometry of %d batch items, %d declared", bp.Name, len(bp.Geometry), bp.Batch)
		case bp.Examples < 0 || bp.Examples > p.Examples:
			return fmt.Errorf("partial block %s: %d examples of the partial's %d", bp.Name, bp.Examples, p.Examples)
		}
		for r, n := range bp.ProblemExamples {
			if n < 0 || n > bp.Examples {
				return fmt.Errorf("partial block %s: rule %s found problems in %d of %d examples", bp.Name, Rule(r), n, bp.Examples)
			}
		}
		for b := range bp.Geometry {
			for r := range bp.Geometry[b].Leaky {
				for o, n := range bp.Geometry[b].Leaky[r] {
					if n < 0 || n > bp.Geometry[b].Forbidden[r][o] {
						return fmt.Errorf("partial block %s: batch item %d: %d cells of rule %s could leak at offset %d, of %d forbidden", bp.Name, b, n, Rule(r), o, bp.Geometry[b].Forbidden[r][o])
					}
				}
			}
		}
		seen[bp.Name] = true
		for j, u := range bp.Units {
			if len(u) != bp.Batch {
				return fmt.Errorf("partial block %s: unit %d holds %d batch items, %d declared", bp.Name, j, len(u), bp.Batch)
			}
			for k := range u {
				if a := &u[k]; a.Rows < 0 || a.NaNRows < 0 || a.PadRows < 0 || a.GradExamples < 0 {
					return fmt.Errorf("partial block %s: unit %d batch %d has negative counts", bp.Name, j, k)
				}
				for n, x := range u[k].Extra {
					if !slices.Contains(p.Options.Extra, n) || x.Rows < 0 {
						return fmt.Errorf("partial block %s: unit %d batch %d: statistic %q not listed in the options, or negative rows", bp.Name, j, k, n)
					}
				}
			}
		}
		for _, n := range bp.Rules {
			if r, err := ParseRule(n); err != nil || !r.IsMask() {
				return fmt.Errorf("partial block %s: rule %q", bp.Name, n)
			}
		}
	}
	return nil
}
