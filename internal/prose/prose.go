// Package prose is the one home of the sentences heed says about what the
// engine found: a diagnosis (analysis.Diagnosis, a pattern code and its
// facts) becomes one sentence naming the likely bug (Text, ending with
// Caveat), what to check in the model code (Check) and the evidence; a note
// (analysis.Note) becomes one line. Where a sentence tells the user to
// give heed a setting, it names the command-line option (words.Option).
// cmd/heed (check, check --against, both, the text report) and the
// terminal UI (the Findings screen) print these words; neither keeps its
// own copy, and analysis says no sentence.
//
// A new diagnosis pattern or note code: add its constant and facts in
// analysis (documented in the list of analysis.Diagnosis or analysis.Note)
// and its words here, in the switch of checkWords, invWords or Note.
package prose

import (
	"fmt"
	"sort"
	"strings"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/internal/words"
)

// Caveat ends every diagnosis text and heed's command output: a diagnosis is
// evidence, not a verdict.
const Caveat = "This is evidence to confirm by re-evaluating the model, not a verdict."

// Diagnosis is an analysis.Diagnosis in words, as heed prints it (the JSON
// "diagnosis" entries of heed check, docs/json.md).
type Diagnosis struct {
	Pattern string `json:"pattern"`
	// Text names the bug in one sentence and ends with Caveat.
	Text string `json:"text"`
	// Check says what to look at in the model code, in general terms.
	Check string `json:"check"`
	// Evidence lists the facts from the findings behind the diagnosis.
	Evidence []string      `json:"evidence"`
	Block    string        `json:"block"`
	Rule     analysis.Rule `json:"rule"`
	Layers   []int         `json:"layer"`
	Heads    []int         `json:"head"`
	Batches  []int         `json:"batch"`
	// Value is the pattern's number (see analysis.Diagnosis), 0 when none.
	Value float64 `json:"value"`
	// At is where to look first.
	At analysis.Location `json:"at"`
}

// Diagnoses words every diagnosis, in order; never nil.
func Diagnoses(ds []analysis.Diagnosis) []Diagnosis {
	out := make([]Diagnosis, 0, len(ds))
	for i := range ds {
		out = append(out, Diagnose(&ds[i]))
	}
	return out
}

// Diagnose words one diagnosis.
func Diagnose(d *analysis.Diagnosis) Diagnosis {
	w := Diagnosis{Pattern: d.Pattern, Block: d.Block, Rule: d.Rule, Layers: d.Layers, Heads: d.Heads, Batches: d.Batches, Value: d.Value, At: d.At}
	switch {
	case d.Rule == analysis.RuleInvariance:
		invWords(d, &w)
	case d.Pattern == analysis.PatOnlySomeHeads || d.Pattern == analysis.PatOnlySomeLayers || d.Pattern == analysis.PatOnlySomeBatch:
		whereWords(d, &w)
	default:
		checkWords(d, &w)
	}
	w.Text += " " + Caveat
	return w
}

// Notes words every note, in order; never nil.
func Notes(ns []analysis.Note) []string {
	out := make([]string, 0, len(ns))
	for _, n := range ns {
		out = append(out, Note(n))
	}
	return out
}

// Note words one note of a result.
func Note(n analysis.Note) string {
	switch n.Code {
	case analysis.NotePadNaN:
		return fmt.Sprintf("%s: %d of %d padding query rows hold NaN; padding rows are not judged (benign unless NaN spreads into real rows)", n.Block, n.Rows, n.Of)
	case analysis.NoteSumLow:
		return fmt.Sprintf("%s: %d rows sum to 1 only within %.2g (%s rounding allows %.0e): the size of a bfloat16 or float16 softmax's rounding, so the model probably computed attention in lower precision and the export widened it; judged at bfloat16's tolerance %.0e, not reported as a bug. If the model computed in %s, this is a bug: say the compute dtype (meta compute_dtype or %s)",
			n.Block, n.Rows, n.Max, n.DType, n.SumTol, n.SumLoose, n.DType, words.Option("compute_dtype"))
	case analysis.NoteHeadsAveraged:
		return fmt.Sprintf("%s: the head axis has length 1: heads were probably averaged at export, so per-head statistics describe the average", n.Block)
	}
	return n.Block + ": " + n.Code
}

// which names a set of indices: "all 4 heads", "head 2", "heads 1, 3".
func which(xs []int, total int, one, many string) string {
	switch {
	case len(xs) == total && total > 1:
		return fmt.Sprintf("all %d %s", total, many)
	case len(xs) == 1:
		return fmt.Sprintf("%s %d", one, xs[0])
	}
	return many + " " + words.List(xs)
}

