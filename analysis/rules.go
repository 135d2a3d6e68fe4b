package analysis

import (
	"fmt"
	"strings"
	"sync"

	"github.com/heed-dev/heed/loader"
)

// Rule names a check. The mask rules (RuleCausal .. RuleExplicit) say which
// cells a query may not attend to; the row rules (RuleNaNRows, RuleRowSum,
// RuleNegative, RuleCut) judge whole rows. RuleCut is the one check of an
// under-allowing mask: rows of a cross block, and prefix rows of a prefix-LM,
// whose mass stops before the last key the mask rules allow (rules_cut.go).
// RuleNone (0) means "allowed".
type Rule uint8

// The rules, in the priority order used when several mask rules forbid the
// same cell (the first one is reported).
const (
	RuleNone Rule = iota
	RuleCausal
	RulePrefix
	RuleWindow
	RuleSegments
	RulePadding
	RuleExplicit
	RuleNaNRows
	RuleRowSum
	RuleNegative
	RuleCut
	numRules
)

// RuleInvariance is the causal-invariance check's rule (heed check A
// --against B; package analysis/invariance). It compares two exports, so it comes
// after numRules: the attention pass's loops over rules never see it.
const RuleInvariance = numRules

// numMask is one past the last mask rule: mask rules are 1 <= r < numMask.
const numMask = RuleNaNRows

var ruleNames = [...]string{
	RuleNone: "none", RuleCausal: "causal", RulePrefix: "prefix", RuleWindow: "window",
	RuleSegments: "segments", RulePadding: "padding", RuleExplicit: "explicit",
	RuleNaNRows: "nan_rows", RuleRowSum: "row_sum", RuleNegative: "negative", RuleCut: "cut",
	RuleInvariance: "invariance",
}

// String returns the rule's name as written in JSON and accepted in a rule
// selection (Options.Rules).
func (r Rule) String() string {
	if int(r) < len(ruleNames) {
		return ruleNames[r]
	}
	return fmt.Sprintf("rule(%d)", r)
}

// IsMask reports whether r is a mask rule (a rule about cells).
func (r Rule) IsMask() bool { return r >= RuleCausal && r < numMask }

// Positional reports whether a rule's findings carry offsets k - q.
func (r Rule) Positional() bool { return r == RuleCausal || r == RulePrefix || r == RuleWindow }

// MarshalText writes the rule's name.
func (r Rule) MarshalText() ([]byte, error) { return []byte(r.String()), nil }

// ParseRule returns the rule with the given name (see Rule.String).
func ParseRule(s string) (Rule, error) {
	for i, n := range ruleNames {
		if i > 0 && n == strings.TrimSpace(s) {
			return Rule(i), nil
		}
	}
	return RuleNone, fmt.Errorf("analysis: unknown rule %q (want one of %s)", s, strings.Join(ruleNames[1:], ", "))
}

// Rules are the mask rules of one block: which keys each query may see, from
// the block's kind and metadata (causal, window W, prefix P, KV-cache query
// offset), its sides' padding and document segments, and its explicit allow
// mask. Build them with NewRules. Row and Judged are safe for concurrent use;
// Cell caches the last explicit mask it read and is not.
type Rules struct {
	Kind                       loader.Kind
	Queries, Keys, QueryOffset int
	Window, Prefix             int
	qpos                       [][]int // per batch item (or one shared row), nil = q + QueryOffset
	maxPos                     int
	active                     [numMask]bool
	sameSide                   bool
	validQ, validK             [][]bool  // per batch item, nil = all valid
	segK                       [][]int64 // per batch item, nil = one document
	docStart                   [][]int   // per batch item: first position of the document of each key position
	allow                      func(batch, head int, dst []bool) error
	batch                      int
	mu                         sync.Mutex
	cacheB, cacheH             int
	cache                      []bool
}

