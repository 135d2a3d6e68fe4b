package analysis

import (
	"encoding/json"
	"fmt"
	"github.com/heed-dev/heed/internal/words"
	"math"
	"slices"
	"sort"
	"strings"
)

// Stats are the statistics of one head, over the judged rows of the examples
// (and batch items) they aggregate. Row quantities are means over judged
// rows whose values are all finite; NaN rows are counted, never averaged in.
// A mean over no rows is NaN.
type Stats struct {
	// Rows is the number of judged rows with finite values; NaNRows the
	// judged rows holding NaN or Inf; PadNaNRows the padding query rows
	// (not judged) holding NaN or Inf.
	Rows, NaNRows, PadNaNRows int64
	// Entropy is the mean row entropy in nats, -sum_k A ln A with 0 ln 0 = 0
	// (Clark et al. 2019, sec. 3.3); EntropyNorm divides each row's entropy by
	// ln n_q, n_q the keys the row may see (all keys without mask rules),
	// 0 when n_q = 1 (common practice).
	Entropy, EntropyNorm float64
	// Confidence is the mean row maximum (Voita et al. 2019, sec. 4).
	Confidence float64
	// PrevShare and SelfShare are the mean mass on k = q-1 and k = q
	// (absolute positions; self-attention only, else NaN).
	PrevShare, SelfShare float64
	// Distance is the mean attention distance sum_k A |k - q| (Dosovitskiy
	// et al. 2021, appendix D.7, with d = |q - k| for text).
	Distance float64
	// Sink is the mean mass on key 0 over rows other than query position 0
	// (Gu et al. 2025's sink score; a sink head has Sink > 0.3). DocSink is
	// the mean mass on the first key of the query's own document, over rows
	// that are not themselves the first of their document (= Sink without
	// segments).
	Sink, DocSink float64
	// Distinctness is the mean Jensen-Shannon divergence (nats, in [0, ln
	// 2]) between this head's rows and the same rows of each other head of
	// the layer (Clark et al. 2019, sec. 6): low = the head duplicates
	// others, high = it attends unlike them. (Reported as "redundancy"
	// before December 2026, a name that said the opposite of the value.)
	Distinctness float64
	// Importance is Michel et al. (2019)'s head importance E_x |sum_{q,k}
	// A*G| (see docs/methods.md), the mean over examples (each batch item of
	// each file is one example); NaN without gradients.
	Importance float64
	// LeakMass is the forbidden mass (cells above the tolerance, every mask
	// rule) per judged row; LeakCells counts those cells.
	LeakMass  float64
	LeakCells int64
	// RowSum is the mean row sum.
	RowSum float64
	// Extra holds the statistics of the table declared with a row function
	// (statistic.go), in table order: each the mean over the rows it
	// counted; NaN when the pass did not compute it.
	Extra []float64
}

// HeadStats are one head's statistics aggregated over batch items and
// examples, with the per-batch-item values in Batch.
type HeadStats struct {
	Layer, Head int
	Stats
	// ImportanceNorm is Importance divided by the L2 norm of the layer's
	// importances (Michel et al. 2019); NaN without gradients.
	ImportanceNorm float64
	// Score is the heuristic pruning score used without gradients
	// (ScoreName): Confidence * Distinctness / ln 2. Low = a diffuse head
	// that duplicates others.
	Score float64
	// Batch[b] aggregates batch item b of every example.
	Batch []Stats
}

// ScoreName names the heuristic score (HeadStats.Score) in output.
const ScoreName = "keep_score"

// ScoreDoc says what the heuristic score is made of.
const ScoreDoc = "keep_score = confidence (mean row maximum, Voita et al. 2019) x distinctness / ln 2 (mean Jensen-Shannon divergence to the layer's other heads, Clark et al. 2019); a heuristic, not an importance: low means a diffuse head that duplicates others"