// where names the block and the finding's layers, heads and batch items,
// and of a set of examples, when the rule found nothing in some of them,
// how many it found it in.
func where(d *analysis.Diagnosis) string {
	f := &d.Facts
	ex := ""
	if f.InExamples > 0 && f.InExamples < f.Examples {
		ex = fmt.Sprintf("; in %d of %d examples", f.InExamples, f.Examples)
	}
	return fmt.Sprintf("%s (%s, %s, %s%s)", d.Block, which(d.Layers, f.BlockLayers, "layer", "layers"),
		which(d.Heads, f.BlockHeads, "head", "heads"), which(d.Batches, f.BlockBatch, "batch item", "batch items"), ex)
}

// OffsetSummary writes offsets k - q and their counts: all of them up to 8,
// else the range and the five most common.
func OffsetSummary(os []analysis.OffsetCount) string {
	if len(os) <= 8 {
		s := make([]string, len(os))
		for i, o := range os {
			s[i] = fmt.Sprintf("%+d (%d)", o.Offset, o.Count)
		}
		return strings.Join(s, ", ")
	}
	top := append([]analysis.OffsetCount(nil), os...)
	sort.SliceStable(top, func(i, j int) bool { return top[i].Count > top[j].Count })
	s := make([]string, 5)
	for i, o := range top[:5] {
		s[i] = fmt.Sprintf("%+d (%d)", o.Offset, o.Count)
	}
	return fmt.Sprintf("%d offsets from %+d to %+d; most: %s", len(os), os[0].Offset, os[len(os)-1].Offset, strings.Join(s, ", "))
}

