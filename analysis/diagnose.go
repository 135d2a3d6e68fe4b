package analysis

import (
	"fmt"
	"github.com/heed-dev/heed/internal/words"
	"sort"
	"strings"
)

// Caveat ends every diagnosis text and heed's command output: a diagnosis is
// evidence, not a verdict.
const Caveat = "This is evidence to confirm by re-evaluating the model, not a verdict."

// Diagnosis names a likely bug behind one or more findings, in one sentence,
// with the evidence and what to check in the model code.
//
// Patterns (Pattern field; Value's meaning in brackets):
//
//	mask_shifted [n]       causal mask shifted by +n: each query also sees the next n keys
//	no_causal_mask         the whole upper triangle carries mass
//	inverted_mask          mass only above the diagonal, none on or below it (boolean polarity)
//	causal_leak            some other mass above the diagonal
//	only_some_layers       the leak is in some layers only (another code path)
//	only_some_heads        the leak is in some heads only (a broadcast over heads)
//	only_some_batch        the leak is in some batch items only (a broadcast over the batch)
//	crosses_documents      packed sequences attend across document boundaries
//	window_too_wide [n]    the sliding window lets W+n keys through
//	no_window              the sliding window is not applied
//	window_leak            other mass beyond the window
//	prefix_sees_suffix     prefix positions attend to the suffix (the prefix sees the suffix)
//	prefix_causal [c]      the prefix block is causal: prefix rows stop at k = q+c (an under-allowing mask)
//	cross_causal [c]       cross-attention made causal: target rows stop at source k = q+c
//	cross_reads_padding    cross-attention reads encoder (source) padding
//	padding_keys           self-attention reads padding keys
//	explicit_mask_ignored  mass where the exported allow mask blocks
//	nan_rows [layer]       real query rows are NaN (fully masked rows); Value = first layer
//	train_mode [p]         rows sum around 1 with scattered exact zeros: dropout p
//	rows_not_normalised    rows do not sum to 1
//	negative_values        negative values: scores, not probabilities
type Diagnosis struct {
	Pattern string `json:"pattern"`
	// Text names the bug in one sentence and ends with Caveat.
	Text string `json:"text"`
	// Check says what to look at in the model code, in general terms.
	Check string `json:"check"`
	// Evidence lists the facts from the findings behind the diagnosis.
	Evidence []string `json:"evidence"`
	Block    string   `json:"block"`
	Rule     Rule     `json:"rule"`
	Layers   []int    `json:"layer"`
	Heads    []int    `json:"head"`
	Batches  []int    `json:"batch"`
	// Value is the pattern's number (see the list above), 0 when none.
	Value float64 `json:"value"`
	// At is where to look first.
	At Location `json:"at"`
}

func list(xs []int) string {
	s := make([]string, len(xs))
	for i, x := range xs {
		s[i] = fmt.Sprint(x)
	}
	return strings.Join(s, ", ")
}

// which names a set of indices: "all 4 heads", "head 2", "heads 1, 3".
func which(xs []int, total int, one, many string) string {
	switch {
	case len(xs) == total && total > 1:
		return fmt.Sprintf("all %d %s", total, many)
	case len(xs) == 1:
		return fmt.Sprintf("%s %d", one, xs[0])
	}
	return many + " " + list(xs)
}