// BlockResult is the analysis of one block.
type BlockResult struct {
	Name, Kind, DType          string
	Layers, Heads, Batch       int
	Queries, Keys, QueryOffset int
	Window, Prefix, KVHeads    int
	// Rules are the mask rules that were checked.
	Rules         []Rule
	SelfAttention bool
	HasGrad       bool
	// Stats holds one entry per (layer, head), layer-major.
	Stats []HeadStats

	bp *BlockPartial
}

// Head returns the statistics of (layer, head), nil when out of range.
func (br *BlockResult) Head(layer, head int) *HeadStats {
	if layer < 0 || layer >= br.Layers || head < 0 || head >= br.Heads {
		return nil
	}
	return &br.Stats[layer*br.Heads+head]
}

// Result is what a Partial means: statistics per head, findings grouped so
// that one bug is a few findings, and diagnoses naming the likely bugs.
type Result struct {
	Examples int64
	Blocks   []*BlockResult
	// Findings, worst (largest Mass) first.
	Findings []Finding
	// Diagnoses name the likely bugs behind the findings.
	Diagnoses []Diagnosis
	// Notes are things worth knowing that are not findings (e.g. padding
	// rows that are NaN, which are benign), as codes and numbers.
	Notes []Note
	// Coverage says, per block, what was judged and what was not.
	Coverage []Coverage
}

// Clean reports whether there are no findings. A result without findings
// is not "clean" as a verdict unless every block was judged: see Verdict.
func (r *Result) Clean() bool { return len(r.Findings) == 0 }

// Verdicts (Result.Verdict).
const (
	VerdictClean     = "clean"      // no findings, and every block's mask rules were judged
	VerdictFindings  = "findings"   // at least one finding
	VerdictNotJudged = "not_judged" // no findings, but some block's mask rules were not judged
)

// Verdict says what the result can claim: VerdictFindings when there are
// findings; otherwise VerdictNotJudged when some block's mask rules could
// not be judged (Coverage[i].Judged false: kind unknown and not inferred,
// query positions unknown, no judged row), else VerdictClean.
func (r *Result) Verdict() string {
	if len(r.Findings) > 0 {
		return VerdictFindings
	}
	for _, c := range r.Coverage {
		if !c.Judged {
			return VerdictNotJudged
		}
	}
	return VerdictClean
}

// Gap is something a verdict did not judge: what, why, and what would let
// heed judge it.
type Gap struct {
	Block string `json:"block"`
	// What: "mask" (no mask rule could be chosen: kind unknown), "positions"
	// (where the queries sit among the keys is unknown), "rows" (no query
	// row was judged).
	What string `json:"what"`
	Why  string `json:"why"`
	// Fix says how to let heed judge it in the export convention's terms
	// (a metadata key, an array); Setting names the setting that does it
	// ("kind", "query_start"), which the command line and the UI word as
	// their own option (words.WithOption) before showing Fix.
	Fix     string `json:"fix"`
	Setting string `json:"-"`
}

// Coverage says, for one block, what a verdict judged and what it did not.
type Coverage struct {
	Block string `json:"block"`
	Kind  string `json:"kind"`
	// KindFrom: "option" (the caller's: heed's --kind), "metadata", "attribute", "inferred" or "unknown".
	KindFrom string `json:"kind_from"`
	// Evidence: for an inferred or undecided kind, what the data showed.
	Evidence string `json:"evidence,omitempty"`
	Window   int    `json:"window,omitempty"`
	Prefix   int    `json:"prefix,omitempty"`
	Axes     string `json:"axes"`
	// AxesFrom: "option" (heed's --axes), "metadata", "attribute" or "rank" (guessed from
	// the array's rank); AxesOther the other common reading of a guess.
	AxesFrom  string `json:"axes_from"`
	AxesOther string `json:"axes_other,omitempty"`
	// Positions: how query rows were placed among the keys: "rows" (row q
	// is position q), "offset" (the last Q of K positions, assumed),
	// "qpos", "metadata" (query_start), "option" (heed's --query-start), "unknown".
	Positions string `json:"positions"`
	// ComputeDType is the dtype the model computed in ("" = unknown);
	// SumTol the row-sum tolerance applied; SumLoose, when not 0, the
	// tolerance of rows explained by a lower compute precision.
	ComputeDType string   `json:"compute_dtype"`
	SumTol       float64  `json:"sum_tol"`
	SumLoose     float64  `json:"sum_loose,omitempty"`
	MaskRules    []string `json:"mask_rules"`
	RowChecks    []string `json:"row_checks"`
	// JudgedRows counts judged (query row, head) pairs over batch items and
	// examples; ForbiddenCells, per mask rule, the cells it forbids in them
	// (where a leak could show).
	JudgedRows     int64            `json:"judged_rows"`
	ForbiddenCells map[string]int64 `json:"forbidden_cells"`
	// Judged is false when the block's mask rules were not judged;
	// NotJudged says what, why, and how to let heed judge it.
	Judged    bool  `json:"judged"`
	NotJudged []Gap `json:"not_judged"`
}