// checkWords words a diagnosis of heed check's rules.
func checkWords(d *analysis.Diagnosis, w *Diagnosis) {
	f := &d.Facts
	at := d.At
	wh := where(d)
	if d.Rule.IsMask() {
		w.Evidence = append(w.Evidence, fmt.Sprintf("%.4g forbidden mass on %d cells in %d of %d judged rows of %s", f.Mass, f.Cells, f.Rows, f.JudgedRows, wh))
		if f.Could > 0 {
			w.Evidence = append(w.Evidence, fmt.Sprintf("%.1f%% of the cells the %s rule forbids at real keys carry mass", 100*min(1, float64(f.Cells)/float64(f.Could)), d.Rule))
		}
		if len(f.Offsets) > 0 {
			w.Evidence = append(w.Evidence, "offsets k-q: "+OffsetSummary(f.Offsets))
		}
		w.Evidence = append(w.Evidence, fmt.Sprintf("largest leak %.4g at %s", f.Max, at))
	}
	switch d.Pattern {
	case analysis.PatInvertedMask:
		w.Text = fmt.Sprintf("Inverted mask polarity in %s: the mass sits only above the diagonal and none on or below it, so the last query row has nothing allowed (NaN or zeros).", wh)
		w.Check = "check the boolean mask convention where the mask is passed: torch.nn.MultiheadAttention and F.scaled_dot_product_attention disagree (True = blocked vs True = allowed); a mask built with tril for one and passed to the other inverts it"
		w.Evidence = append(w.Evidence, fmt.Sprintf("mass on allowed cells %.4g, mean diagonal share %.3g", f.Allowed, f.Self))
	case analysis.PatNoCausalMask:
		w.Text = fmt.Sprintf("No causal mask in %s: queries see the whole upper triangle (future tokens).", wh)
		w.Check = "check that the causal mask (or the kernel's is_causal flag) reaches this attention call on every code path, e.g. the eager fallback used when attention weights are requested, or when a custom bias is passed"
	case analysis.PatMaskShifted:
		n := int(d.Value)
		next := "the next key"
		if n > 1 {
			next = fmt.Sprintf("the next %d keys", n)
		}
		w.Text = fmt.Sprintf("Causal mask shifted by +%d in %s: each query also sees %s.", n, wh, next)
		w.Check = fmt.Sprintf("check the diagonal offset of the triu/tril that builds the mask (blocked cells are triu(..., diagonal=1); this looks like diagonal=%d) and any KV-cache offset added to query positions", n+1)
	case analysis.PatCausalLeak:
		w.Text = fmt.Sprintf("Mass above the diagonal (future keys) in %s.", wh)
		w.Check = "check how the causal mask is built and combined with other masks (padding, bias) for these rows"
	case analysis.PatNoWindow:
		w.Text = fmt.Sprintf("Sliding window of %d not applied in %s: queries see keys further back than the window.", f.Window, wh)
		w.Check = "check which layers are configured as sliding-window layers (layer types / pattern) and that the window reaches this kernel"
	case analysis.PatWindowTooWide:
		n := int(d.Value)
		w.Text = fmt.Sprintf("The sliding window lets W+%d = %d keys through instead of %d in %s.", n, f.Window+n, f.Window, wh)
		w.Check = "check the window comparison (q - k < W vs q - k <= W) and whether the window counts the query itself; backends differ by one"
	case analysis.PatWindowLeak:
		w.Text = fmt.Sprintf("Mass beyond the sliding window of %d in %s.", f.Window, wh)
		w.Check = "check how the sliding-window mask is built for these rows"
	case analysis.PatPrefixSeesSuffix:
		w.Text = fmt.Sprintf("The prefix sees the suffix in %s: prefix positions (the first %d) attend to suffix keys, which a prefix-LM hides from them.", wh, f.Prefix)
		w.Check = "check the prefix-LM mask: the prefix block is bidirectional, but prefix rows must not see suffix keys"
	case analysis.PatCrossesDocuments:
		w.Text = fmt.Sprintf("Attention crosses document boundaries of packed sequences in %s.", wh)
		w.Check = "check that the mask is built from the document ids or cu_seqlens (block-diagonal causal), not causal only; resetting position ids per document is not enough"
		w.Evidence = append(w.Evidence, fmt.Sprintf("mean mass on the first key of the own document %.3g, on key 0 %.3g", f.DocSink, f.Sink))
	case analysis.PatCrossReadsPadding:
		w.Text = fmt.Sprintf("Cross-attention reads encoder padding (source pad keys) in %s.", wh)
		w.Check = "check that the source padding mask (memory_key_padding_mask / encoder attention mask) is passed to the cross-attention call, not only to the encoder"
	case analysis.PatPaddingKeys:
		w.Text = fmt.Sprintf("Padding keys are attended in %s.", wh)
		w.Check = "check that the key padding mask reaches this attention call and is combined with the causal mask rather than replacing it"
	case analysis.PatExplicitMaskIgnored:
		w.Text = fmt.Sprintf("Mass where the exported allow mask blocks, in %s: the kernel did not apply the mask it was given.", wh)
		w.Check = "check the path from the mask to the kernel: a fused or flash path may drop attn_mask, or expect the other boolean polarity or an additive bias"
	case analysis.PatNaNRows:
		first := int(d.Value)
		w.Text = fmt.Sprintf("%d real query %s are NaN in %s, first in layer %d: fully masked queries give NaN (softmax over nothing).", f.Rows, words.Plural(int(f.Rows), "row", "rows"), wh, first)
		w.Check = "check for rows whose masks block every key (left padding with a causal mask, two additive masks summed to -inf or overflowing in fp16/bf16) and use a finite fill value or guard fully masked rows"
		w.Evidence = append(w.Evidence, fmt.Sprintf("%d NaN rows out of %d judged rows; first at %s", f.Rows, f.JudgedRows, at))
		if pl := f.PadNaNLayer; pl >= 0 && pl < first {
			w.Evidence = append(w.Evidence, fmt.Sprintf("padding rows are already NaN in layer %d: the NaN of padded rows spreads into real rows", pl))
		}
	case analysis.PatTrainMode, analysis.PatRowsNotNormalised:
		w.Evidence = append(w.Evidence, fmt.Sprintf("%d of %d judged rows off by more than the %s tolerance; sums from %.4g to %.4g, mean %.4g", f.Rows, f.JudgedRows, f.DType, f.SumMin, f.SumMax, f.SumMean))
		if d.Pattern == analysis.PatTrainMode {
			zf := f.ZeroFrac
			w.Text = fmt.Sprintf("Exported in train mode in %s: rows sum to values around 1 (%.3g to %.3g) and %.1f%% of allowed cells are exactly 0, as after dropout with p about %.2f (kept weights are scaled by 1/(1-p)).", wh, f.SumMin, f.SumMax, 100*zf, zf)
			w.Check = "call model.eval() (or disable attention dropout) before exporting attention weights"
			w.Evidence = append(w.Evidence, fmt.Sprintf("%.1f%% of allowed cells exactly 0", 100*zf))
		} else {
			w.Text = fmt.Sprintf("Rows do not sum to 1 in %s (mean %.4g).", wh, f.SumMean)
			w.Check = "check that the export takes the softmax output of each head (not scores, not heads summed); models with learned sink logits legitimately sum below 1: pass " + words.Option("sum_below")
		}
	case analysis.PatCrossCausal, analysis.PatPrefixCausal:
		cutWords(d, w, wh)
	case analysis.PatNegativeValues:
		w.Text = fmt.Sprintf("Negative values in %s: these are not probabilities.", wh)
		w.Check = "check that the export takes the attention probabilities after softmax, not the scores or logits"
		w.Evidence = append(w.Evidence, fmt.Sprintf("%d negative cells in %d rows, total %.4g", f.Cells, f.Rows, f.Mass))
	default:
		w.Text = fmt.Sprintf("%s in %s.", d.Pattern, wh)
	}
}