// NewRules builds the rules of blk. qside and kside are the block's query and
// key sides (nil when the export has none). only, when not empty, replaces
// the mask rules that follow from the block's kind and metadata (the rule
// selection, Options.Rules); row rules in it are ignored here. A rule in only that the block
// cannot support (window without W, prefix without P, padding without valid,
// segments without segments, explicit without allow) is an error.
func NewRules(blk *loader.Block, qside, kside *loader.Side, only []Rule) (*Rules, error) {
	r := &Rules{
		Kind: blk.Kind, Queries: blk.Queries, Keys: blk.Keys, QueryOffset: blk.QueryOffset,
		Window: blk.Window, Prefix: blk.Prefix, batch: blk.Batch, cacheB: -1, qpos: blk.QPos,
	}
	r.maxPos = blk.QueryOffset + blk.Queries - 1
	for _, row := range r.qpos {
		for _, p := range row {
			r.maxPos = max(r.maxPos, p)
		}
	}
	r.sameSide = blk.Kind != loader.KindCross && (blk.QuerySide == blk.KeySide)
	r.validQ = sideValid(qside, blk.Batch, r.maxPos+1)
	r.validK = sideValid(kside, blk.Batch, blk.Keys)
	if r.sameSide && kside != nil && len(kside.Segments) > 0 {
		r.segK = make([][]int64, blk.Batch)
		r.docStart = make([][]int, blk.Batch)
		for b := 0; b < blk.Batch; b++ {
			seg := make([]int64, blk.Keys)
			ds := make([]int, blk.Keys)
			for k := range seg {
				seg[k] = kside.Segment(b, k)
				if k > 0 && seg[k] == seg[k-1] {
					ds[k] = ds[k-1]
				} else {
					ds[k] = k
				}
			}
			r.segK[b], r.docStart[b] = seg, ds
		}
	}
	if blk.HasAllow {
		r.allow = blk.ReadAllow
	}
	can := [numMask]bool{
		RuleCausal:   true,
		RulePrefix:   blk.Prefix > 0,
		RuleWindow:   blk.Window > 0,
		RuleSegments: r.segK != nil,
		RulePadding:  r.validK != nil,
		RuleExplicit: r.allow != nil,
	}
	if len(only) == 0 {
		// where the queries sit is unknown (loader.Block.PosFrom): the
		// positional rules would compare keys with wrong positions
		causal := blk.Kind == loader.KindCausal && blk.PosFrom != "unknown"
		r.active[RuleCausal] = causal
		r.active[RulePrefix] = causal && can[RulePrefix]
		r.active[RuleWindow] = can[RuleWindow] && blk.PosFrom != "unknown"
		r.active[RuleSegments] = can[RuleSegments]
		r.active[RulePadding] = can[RulePadding]
		r.active[RuleExplicit] = can[RuleExplicit]
		return r, nil
	}
	for _, x := range only {
		if !x.IsMask() {
			continue
		}
		if !can[x] {
			return nil, &RuleNeedsError{Block: blk.Name, Rule: x}
		}
		r.active[x] = true
	}
	if r.active[RulePrefix] && !r.active[RuleCausal] {
		return nil, fmt.Errorf("analysis: block %s: rule prefix only makes sense with rule causal", blk.Name)
	}
	return r, nil
}

// RuleNeedsError is the error of a mask rule asked for (Options.Rules) on a
// block that lacks what the rule needs; it says what, in the export
// convention's terms, and callers add their own option for it (the prefix
// and window settings).
type RuleNeedsError struct {
	Block string
	Rule  Rule
}

func (e *RuleNeedsError) Error() string {
	return fmt.Sprintf("analysis: block %s: rule %s needs %s", e.Block, e.Rule, ruleNeeds[e.Rule])
}

var ruleNeeds = [numMask]string{
	RulePrefix:   "a prefix length (meta \"prefix\")",
	RuleWindow:   "a window (meta \"window\")",
	RuleSegments: "document ids (segments/SIDE) on a self-attention block",
	RulePadding:  "a padding mask (valid/SIDE)",
	RuleExplicit: "an explicit mask (BLOCK/allow)",
}

func sideValid(s *loader.Side, batch, n int) [][]bool {
	if s == nil || len(s.Valid) == 0 {
		return nil
	}
	out := make([][]bool, batch)
	for b := range out {
		row := make([]bool, n)
		for i := range row {
			row[i] = s.IsValid(b, i)
		}
		out[b] = row
	}
	return out
}

// Active lists the mask rules that apply, in priority order.
func (r *Rules) Active() []Rule {
	var out []Rule
	for x := RuleCausal; x < numMask; x++ {
		if r.active[x] {
			out = append(out, x)
		}
	}
	return out
}

// Has reports whether mask rule x applies.
func (r *Rules) Has(x Rule) bool { return x.IsMask() && r.active[x] }

// RowChecks lists the row rules the attention pass runs on the block of r
// with the rule selection (Options.Rules) selected (nil = none: every row check), as the
// pass decides them: nan_rows, row_sum and negative (rowChecks), then cut
// where it reads rows (cutBlock: a cross block, or the prefix rule applies).
func (r *Rules) RowChecks(selected []Rule) []Rule {
	var out []Rule
	nan, sum, neg := rowChecks(selected)
	for _, c := range []struct {
		on bool
		r  Rule
	}{{nan, RuleNaNRows}, {sum, RuleRowSum}, {neg, RuleNegative}, {cutCheck(selected) && cutBlock(r), RuleCut}} {
		if c.on {
			out = append(out, c.r)
		}
	}
	return out
}

// SelfAttention reports whether queries and keys are positions of the same
// sequence (so k - q offsets, positional shares and sinks are meaningful).
func (r *Rules) SelfAttention() bool { return r.sameSide }

// Pos returns the key position of query row q of batch item b: q plus the
// KV-cache offset, or the block's query positions (loader.Block.QueryPos).
func (r *Rules) Pos(b, q int) int {
	if r.qpos == nil {
		return q + r.QueryOffset
	}
	if b < len(r.qpos) {
		return r.qpos[b][q]
	}
	return r.qpos[0][q]
}

// MaxPos is the largest key position of any query row.
func (r *Rules) MaxPos() int { return r.maxPos }

// Judged reports whether query row q of batch item b is judged: padding
// query rows are not.
func (r *Rules) Judged(b, q int) bool {
	if r.validQ == nil {
		return true
	}
	return r.validQ[b][r.Pos(b, q)]
}