func coverageOf(bp *BlockPartial) Coverage {
	c := Coverage{Block: bp.Name, Kind: bp.Kind, KindFrom: bp.KindFrom, Evidence: bp.Evidence, Axes: bp.Axes,
		AxesFrom: bp.AxesFrom, AxesOther: bp.AxesOther, Positions: bp.PosFrom, ComputeDType: bp.ComputeDType,
		SumTol: bp.SumTol, SumLoose: bp.SumLoose, MaskRules: append([]string{}, bp.Rules...),
		RowChecks: append([]string{}, bp.RowChecks...), ForbiddenCells: map[string]int64{}, NotJudged: []Gap{}, Judged: true}
	if max(bp.Window, 0) > 0 && slices.Contains(bp.Rules, RuleWindow.String()) {
		c.Window = bp.Window
	}
	if max(bp.Prefix, 0) > 0 && slices.Contains(bp.Rules, RulePrefix.String()) {
		c.Prefix = bp.Prefix
	}
	if c.KindFrom == "" {
		c.KindFrom = "unknown"
	}
	if c.Positions == "" {
		c.Positions = "rows"
	}
	for i := range bp.Units {
		for j := range bp.Units[i] {
			u := &bp.Units[i][j]
			c.JudgedRows += u.Rows + u.NaNRows
			for r := RuleCausal; r < numMask; r++ {
				if u.Leaks[r].Forbidden > 0 {
					c.ForbiddenCells[r.String()] += u.Leaks[r].Forbidden
				}
			}
		}
	}
	gap := func(what, why, fix, setting string) {
		c.Judged = false
		c.NotJudged = append(c.NotJudged, Gap{Block: bp.Name, What: what, Why: why, Fix: fix, Setting: setting})
	}
	if bp.Kind == "" && !bp.RulesGiven {
		why := "kind unknown: no metadata said it"
		if bp.Evidence != "" {
			why += "; from the data: " + bp.Evidence
		}
		gap("mask", why, fmt.Sprintf("say the kind: meta blocks.%s.kind", bp.Name), "kind")
	}
	if bp.PosFrom == "unknown" || bp.PosFrom == "mixed" {
		why := bp.PosEvidence
		if why == "" {
			why = "examples place their queries differently"
		}
		gap("positions", why, fmt.Sprintf("give the queries' key positions: meta blocks.%s.query_start (one, or one per batch item), an array %s/qpos [batch, query]", bp.Name, bp.Name), "query_start")
	}
	if c.JudgedRows == 0 {
		gap("rows", "no query row was judged (every query row is padding, or the block is empty)", "check valid/"+"SIDE of the block's query side", "")
	}
	return c
}

// WordGaps rewrites every not-judged entry's Fix with word(setting, fix):
// how the command line or the UI names the setting that would let heed
// judge it (the engine's own words name only the export convention).
func (r *Result) WordGaps(word func(setting, fix string) string) {
	for i := range r.Coverage {
		for j := range r.Coverage[i].NotJudged {
			g := &r.Coverage[i].NotJudged[j]
			g.Fix = word(g.Setting, g.Fix)
		}
	}
}

