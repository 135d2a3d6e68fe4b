package analysis

// Diagnosis names a likely bug behind one or more findings as a pattern
// code and the facts its words need: the engine says no sentence and names
// no option. Package internal/prose turns a Diagnosis into its sentence
// (Text), what to check in the model code (Check) and its evidence, naming
// the command-line option where one applies; a new pattern's words go there.
//
// Patterns (Pattern field), Value's meaning in brackets, then the Facts
// fields the words read besides Block, Rule, Layers, Heads, Batches and At.
// Every pattern of a mask rule (causal, window, prefix, segments, padding,
// explicit) also reads the finding's numbers (Mass, Cells, Rows, JudgedRows,
// Max, Offsets), Could and the block's totals (BlockLayers, BlockHeads,
// BlockBatch):
//
//	mask_shifted [n]       causal mask shifted by +n: each query also sees the next n keys
//	no_causal_mask         the whole upper triangle carries mass
//	inverted_mask          mass only above the diagonal, none on or below it (boolean polarity); Allowed, Self
//	causal_leak            some other mass above the diagonal
//	only_some_layers       the leak is in some layers only (another code path); Leak
//	only_some_heads        the leak is in some heads only (a broadcast over heads); Leak
//	only_some_batch        the leak is in some batch items only (a broadcast over the batch); Leak
//	crosses_documents      packed sequences attend across document boundaries; DocSink, Sink
//	window_too_wide [n]    the sliding window lets W+n keys through; Window
//	no_window              the sliding window is not applied; Window
//	window_leak            other mass beyond the window; Window
//	prefix_sees_suffix     prefix positions attend to the suffix (the prefix sees the suffix); Prefix
//	prefix_causal [c]      the prefix block is causal: prefix rows stop at k = q+c (an under-allowing
//	                       mask); Prefix, Stopped, Could, Cells, Rows, Offsets, block totals
//	cross_causal [c]       cross-attention made causal: target rows stop at source k = q+c; Queries,
//	                       Keys, Stopped, Could, Cells, Rows, Offsets, block totals
//	cross_reads_padding    cross-attention reads encoder (source) padding
//	padding_keys           self-attention reads padding keys
//	explicit_mask_ignored  mass where the exported allow mask blocks
//	nan_rows [layer]       real query rows are NaN (fully masked rows); Value = first layer; Rows,
//	                       JudgedRows, PadNaNLayer, block totals
//	train_mode [p]         rows sum around 1 with scattered exact zeros: dropout p (= ZeroFrac); Rows,
//	                       JudgedRows, DType, SumMin, SumMax, SumMean, block totals
//	rows_not_normalised    rows do not sum to 1 (the words name the sum_below setting); same facts
//	negative_values        negative values: scores, not probabilities; Cells, Rows, Mass, block totals
//
// The causal-invariance check (package analysis/invariance, invariance.Check) adds, all of rule
// invariance (Facts.Inv set):
//
//	reads_future [layer]   positions before P changed from this layer on: it reads the future
//	not_causal             every position before P changed at layer 0: the block is not causal
//	future_heads [layer]   the heads whose rows before P changed first, at that layer
//	output_reads_future    the logits changed before P (no layer outputs to say where)
//	rounding_level [rel]   the differences are small and scattered: maybe reduced-precision rounding
//	                       (the words name the tol setting and invariance.Tol(bfloat16))
type Diagnosis struct {
	Pattern string `json:"pattern"`
	Block   string `json:"block"`
	Rule    Rule   `json:"rule"`
	Layers  []int  `json:"layer"`
	Heads   []int  `json:"head"`
	Batches []int  `json:"batch"`
	// Value is the pattern's number (see the list above), 0 when none.
	Value float64 `json:"value"`
	// At is where to look first.
	At Location `json:"at"`
	// Facts are the numbers the pattern's words need.
	Facts Facts `json:"facts"`
}

// The patterns of the diagnoses (Diagnosis.Pattern; their Value and facts
// are listed with Diagnosis): heed check's, then the invariance check's.
const (
	PatMaskShifted         = "mask_shifted"
	PatNoCausalMask        = "no_causal_mask"
	PatInvertedMask        = "inverted_mask"
	PatCausalLeak          = "causal_leak"
	PatOnlySomeLayers      = "only_some_layers"
	PatOnlySomeHeads       = "only_some_heads"
	PatOnlySomeBatch       = "only_some_batch"
	PatCrossesDocuments    = "crosses_documents"
	PatWindowTooWide       = "window_too_wide"
	PatNoWindow            = "no_window"
	PatWindowLeak          = "window_leak"
	PatPrefixSeesSuffix    = "prefix_sees_suffix"
	PatPrefixCausal        = "prefix_causal"
	PatCrossCausal         = "cross_causal"
	PatCrossReadsPadding   = "cross_reads_padding"
	PatPaddingKeys         = "padding_keys"
	PatExplicitMaskIgnored = "explicit_mask_ignored"
	PatNaNRows             = "nan_rows"
	PatTrainMode           = "train_mode"
	PatRowsNotNormalised   = "rows_not_normalised"
	PatNegativeValues      = "negative_values"

	// the causal-invariance check's (package analysis/invariance)
	PatReadsFuture       = "reads_future"
	PatNotCausal         = "not_causal"
	PatFutureHeads       = "future_heads"
	PatOutputReadsFuture = "output_reads_future"
	PatRoundingLevel     = "rounding_level"
)