// cutWords words a cut diagnosis: cross_causal on a cross block,
// prefix_causal on the prefix rows of a prefix-LM (Value: the stop offset).
func cutWords(d *analysis.Diagnosis, w *Diagnosis, wh string) {
	f := &d.Facts
	c := int(d.Value)
	at := "k = q"
	if c != 0 {
		at = fmt.Sprintf("k = q%+d", c)
	}
	share := 0.0
	if f.Could > 0 {
		share = 100 * min(1, float64(f.Stopped)/float64(f.Could))
	}
	if d.Pattern == analysis.PatCrossCausal {
		w.Text = fmt.Sprintf("Cross-attention made causal in %s: target query q reads source keys only up to %s, though later source keys are allowed (a triangular cut in the [target, source] map).", wh, at)
		w.Check = "check which mask reaches the cross-attention call: the decoder's causal mask (tgt_mask, is_causal=True, the causal flag of an attention function shared by self- and cross-attention) must not; cross-attention takes only the source padding mask (memory_key_padding_mask / encoder attention mask)"
		w.Evidence = append(w.Evidence,
			fmt.Sprintf("%d of %d rows (%.1f%%) that have allowed source keys after %s carry no mass after it (a cross block of %d target x %d source positions)", f.Stopped, f.Could, share, at, f.Queries, f.Keys),
			fmt.Sprintf("%d allowed source cells left without mass in %d rows of %s; stops by offset k-q: %s", f.Cells, f.Rows, wh, OffsetSummary(f.Offsets)),
			fmt.Sprintf("first cut row at %s: key %d and later allowed keys are exactly 0", d.At, d.At.Key))
		return
	}
	w.Text = fmt.Sprintf("The prefix block is causal in %s: prefix positions (the first %d) do not see later prefix positions (their mass stops at %s), though a prefix-LM lets the prefix see itself both ways.", wh, f.Prefix, at)
	w.Check = "check that the prefix-LM mask (bidirectional over the first P positions, causal after them) reaches the kernel rather than a plain causal mask or is_causal=True, and that P is each example's prefix length"
	w.Evidence = append(w.Evidence,
		fmt.Sprintf("%d of %d prefix rows (%.1f%%) that have later prefix keys carry no mass after %s", f.Stopped, f.Could, share, at),
		fmt.Sprintf("%d allowed prefix cells left without mass in %d rows of %s; stops by offset k-q: %s", f.Cells, f.Rows, wh, OffsetSummary(f.Offsets)),
		fmt.Sprintf("first cut row at %s: key %d and later prefix keys are exactly 0", d.At, d.At.Key))
}

// whereWords words an only_some_* diagnosis: where a mask leak is when it
// is not everywhere.
func whereWords(d *analysis.Diagnosis, w *Diagnosis) {
	f := &d.Facts
	w.Evidence = []string{fmt.Sprintf("%s leak (%s) in %d of %d layers, %d of %d heads, %d of %d batch items; the rest is clean for this rule",
		d.Rule, f.Leak, len(d.Layers), f.BlockLayers, len(d.Heads), f.BlockHeads, len(d.Batches), f.BlockBatch)}
	switch d.Pattern {
	case analysis.PatOnlySomeHeads:
		w.Text = fmt.Sprintf("Only %s %s of %s %s %s (%s) in %s: a mask broadcast over the head axis is wrong.",
			words.Plural(len(d.Heads), "head", "heads"), words.List(d.Heads), words.Plural(len(d.Layers), "layer", "layers"), words.List(d.Layers),
			words.Plural(len(d.Heads), "leaks", "leak"), d.Rule, d.Block)
		w.Check = "check how the mask is expanded to [batch*heads, q, k] or [batch, heads, q, k] (repeat vs repeat_interleave, batch-major order) and any per-head bias"
	case analysis.PatOnlySomeLayers:
		w.Text = fmt.Sprintf("Only %s %s of %s %s (%s): %s.",
			words.Plural(len(d.Layers), "layer", "layers"), words.List(d.Layers), d.Block, words.Plural(len(d.Layers), "leaks", "leak"), d.Rule,
			words.Plural(len(d.Layers), "that layer takes another code path or gets another mask", "those layers take another code path or get another mask"))
		w.Check = "check what differs for these layers: layer type (full vs sliding), a kernel fallback, a mask passed per layer or cached from another layer"
	case analysis.PatOnlySomeBatch:
		w.Text = fmt.Sprintf("Only batch %s %s of %s %s (%s): the mask is wrong for some batch items.",
			words.Plural(len(d.Batches), "item", "items"), words.List(d.Batches), d.Block, words.Plural(len(d.Batches), "leaks", "leak"), d.Rule)
		w.Check = "check how the mask is broadcast over the batch (a [1, q, k] mask vs per-item padding masks, a path taken only for unpadded items)"
	}
}