// Block returns the named block's result, or nil.
func (r *Result) Block(name string) *BlockResult {
	for _, b := range r.Blocks {
		if b.Name == name {
			return b
		}
	}
	return nil
}

func mean(s Sum, n int64) float64 {
	if n == 0 {
		return math.NaN()
	}
	return s.Float64() / float64(n)
}

func statsOf(a *HeadAcc, grad, self, rowStats bool) Stats {
	s := Stats{
		Rows: a.Rows, NaNRows: a.NaNRows, PadNaNRows: a.PadNaNRows,
		Entropy: mean(a.Entropy, a.Rows), EntropyNorm: mean(a.EntropyNorm, a.Rows),
		Confidence: mean(a.Confidence, a.Rows), Distance: mean(a.Distance, a.Rows),
		PrevShare: mean(a.Prev, a.PosRows), SelfShare: mean(a.Self, a.SelfRows),
		Sink: mean(a.Sink, a.SinkRows), DocSink: mean(a.DocSink, a.DocSinkRows),
		Distinctness: mean(a.JS, a.JSRows), Importance: math.NaN(), RowSum: mean(a.RowSum, a.Rows),
	}
	if !self {
		s.PrevShare, s.SelfShare = math.NaN(), math.NaN()
	}
	if !rowStats { // Options.NoStats
		s.Entropy, s.EntropyNorm, s.Confidence, s.Distance = math.NaN(), math.NaN(), math.NaN(), math.NaN()
	}
	if grad && a.GradExamples > 0 {
		s.Importance = a.Importance.Float64() / float64(a.GradExamples)
	}
	var leak Sum
	for r := RuleCausal; r < numMask; r++ {
		leak.Merge(a.Leaks[r].Mass)
		s.LeakCells += a.Leaks[r].Cells
	}
	s.LeakMass = mean(leak, a.Rows)
	if len(extraStats) > 0 {
		s.Extra = make([]float64, len(extraStats))
		for i := range extraStats {
			x, ok := a.Extra[extraStats[i].Name]
			s.Extra[i] = math.NaN()
			if ok && rowStats {
				s.Extra[i] = mean(x.Sum, x.Rows)
			}
		}
	}
	return s
}

// Result computes statistics, findings and diagnoses from the partial. It
// does not change p.
func (p *Partial) Result() *Result {
	res := &Result{Examples: p.Examples}
	for _, bp := range p.Blocks {
		br := &BlockResult{
			Name: bp.Name, Kind: bp.Kind, DType: bp.DType, Layers: bp.Layers, Heads: bp.Heads, Batch: bp.Batch,
			Queries: bp.Queries, Keys: bp.Keys, QueryOffset: bp.QueryOffset, Window: bp.Window, Prefix: bp.Prefix,
			KVHeads: bp.KVHeads, SelfAttention: bp.SelfAttn, HasGrad: bp.HasGrad, bp: bp,
		}
		for _, n := range bp.Rules {
			if r, err := ParseRule(n); err == nil {
				br.Rules = append(br.Rules, r)
			}
		}
		br.Stats = make([]HeadStats, bp.Layers*bp.Heads)
		for l := 0; l < bp.Layers; l++ {
			var norm2 float64
			for h := 0; h < bp.Heads; h++ {
				var all HeadAcc
				hs := &br.Stats[l*bp.Heads+h]
				hs.Layer, hs.Head = l, h
				hs.Batch = make([]Stats, bp.Batch)
				for b := 0; b < bp.Batch; b++ {
					u := bp.Unit(l, h, b)
					hs.Batch[b] = statsOf(u, bp.HasGrad, bp.SelfAttn, !p.Options.NoStats)
					all.Merge(u)
				}
				hs.Stats = statsOf(&all, bp.HasGrad, bp.SelfAttn, !p.Options.NoStats)
				hs.Score = hs.Confidence * hs.Distinctness / math.Ln2
				if bp.Heads == 1 {
					hs.Score = hs.Confidence
				}
				norm2 += hs.Importance * hs.Importance
			}
			for h := 0; h < bp.Heads; h++ {
				hs := &br.Stats[l*bp.Heads+h]
				switch {
				case math.IsNaN(hs.Importance):
					hs.ImportanceNorm = math.NaN()
				case norm2 == 0:
					hs.ImportanceNorm = 0
				default:
					hs.ImportanceNorm = hs.Importance / math.Sqrt(norm2)
				}
			}
		}
		res.Blocks = append(res.Blocks, br)
		res.Findings = append(res.Findings, findings(bp)...)
		res.Notes = append(res.Notes, notes(bp)...)
		res.Coverage = append(res.Coverage, coverageOf(bp))
	}
	// worst first: NaN rows and leaks by mass; diagnoses follow that order
	sort.SliceStable(res.Findings, func(i, j int) bool { return res.Findings[i].Mass > res.Findings[j].Mass })
	for _, f := range res.Findings {
		res.Diagnoses = append(res.Diagnoses, diagnose(p.block(f.Block), []Finding{f})...)
	}
	return res
}