// Facts are the numbers a diagnosis's words need; which a pattern fills is
// in the list of Diagnosis. Fields a pattern does not use are zero.
type Facts struct {
	// BlockLayers, BlockHeads, BlockBatch: the block's totals, so that words
	// can say "all 4 heads" and "2 of 4 layers".
	BlockLayers int `json:"block_layers"`
	BlockHeads  int `json:"block_heads"`
	BlockBatch  int `json:"block_batch"`
	// The finding's numbers (see Finding).
	Mass       float64       `json:"mass"`
	Cells      int64         `json:"cells"`
	Max        float64       `json:"max"`
	Rows       int64         `json:"rows"`
	JudgedRows int64         `json:"judged_rows"`
	Offsets    []OffsetCount `json:"offsets,omitempty"`
	// Could: for a mask rule, the cells it forbids over the finding's units
	// that could carry mass (0 when none could); for a cut, the rows that
	// have an allowed key after the stop offset Value.
	Could int64 `json:"could"`
	// Stopped: for a cut, the rows whose mass stops at offset Value.
	Stopped int64 `json:"stopped,omitempty"`
	// Allowed is the mass on allowed cells and Self the mean diagonal share
	// (inverted_mask).
	Allowed float64 `json:"allowed,omitempty"`
	Self    float64 `json:"self,omitempty"`
	// Window and Prefix: the block's sliding window W and prefix length P.
	Window int `json:"window,omitempty"`
	Prefix int `json:"prefix,omitempty"`
	// Queries and Keys: the block's size (cross_causal).
	Queries int `json:"queries,omitempty"`
	Keys    int `json:"keys,omitempty"`
	// DocSink and Sink: mean mass on the first key of the own document and
	// on key 0 (crosses_documents).
	DocSink float64 `json:"doc_sink,omitempty"`
	Sink    float64 `json:"sink,omitempty"`
	// PadNaNLayer is the first layer whose padding rows are NaN, -1 when
	// none (nan_rows).
	PadNaNLayer int `json:"pad_nan_layer"`
	// DType is the block's stored dtype (rows).
	DType string `json:"dtype,omitempty"`
	// SumMin, SumMax, SumMean: the row sums of the rows off; ZeroFrac the
	// share of allowed cells that are exactly 0 (rows).
	SumMin   float64 `json:"sum_min,omitempty"`
	SumMax   float64 `json:"sum_max,omitempty"`
	SumMean  float64 `json:"sum_mean,omitempty"`
	ZeroFrac float64 `json:"zero_frac,omitempty"`
	// Leak is the pattern of the leak an only_some_* diagnosis locates.
	Leak string `json:"leak,omitempty"`
	// Examples: the examples that hold the block; InExamples: those in
	// which the rule found a problem (0 when not counted: rule cut).
	Examples   int64 `json:"examples,omitempty"`
	InExamples int64 `json:"in_examples,omitempty"`
	// Inv: the invariance check's facts (rule invariance only).
	Inv *InvFacts `json:"invariance,omitempty"`
}

// InvFacts are the facts of a diagnosis of the causal-invariance check.
type InvFacts struct {
	// From is P of the batch item of At.
	From int `json:"from"`
	// All: every judged position before P changed at the first layer, in
	// every item concerned.
	All bool `json:"all"`
	// Bidirectional: the block's metadata declares it bidirectional.
	Bidirectional bool `json:"bidirectional"`
	// Items: per batch item concerned, the positions before P that changed
	// at its first changed layer.
	Items []ItemChange `json:"items,omitempty"`
	// Changed lists the layers where a position before P changed.
	Changed []int `json:"changed,omitempty"`
	// Reach > 0: in every item exactly the last Reach positions before P
	// changed (a mask that lets query q see keys up to q+Reach).
	Reach int `json:"reach"`
	// MaxAbs, MaxRel: the largest differences before P; Tol and DType the
	// tolerance applied and the dtype it was chosen for; Suggest the
	// tolerance to try again with (rounding_level).
	MaxAbs  float64 `json:"max_abs"`
	MaxRel  float64 `json:"max_rel"`
	Tol     float64 `json:"tol"`
	DType   string  `json:"dtype"`
	Suggest float64 `json:"suggest,omitempty"`
	// HeadChanges are the heads changed at the layer of a future_heads
	// diagnosis; HeadTotal is the block's number of heads.
	HeadChanges []HeadChange `json:"head_changes,omitempty"`
	HeadTotal   int          `json:"head_total,omitempty"`
}