// possible returns the cells rule r forbids at offset o over the finding's
// units, from the block's geometry.
func possible(bp *BlockPartial, f *Finding, r Rule, o int) int64 {
	var n int64
	for _, b := range f.Batches {
		n += bp.Geometry[b].Forbidden[r][o]
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
		for _, c := range bp.Geometry[b].Forbidden[r] {
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
		d := Diagnosis{Block: bp.Name, Rule: f.Rule, Layers: f.Layers, Heads: f.Heads, Batches: f.Batches, At: f.Worst}
		var could int64 // cells the rule forbids that could have leaked
		if f.Rule.IsMask() {
			could = couldLeak(bp, f, f.Rule)
		}
		where := fmt.Sprintf("%s (%s, %s, %s)", bp.Name, which(f.Layers, bp.Layers, "layer", "layers"),
			which(f.Heads, bp.Heads, "head", "heads"), which(f.Batches, bp.Batch, "batch item", "batch items"))
		if f.Rule.IsMask() {
			d.Evidence = append(d.Evidence, fmt.Sprintf("%.4g forbidden mass on %d cells in %d of %d judged rows of %s", f.Mass, f.Cells, f.Rows, f.JudgedRows, where))
			if could > 0 {
				d.Evidence = append(d.Evidence, fmt.Sprintf("%.1f%% of the cells the %s rule forbids at real keys carry mass", 100*min(1, float64(f.Cells)/float64(could)), f.Rule))
			}
			if len(f.Offsets) > 0 {
				d.Evidence = append(d.Evidence, "offsets k-q: "+offsetSummary(f.Offsets))
			}
			d.Evidence = append(d.Evidence, fmt.Sprintf("largest leak %.4g at %s key %d", f.Max, f.Worst, f.Worst.Key))
		}
		coverage := 0.0
		if could > 0 {
			coverage = float64(f.Cells) / float64(could)
		}
		switch f.Rule {
		case RuleCausal:
			allowed := f.agg.AllowMass.Float64()
			self := mean(f.agg.Self, f.agg.SelfRows)
			maxOff := 0
			if n := len(f.Offsets); n > 0 {
				maxOff = f.Offsets[n-1].Offset
			}
			switch {
			case coverage >= 0.9 && allowed < 0.1*(allowed+f.Mass) && self < 0.01:
				d.Pattern = "inverted_mask"
				d.Text = fmt.Sprintf("Inverted mask polarity in %s: the mass sits only above the diagonal and none on or below it, so the last query row has nothing allowed (NaN or zeros).", where)
				d.Check = "check the boolean mask convention where the mask is passed: torch.nn.MultiheadAttention and F.scaled_dot_product_attention disagree (True = blocked vs True = allowed); a mask built with tril for one and passed to the other inverts it"
				d.Evidence = append(d.Evidence, fmt.Sprintf("mass on allowed cells %.4g, mean diagonal share %.3g", allowed, self))
			case coverage >= 0.9:
				d.Pattern = "no_causal_mask"
				d.Text = fmt.Sprintf("No causal mask in %s: queries see the whole upper triangle (future tokens).", where)
				d.Check = "check that the causal mask (or the kernel's is_causal flag) reaches this attention call on every code path, e.g. the eager fallback used when attention weights are requested, or when a custom bias is passed"
			case maxOff >= 1 && maxOff < max(2, (bp.Keys+3)/4) && contiguous(bp, f, 1, maxOff):
				d.Pattern = "mask_shifted"
				d.Value = float64(maxOff)
				next := "the next key"
				if maxOff > 1 {
					next = fmt.Sprintf("the next %d keys", maxOff)
				}
				d.Text = fmt.Sprintf("Causal mask shifted by +%d in %s: each query also sees %s.", maxOff, where, next)
				d.Check = fmt.Sprintf("check the diagonal offset of the triu/tril that builds the mask (blocked cells are triu(..., diagonal=1); this looks like diagonal=%d) and any KV-cache offset added to query positions", maxOff+1)
			default:
				d.Pattern = "causal_leak"
				d.Text = fmt.Sprintf("Mass above the diagonal (future keys) in %s.", where)
				d.Check = "check how the causal mask is built and combined with other masks (padding, bias) for these rows"
			}
		case RuleWindow:
			W := bp.Window
			minOff := 0
			if len(f.Offsets) > 0 {
				minOff = f.Offsets[0].Offset
			}
			n := -W - minOff + 1
			switch {
			case coverage >= 0.9 && n > 1:
				d.Pattern = "no_window"
				d.Text = fmt.Sprintf("Sliding window of %d not applied in %s: queries see keys further back than the window.", W, where)
				d.Check = "check which layers are configured as sliding-window layers (layer types / pattern) and that the window reaches this kernel"
			case len(f.Offsets) > 0 && f.Offsets[len(f.Offsets)-1].Offset == -W && contiguous(bp, f, minOff, -W):
				d.Pattern = "window_too_wide"
				d.Value = float64(n)
				d.Text = fmt.Sprintf("The sliding window lets W+%d = %d keys through instead of %d in %s.", n, W+n, W, where)
				d.Check = "check the window comparison (q - k < W vs q - k <= W) and whether the window counts the query itself; backends differ by one"
			default:
				d.Pattern = "window_leak"
				d.Text = fmt.Sprintf("Mass beyond the sliding window of %d in %s.", W, where)
				d.Check = "check how the sliding-window mask is built for these rows"
			}
		case RulePrefix:
			d.Pattern = "prefix_sees_suffix"
			d.Text = fmt.Sprintf("The prefix sees the suffix in %s: prefix positions (the first %d) attend to suffix keys, which a prefix-LM hides from them.", where, bp.Prefix)
			d.Check = "check the prefix-LM mask: the prefix block is bidirectional, but prefix rows must not see suffix keys"
		case RuleSegments:
			d.Pattern = "crosses_documents"
			d.Text = fmt.Sprintf("Attention crosses document boundaries of packed sequences in %s.", where)
			d.Check = "check that the mask is built from the document ids or cu_seqlens (block-diagonal causal), not causal only; resetting position ids per document is not enough"
			d.Evidence = append(d.Evidence, fmt.Sprintf("mean mass on the first key of the own document %.3g, on key 0 %.3g", mean(f.agg.DocSink, f.agg.DocSinkRows), mean(f.agg.Sink, f.agg.SinkRows)))
		case RulePadding:
			if cross {
				d.Pattern = "cross_reads_padding"
				d.Text = fmt.Sprintf("Cross-attention reads encoder padding (source pad keys) in %s.", where)
				d.Check = "check that the source padding mask (memory_key_padding_mask / encoder attention mask) is passed to the cross-attention call, not only to the encoder"
			} else {
				d.Pattern = "padding_keys"
				d.Text = fmt.Sprintf("Padding keys are attended in %s.", where)
				d.Check = "check that the key padding mask reaches this attention call and is combined with the causal mask rather than replacing it"
			}
		case RuleExplicit:
			d.Pattern = "explicit_mask_ignored"
			d.Text = fmt.Sprintf("Mass where the exported allow mask blocks, in %s: the kernel did not apply the mask it was given.", where)
			d.Check = "check the path from the mask to the kernel: a fused or flash path may drop attn_mask, or expect the other boolean polarity or an additive bias"
		case RuleNaNRows:
			first := f.Layers[0]
			d.Pattern = "nan_rows"
			d.Value = float64(first)
			d.Text = fmt.Sprintf("%d real query %s are NaN in %s, first in layer %d: fully masked queries give NaN (softmax over nothing).", f.Rows, words.Plural(int(f.Rows), "row", "rows"), where, first)
			d.Check = "check for rows whose masks block every key (left padding with a causal mask, two additive masks summed to -inf or overflowing in fp16/bf16) and use a finite fill value or guard fully masked rows"
			d.Evidence = append(d.Evidence, fmt.Sprintf("%d NaN rows out of %d judged rows; first at %s", f.Rows, f.JudgedRows, f.Worst))
			if pl := padNaNFirst(bp); pl >= 0 && pl < first {
				d.Evidence = append(d.Evidence, fmt.Sprintf("padding rows are already NaN in layer %d: the NaN of padded rows spreads into real rows", pl))
			}
		case RuleRowSum:
			a := &f.agg
			lo, hi, avg := a.SumMin, a.SumMax, mean(a.RowSum, a.Rows)
			zf := 0.0
			if a.AllowCells > 0 {
				zf = float64(a.AllowZeros) / float64(a.AllowCells)
			}
			d.Evidence = append(d.Evidence, fmt.Sprintf("%d of %d judged rows off by more than the %s tolerance; sums from %.4g to %.4g, mean %.4g", f.Rows, f.JudgedRows, bp.DType, lo, hi, avg))
			// after dropout p the kept weights are scaled by 1/(1-p): rows that lost
			// little sum to about 1/(1-p) >= 1+p, so the largest sum must show it
			if zf >= 0.01 && hi > 1+zf/2 {
				d.Pattern = "train_mode"
				d.Value = zf
				d.Text = fmt.Sprintf("Exported in train mode in %s: rows sum to values around 1 (%.3g to %.3g) and %.1f%% of allowed cells are exactly 0, as after dropout with p about %.2f (kept weights are scaled by 1/(1-p)).", where, lo, hi, 100*zf, zf)
				d.Check = "call model.eval() (or disable attention dropout) before exporting attention weights"
				d.Evidence = append(d.Evidence, fmt.Sprintf("%.1f%% of allowed cells exactly 0", 100*zf))
			} else {
				d.Pattern = "rows_not_normalised"
				d.Text = fmt.Sprintf("Rows do not sum to 1 in %s (mean %.4g).", where, avg)
				d.Check = "check that the export takes the softmax output of each head (not scores, not heads summed); models with learned sink logits legitimately sum below 1: pass --sum-below"
			}
		case RuleCut:
			diagnoseCut(bp, f, &d, where) // cut.go
		case RuleNegative:
			d.Pattern = "negative_values"
			d.Text = fmt.Sprintf("Negative values in %s: these are not probabilities.", where)
			d.Check = "check that the export takes the attention probabilities after softmax, not the scores or logits"
			d.Evidence = append(d.Evidence, fmt.Sprintf("%d negative cells in %d rows, total %.4g", f.Cells, f.Rows, f.Mass))
		}
		if d.Pattern == "" {
			continue
		}
		d.Text += " " + Caveat
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
	d := Diagnosis{Block: bp.Name, Rule: f.Rule, Layers: f.Layers, Heads: f.Heads, Batches: f.Batches, At: f.Worst}
	d.Evidence = []string{fmt.Sprintf("%s leak (%s) in %d of %d layers, %d of %d heads, %d of %d batch items; the rest is clean for this rule",
		f.Rule, what.Pattern, len(f.Layers), bp.Layers, len(f.Heads), bp.Heads, len(f.Batches), bp.Batch)}
	switch {
	case !allH:
		d.Pattern = "only_some_heads"
		d.Text = fmt.Sprintf("Only %s %s of %s %s %s (%s) in %s: a mask broadcast over the head axis is wrong.",
			words.Plural(len(f.Heads), "head", "heads"), list(f.Heads), words.Plural(len(f.Layers), "layer", "layers"), list(f.Layers),
			words.Plural(len(f.Heads), "leaks", "leak"), f.Rule, bp.Name)
		d.Check = "check how the mask is expanded to [batch*heads, q, k] or [batch, heads, q, k] (repeat vs repeat_interleave, batch-major order) and any per-head bias"
	case !allL:
		d.Pattern = "only_some_layers"
		d.Text = fmt.Sprintf("Only %s %s of %s %s (%s): %s.",
			words.Plural(len(f.Layers), "layer", "layers"), list(f.Layers), bp.Name, words.Plural(len(f.Layers), "leaks", "leak"), f.Rule,
			words.Plural(len(f.Layers), "that layer takes another code path or gets another mask", "those layers take another code path or get another mask"))
		d.Check = "check what differs for these layers: layer type (full vs sliding), a kernel fallback, a mask passed per layer or cached from another layer"
	case !allB:
		d.Pattern = "only_some_batch"
		d.Text = fmt.Sprintf("Only batch %s %s of %s %s (%s): the mask is wrong for some batch items.",
			words.Plural(len(f.Batches), "item", "items"), list(f.Batches), bp.Name, words.Plural(len(f.Batches), "leaks", "leak"), f.Rule)
		d.Check = "check how the mask is broadcast over the batch (a [1, q, k] mask vs per-item padding masks, a path taken only for unpadded items)"
	default:
		return d, false
	}
	d.Text += " " + Caveat
	return d, true
}

func offsetSummary(os []OffsetCount) string {
	if len(os) <= 8 {
		s := make([]string, len(os))
		for i, o := range os {
			s[i] = fmt.Sprintf("%+d (%d)", o.Offset, o.Count)
		}
		return strings.Join(s, ", ")
	}
	top := append([]OffsetCount(nil), os...)
	sort.SliceStable(top, func(i, j int) bool { return top[i].Count > top[j].Count })
	s := make([]string, 5)
	for i, o := range top[:5] {
		s[i] = fmt.Sprintf("%+d (%d)", o.Offset, o.Count)
	}
	return fmt.Sprintf("%d offsets from %+d to %+d; most: %s", len(os), os[0].Offset, os[len(os)-1].Offset, strings.Join(s, ", "))
}