// Note is something worth knowing that is not a finding, as a code and
// the numbers its words need (package internal/prose words it; a new
// code's words go there):
//
//	pad_nan         padding query rows hold NaN (benign unless it spreads): Rows of Of padding rows
//	sum_low         Rows sum to 1 only within Max: a lower compute precision's rounding, judged
//	                at SumLoose instead of SumTol for the stored DType (the words name the
//	                compute_dtype setting)
//	heads_averaged  the head axis has length 1: heads were probably averaged at export
type Note struct {
	Code     string  `json:"code"`
	Block    string  `json:"block"`
	Rows     int64   `json:"rows,omitempty"`
	Of       int64   `json:"of,omitempty"`
	Max      float64 `json:"max,omitempty"`
	DType    string  `json:"dtype,omitempty"`
	SumTol   float64 `json:"sum_tol,omitempty"`
	SumLoose float64 `json:"sum_loose,omitempty"`
}

// Note codes (Note.Code).
const (
	NotePadNaN        = "pad_nan"
	NoteSumLow        = "sum_low"
	NoteHeadsAveraged = "heads_averaged"
)

func notes(bp *BlockPartial) []Note {
	var pad, padNaN int64
	for i := range bp.Units {
		for j := range bp.Units[i] {
			pad += bp.Units[i][j].PadRows
			padNaN += bp.Units[i][j].PadNaNRows
		}
	}
	var out []Note
	if padNaN > 0 {
		out = append(out, Note{Code: NotePadNaN, Block: bp.Name, Rows: padNaN, Of: pad})
	}
	var low int64
	var lowMax float64
	for i := range bp.Units {
		for j := range bp.Units[i] {
			low += bp.Units[i][j].SumLowRows
			lowMax = max(lowMax, bp.Units[i][j].SumLowMax)
		}
	}
	if low > 0 {
		out = append(out, Note{Code: NoteSumLow, Block: bp.Name, Rows: low, Max: lowMax, DType: bp.DType, SumTol: bp.SumTol, SumLoose: bp.SumLoose})
	}
	if bp.Heads == 1 {
		out = append(out, Note{Code: NoteHeadsAveraged, Block: bp.Name})
	}
	return out
}

// Location is a place in an export, printed as a LOC a person can paste:
// BLOCK:L<layer>:H<head>:B<batch>:q<query> (see the README).
type Location struct {
	Block   string  `json:"block"`
	Layer   int     `json:"layer"`
	Head    int     `json:"head"`
	Batch   int     `json:"batch"`
	Query   int     `json:"query"`
	Key     int     `json:"key"` // -1 for row findings
	Value   float64 `json:"value"`
	Example string  `json:"example,omitempty"`
}

// MarshalJSON adds "loc", the location as a LOC string.
func (l Location) MarshalJSON() ([]byte, error) {
	type plain Location
	return json.Marshal(struct {
		plain
		Loc string `json:"loc"`
	}{plain(l), l.String()})
}