// DocStart returns the first key position of the document that holds
// position p of batch item b (0 without segments).
func (r *Rules) DocStart(b, p int) int {
	if r.docStart == nil || p < 0 || p >= r.Keys {
		return 0
	}
	return r.docStart[b][p]
}

// Row fills dst (length Keys) with the rule that forbids each key of query
// row q of batch item b, RuleNone where the key is allowed. allowRow is that
// row of the explicit mask (nil without one).
func (r *Rules) Row(b, q int, allowRow []bool, dst []Rule) {
	for k := range dst {
		dst[k] = RuleNone
	}
	p := r.Pos(b, q)
	K := r.Keys
	if r.active[RuleCausal] {
		if r.active[RulePrefix] && p < r.Prefix {
			for k := max(r.Prefix, p+1); k < K; k++ {
				dst[k] = RulePrefix
			}
		} else {
			for k := p + 1; k < K; k++ {
				dst[k] = RuleCausal
			}
		}
	}
	if r.active[RuleWindow] {
		for k := 0; k <= p-r.Window && k < K; k++ {
			if dst[k] == RuleNone {
				dst[k] = RuleWindow
			}
		}
	}
	if r.active[RuleSegments] {
		seg := r.segK[b]
		var own int64
		if p >= 0 && p < K {
			own = seg[p]
		}
		for k := range dst {
			if dst[k] == RuleNone && seg[k] != own {
				dst[k] = RuleSegments
			}
		}
	}
	if r.active[RulePadding] {
		v := r.validK[b]
		for k := range dst {
			if dst[k] == RuleNone && !v[k] {
				dst[k] = RulePadding
			}
		}
	}
	if r.active[RuleExplicit] && allowRow != nil {
		for k := range dst {
			if dst[k] == RuleNone && !allowRow[k] {
				dst[k] = RuleExplicit
			}
		}
	}
}

// Cell tells whether query row q of (batch b, head h) may attend to key k,
// and if not which rule forbids it (RuleNone = allowed). It reads the
// explicit mask of (b, h) when the block has one and caches it; the TUI's Map
// uses it to mark forbidden cells. Not safe for concurrent use.
func (r *Rules) Cell(b, h, q, k int) (Rule, error) {
	if q < 0 || q >= r.Queries || k < 0 || k >= r.Keys || b < 0 || b >= r.batch {
		return RuleNone, fmt.Errorf("analysis: cell (batch %d, query %d, key %d) out of range", b, q, k)
	}
	p := r.Pos(b, q)
	if r.active[RuleCausal] && k > p {
		if r.active[RulePrefix] && p < r.Prefix {
			if k >= r.Prefix {
				return RulePrefix, nil
			}
		} else {
			return RuleCausal, nil
		}
	}
	if r.active[RuleWindow] && k <= p-r.Window {
		return RuleWindow, nil
	}
	if r.active[RuleSegments] && p < r.Keys && r.segK[b][k] != r.segK[b][p] {
		return RuleSegments, nil
	}
	if r.active[RulePadding] && !r.validK[b][k] {
		return RulePadding, nil
	}
	if r.active[RuleExplicit] {
		r.mu.Lock()
		defer r.mu.Unlock()
		if err := r.loadAllow(b, h); err != nil {
			return RuleNone, err
		}
		if !r.cache[q*r.Keys+k] {
			return RuleExplicit, nil
		}
	}
	return RuleNone, nil
}

// CellRow is Cell for every key of query row q of (batch b, head h) at
// once: dst (length Keys) gets the rule forbidding each key, RuleNone where
// it is allowed. Not safe for concurrent use (the explicit mask's cache).
func (r *Rules) CellRow(b, h, q int, dst []Rule) error {
	if q < 0 || q >= r.Queries || b < 0 || b >= r.batch || len(dst) != r.Keys {
		return fmt.Errorf("analysis: row (batch %d, query %d) out of range", b, q)
	}
	var allowRow []bool
	if r.active[RuleExplicit] {
		r.mu.Lock()
		defer r.mu.Unlock()
		if err := r.loadAllow(b, h); err != nil {
			return err
		}
		allowRow = r.cache[q*r.Keys : (q+1)*r.Keys]
	}
	r.Row(b, q, allowRow, dst)
	return nil
}

// loadAllow reads the explicit mask of (b, h) into the cache unless it is
// there; the caller holds r.mu.
func (r *Rules) loadAllow(b, h int) error {
	if r.cacheB == b && r.cacheH == h {
		return nil
	}
	if r.cache == nil {
		r.cache = make([]bool, r.Queries*r.Keys)
	}
	if err := r.allow(b, h, r.cache); err != nil {
		r.cacheB = -1
		return err
	}
	r.cacheB, r.cacheH = b, h
	return nil
}

// BlockRules builds the rules of blk with the sides the export gives it
// (the usual way to call NewRules).
func BlockRules(ex *loader.Export, blk *loader.Block, only []Rule) (*Rules, error) {
	return NewRules(blk, ex.Side(blk.QuerySide), ex.Side(blk.KeySide), only)
}