// ItemChange is what changed before P in one batch item.
type ItemChange struct {
	Batch      int   `json:"batch"`
	Positions  []int `json:"positions"`
	FirstLayer int   `json:"first_layer"`
	From       int   `json:"from"`
}

// possible returns the cells rule r forbids at offset o over the finding's
// units, from the block's geometry.
func possible(bp *BlockPartial, f *Finding, r Rule, o int) int64 {
	var n int64
	for _, b := range f.Batches {
		n += bp.Geometry[b].Leaky[r][o]
	}
	return n * int64(len(f.Layers)*len(f.Heads))
}

// couldLeak returns how many cells rule r forbids over the finding's units
// that could carry mass: the pass counts the forbidden cells of judged finite
// rows (padding keys included), the geometry of a positional rule those of
// judged rows at real keys (NaN rows included); both are upper bounds, so
// the smaller one is used.
func couldLeak(bp *BlockPartial, f *Finding, r Rule) int64 {
	n := f.agg.Leaks[r].Forbidden
	if !r.Positional() {
		return n
	}
	var g int64
	for _, b := range f.Batches {
		for _, c := range bp.Geometry[b].Leaky[r] {
			g += c
		}
	}
	return min(n, g*int64(len(f.Layers)*len(f.Heads)))
}

// contiguous reports whether the offsets are exactly lo..hi (each with at
// least 90% of its possible cells leaking).
func contiguous(bp *BlockPartial, f *Finding, lo, hi int) bool {
	if len(f.Offsets) != hi-lo+1 {
		return false
	}
	for i, oc := range f.Offsets {
		if oc.Offset != lo+i {
			return false
		}
		if p := possible(bp, f, f.Rule, oc.Offset); p == 0 || float64(oc.Count) < 0.9*float64(p) {
			return false
		}
	}
	return true
}

func diagnose(bp *BlockPartial, fs []Finding) []Diagnosis {
	var out []Diagnosis
	cross := !bp.SelfAttn
	for i := range fs {
		f := &fs[i]
		d := Diagnosis{Block: bp.Name, Rule: f.Rule, Layers: f.Layers, Heads: f.Heads, Batches: f.Batches, At: f.Worst,
			Facts: Facts{BlockLayers: bp.Layers, BlockHeads: bp.Heads, BlockBatch: bp.Batch,
				Mass: f.Mass, Cells: f.Cells, Max: f.Max, Rows: f.Rows, JudgedRows: f.JudgedRows, Offsets: f.Offsets, PadNaNLayer: -1,
				Examples: bp.Examples, InExamples: f.InExamples}}
		var could int64 // cells the rule forbids that could have leaked
		if f.Rule.IsMask() {
			could = couldLeak(bp, f, f.Rule)
			d.Facts.Could = could
		}
		coverage := 0.0
		if could > 0 {
			coverage = float64(f.Cells) / float64(could)
		}
		switch f.Rule {
		case RuleCausal:
			// of the examples where these units leak (a clean example of
			// the set would add allowed mass)
			in := &f.agg.InCausalLeak
			allowed := in.AllowMass.Float64()
			self := mean(in.Self, in.SelfRows)
			maxOff := 0
			if n := len(f.Offsets); n > 0 {
				maxOff = f.Offsets[n-1].Offset
			}
			switch {
			case coverage >= 0.9 && allowed < 0.1*(allowed+f.Mass) && self < 0.01:
				d.Pattern = PatInvertedMask
				d.Facts.Allowed, d.Facts.Self = allowed, self
			case coverage >= 0.9:
				d.Pattern = PatNoCausalMask
			case maxOff >= 1 && maxOff < max(2, (bp.Keys+3)/4) && contiguous(bp, f, 1, maxOff):
				d.Pattern = PatMaskShifted
				d.Value = float64(maxOff)
			default:
				d.Pattern = PatCausalLeak
			}
		case RuleWindow:
			W := bp.Window
			d.Facts.Window = W
			minOff := 0
			if len(f.Offsets) > 0 {
				minOff = f.Offsets[0].Offset
			}
			n := -W - minOff + 1
			switch {
			case coverage >= 0.9 && n > 1:
				d.Pattern = PatNoWindow
			case len(f.Offsets) > 0 && f.Offsets[len(f.Offsets)-1].Offset == -W && contiguous(bp, f, minOff, -W):
				d.Pattern = PatWindowTooWide
				d.Value = float64(n)
			default:
				d.Pattern = PatWindowLeak
			}
		case RulePrefix:
			d.Pattern = PatPrefixSeesSuffix
			d.Facts.Prefix = bp.Prefix
		case RuleSegments:
			d.Pattern = PatCrossesDocuments
			d.Facts.DocSink, d.Facts.Sink = mean(f.agg.DocSink, f.agg.DocSinkRows), mean(f.agg.Sink, f.agg.SinkRows)
		case RulePadding:
			if cross {
				d.Pattern = PatCrossReadsPadding
			} else {
				d.Pattern = PatPaddingKeys
			}
		case RuleExplicit:
			d.Pattern = PatExplicitMaskIgnored
		case RuleNaNRows:
			d.Pattern = PatNaNRows
			d.Value = float64(f.Layers[0])
			d.Facts.PadNaNLayer = padNaNFirst(bp)
		case RuleRowSum:
			a := &f.agg
			d.Facts.DType = bp.DType
			d.Facts.SumMin, d.Facts.SumMax, d.Facts.SumMean = a.SumMin, a.SumMax, mean(a.RowSum, a.Rows)
			zf := 0.0 // of the examples where these units have rows off their sum
			if in := &a.InSumOff; in.AllowCells > 0 {
				zf = float64(in.AllowZeros) / float64(in.AllowCells)
			}
			d.Facts.ZeroFrac = zf
			// after dropout p the kept weights are scaled by 1/(1-p): rows that lost
			// little sum to about 1/(1-p) >= 1+p, so the largest sum must show it
			if zf >= 0.01 && a.SumMax > 1+zf/2 {
				d.Pattern = PatTrainMode
				d.Value = zf
			} else {
				d.Pattern = PatRowsNotNormalised
			}
		case RuleCut:
			diagnoseCut(bp, f, &d) // rules_cut.go
		case RuleNegative:
			d.Pattern = PatNegativeValues
		}
		if d.Pattern == "" {
			continue
		}
		out = append(out, d)
		if f.Rule.IsMask() {
			if w, ok := whereDiagnosis(bp, f, d); ok {
				out = append(out, w)
			}
		}
	}
	return out
}