// String formats the location as a LOC (words.Loc), the key included when
// the location is a cell.
func (l Location) String() string {
	return words.Loc{Block: l.Block, Layer: l.Layer, Head: l.Head, Batch: l.Batch, Query: l.Query, Key: l.Key}.String()
}

// OffsetCount is how many leaking cells sit at offset k - q.
type OffsetCount struct {
	Offset int   `json:"offset"`
	Count  int64 `json:"count"`
}

// Finding is one group of problems of one rule in one block: the leaking
// (layer, head, batch item) units form the product Layers x Heads x Batches.
//
// Mass is the total forbidden mass for mask rules, the number of NaN rows for
// nan_rows, the total |row sum - 1| for row_sum and the total negative mass
// for negative, 0 for cut (an under-allowing mask has no forbidden mass).
// Cells counts leaking cells (negative cells for negative, allowed cells left
// without mass for cut, 0 for the other row rules); Max is the largest
// leaking value (largest |sum - 1| for row_sum); Rows the rows concerned;
// JudgedRows the judged rows of the group. Offsets, for cut, count the cut
// rows by the offset k - p of their last nonzero key.
type Finding struct {
	Block      string        `json:"block"`
	Rule       Rule          `json:"rule"`
	Layers     []int         `json:"layer"`
	Heads      []int         `json:"head"`
	Batches    []int         `json:"batch"`
	Mass       float64       `json:"mass"`
	Cells      int64         `json:"cells"`
	Max        float64       `json:"max"`
	Rows       int64         `json:"rows"`
	JudgedRows int64         `json:"judged_rows"`
	Offsets    []OffsetCount `json:"offsets,omitempty"`
	// InExamples counts the examples in which the rule found a problem in
	// this block (BlockPartial.ProblemExamples).
	InExamples int64 `json:"in_examples,omitempty"`
	// Worst is the cell to look at first (the largest leak, the first NaN
	// row, the row furthest from summing to 1).
	Worst Location `json:"worst"`

	agg HeadAcc // the group's units merged, for the diagnosis
}

type triple struct{ l, h, b int }

func hasProblem(a *HeadAcc, r Rule) bool { return problemCount(a, r) > 0 }

// problemCount is what a unit counts of rule r's problems: NaN rows, rows
// off their sum, negative cells, a mask rule's leaking cells (0 for
// RuleCut, judged per example by exampleDone: rules_cut.go).
func problemCount(a *HeadAcc, r Rule) int64 {
	switch r {
	case RuleNaNRows:
		return a.NaNRows
	case RuleRowSum:
		return a.SumBadRows
	case RuleNegative:
		return a.NegCells
	case RuleCut:
		return 0
	}
	return a.Leaks[r].Cells
}

// findings groups the problem units of every rule into products of layer,
// head and batch sets: first layers with the same set of (head, batch)
// units, then within those heads with the same batch set.
func findings(bp *BlockPartial) []Finding {
	var out []Finding
	for r := RuleCausal; r < numRules; r++ {
		byLayer := map[int][]triple{}
		for l := 0; l < bp.Layers; l++ {
			for h := 0; h < bp.Heads; h++ {
				for b := 0; b < bp.Batch; b++ {
					if problem(bp, b, bp.Unit(l, h, b), r) { // rules_cut.go
						byLayer[l] = append(byLayer[l], triple{l, h, b})
					}
				}
			}
		}
		if len(byLayer) == 0 {
			continue
		}
		type lgroup struct {
			layers []int
			hb     []triple
		}
		var lgs []*lgroup
		seen := map[string]*lgroup{}
		for l := 0; l < bp.Layers; l++ {
			ts, ok := byLayer[l]
			if !ok {
				continue
			}
			var key strings.Builder
			for _, t := range ts {
				fmt.Fprintf(&key, "%d.%d,", t.h, t.b)
			}
			if g := seen[key.String()]; g != nil {
				g.layers = append(g.layers, l)
				continue
			}
			g := &lgroup{layers: []int{l}, hb: ts}
			seen[key.String()] = g
			lgs = append(lgs, g)
		}
		for _, lg := range lgs {
			byHead := map[int][]int{}
			var heads []int
			for _, t := range lg.hb {
				if _, ok := byHead[t.h]; !ok {
					heads = append(heads, t.h)
				}
				byHead[t.h] = append(byHead[t.h], t.b)
			}
			hseen := map[string]int{}
			var hgroups [][]int
			var bsets [][]int
			for _, h := range heads {
				key := fmt.Sprint(byHead[h])
				if i, ok := hseen[key]; ok {
					hgroups[i] = append(hgroups[i], h)
					continue
				}
				hseen[key] = len(hgroups)
				hgroups = append(hgroups, []int{h})
				bsets = append(bsets, byHead[h])
			}
			for i := range hgroups {
				out = append(out, makeFinding(bp, r, lg.layers, hgroups[i], bsets[i]))
			}
		}
	}
	return out
}

func makeFinding(bp *BlockPartial, r Rule, layers, heads, batches []int) Finding {
	f := Finding{Block: bp.Name, Rule: r, Layers: layers, Heads: heads, Batches: batches, InExamples: bp.ProblemExamples[r]}
	var worst Cell
	var wl, wh, wb int
	var first Cell
	for _, l := range layers {
		for _, h := range heads {
			for _, b := range batches {
				u := bp.Unit(l, h, b)
				f.agg.Merge(u)
				f.JudgedRows += u.Rows + u.NaNRows
				var c Cell
				switch {
				case r == RuleNaNRows || r == RuleCut:
					c = u.NaNWorst
					if r == RuleCut {
						c = u.InCut.First
					}
					// the first NaN (cut) row in layer order: lowest layer wins
					if c.Set && !first.Set {
						first, wl, wh, wb = c, l, h, b
					}
					continue
				case r == RuleRowSum:
					c = u.SumWorst
				case r == RuleNegative:
					continue
				default:
					c = u.Leaks[r].Worst
				}
				if c.Set && (!worst.Set || c.Value > worst.Value) {
					worst, wl, wh, wb = c, l, h, b
				}
			}
		}
	}
	if r == RuleNaNRows || r == RuleCut {
		worst = first
	}
	a := &f.agg
	switch r {
	case RuleNaNRows:
		f.Mass, f.Rows = float64(a.NaNRows), a.NaNRows
	case RuleRowSum:
		f.Mass, f.Rows, f.Max = a.SumBadDev.Float64(), a.SumBadRows, worst.Value
	case RuleNegative:
		f.Mass, f.Rows, f.Cells = a.NegMass.Float64(), a.NegRows, a.NegCells
	case RuleCut:
		// no forbidden mass: the mask took mass away from allowed keys,
		// and how much the export cannot tell
		f.Rows, f.Cells, f.Offsets = a.InCut.Rows, a.InCut.Cells, stopsList(a.InCut.Stops)
	default:
		la := &a.Leaks[r]
		f.Mass, f.Cells, f.Rows, f.Max = la.Mass.Float64(), la.Cells, la.Rows, worst.Value
		if r.Positional() {
			for o, n := range la.Offsets {
				f.Offsets = append(f.Offsets, OffsetCount{o, n})
			}
			sort.Slice(f.Offsets, func(i, j int) bool { return f.Offsets[i].Offset < f.Offsets[j].Offset })
		}
	}
	if worst.Set {
		f.Worst = Location{Block: bp.Name, Layer: wl, Head: wh, Batch: wb, Query: worst.Query, Key: worst.Key, Value: worst.Value, Example: worst.Example}
	} else {
		f.Worst = Location{Block: bp.Name, Layer: layers[0], Head: heads[0], Batch: batches[0], Key: -1}
	}
	if r == RuleNaNRows {
		f.Worst.Value = 0
	}
	return f
}