func padNaNFirst(bp *BlockPartial) int {
	for l := 0; l < bp.Layers; l++ {
		for h := 0; h < bp.Heads; h++ {
			for b := 0; b < bp.Batch; b++ {
				if bp.Unit(l, h, b).PadNaNRows > 0 {
					return l
				}
			}
		}
	}
	return -1
}

// whereDiagnosis names where a mask leak is when it is not everywhere.
func whereDiagnosis(bp *BlockPartial, f *Finding, what Diagnosis) (Diagnosis, bool) {
	allL, allH, allB := len(f.Layers) == bp.Layers, len(f.Heads) == bp.Heads, len(f.Batches) == bp.Batch
	// Only a leak that others could have had but did not says where the bug
	// is: units outside the finding must have had cells this rule forbids.
	in := func(xs []int, x int) bool {
		for _, y := range xs {
			if y == x {
				return true
			}
		}
		return false
	}
	var forbiddenOutside int64
	for l := 0; l < bp.Layers; l++ {
		for h := 0; h < bp.Heads; h++ {
			for b := 0; b < bp.Batch; b++ {
				if !(in(f.Layers, l) && in(f.Heads, h) && in(f.Batches, b)) {
					forbiddenOutside += bp.Unit(l, h, b).Leaks[f.Rule].Forbidden
				}
			}
		}
	}
	if forbiddenOutside == 0 {
		return Diagnosis{}, false
	}
	d := Diagnosis{Block: bp.Name, Rule: f.Rule, Layers: f.Layers, Heads: f.Heads, Batches: f.Batches, At: f.Worst,
		Facts: Facts{BlockLayers: bp.Layers, BlockHeads: bp.Heads, BlockBatch: bp.Batch, Leak: what.Pattern, PadNaNLayer: -1,
			Examples: bp.Examples, InExamples: f.InExamples}}
	switch {
	case !allH:
		d.Pattern = PatOnlySomeHeads
	case !allL:
		d.Pattern = PatOnlySomeLayers
	case !allB:
		d.Pattern = PatOnlySomeBatch
	default:
		return d, false
	}
	return d, true
}

// HeadChange is one attention head whose rows before P changed.
type HeadChange struct {
	Block string `json:"block"`
	Layer int    `json:"layer"`
	Head  int    `json:"head"`
	Batch int    `json:"batch"`
	// Rows are the (absolute) query positions before P whose row changed.
	Rows []int `json:"rows"`
	// MaxAbs is the largest |a - b| of a probability in those rows; MaxRel
	// the largest |a - b| / (|b| + rms) (rms over the compared rows of A).
	MaxAbs float64 `json:"max_abs"`
	MaxRel float64 `json:"max_rel"`
}
