package prose

import (
	"fmt"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/internal/words"
)

func seq(n int) []int {
	s := make([]int, n)
	for i := range s {
		s[i] = i
	}
	return s
}

// invWords words a diagnosis of the causal-invariance check (heed check A
// --against B).
func invWords(d *analysis.Diagnosis, w *Diagnosis) {
	f := d.Facts.Inv
	if f == nil {
		f = &analysis.InvFacts{}
	}
	switch d.Pattern {
	case analysis.PatFutureHeads:
		headWords(d, f, w)
		return
	case analysis.PatRoundingLevel:
		w.Text = fmt.Sprintf("the differences before P are small (at most %.3g relative) and do not end at P: if the model ran in bf16, f16 or with TF32 matmuls and was exported as %s, rounding alone can reach this; check again with %s %.3g before hunting a leak.",
			f.MaxRel, f.DType, words.Option("tol"), f.Suggest)
		w.Check = "the dtype the model computed in (not the one it was exported in)"
		w.Evidence = []string{fmt.Sprintf("tolerance %.3g for %s; measured rounding of two correct bf16 passes: up to 1.25e-2", f.Tol, f.DType)}
		return
	}
	first := d.Layers[0]
	for _, it := range f.Items {
		w.Evidence = append(w.Evidence, fmt.Sprintf("batch item %d: %s %s changed at layer %d (tokens changed from %d on)",
			it.Batch, words.Plural(len(it.Positions), "position", "positions"), words.Span(it.Positions, 3), it.FirstLayer, it.From))
	}
	if first > 0 {
		w.Evidence = append(w.Evidence, fmt.Sprintf("layers %s agree within tolerance before P", words.Span(seq(first), 3)))
	}
	if len(f.Changed) > 1 {
		w.Evidence = append(w.Evidence, fmt.Sprintf("changed layers: %s", words.Span(f.Changed, 3)))
	}
	w.Evidence = append(w.Evidence, fmt.Sprintf("largest difference before P: %.3g absolute, %.3g relative (tolerance %.3g for %s)", f.MaxAbs, f.MaxRel, f.Tol, f.DType))
	if f.Reach > 0 && !f.All {
		w.Evidence = append(w.Evidence, fmt.Sprintf("in every item exactly the last %d %s before P changed: consistent with a mask that lets query q see keys up to q+%d", f.Reach, words.Plural(f.Reach, "position", "positions"), f.Reach))
	}
	switch d.Pattern {
	case analysis.PatOutputReadsFuture:
		w.Text = fmt.Sprintf("position %d of the logits changed when only tokens from %d on were changed: the model reads the future; export each layer's output (BLOCK/out) to find the layer where it enters.", d.At.Query, f.From)
		w.Check = "the attention masks of every layer; export layer outputs with forward hooks to locate it"
	case analysis.PatNotCausal:
		if f.Bidirectional {
			w.Text = fmt.Sprintf("every position before P of %s changed already at layer 0 when only tokens from %d on were changed: it is not causal, it reads the whole sequence; its metadata declares it bidirectional, so for an encoder this is expected.", d.Block, f.From)
			w.Check = "nothing if this is an encoder; if it should be causal, whether a causal mask reaches its attention at all"
		} else {
			w.Text = fmt.Sprintf("every position before P of %s changed already at layer 0 when only tokens from %d on were changed: it is not causal, it reads the whole sequence (as if it had no causal mask).", d.Block, f.From)
			w.Check = "whether the causal mask (or the kernel's causal flag) reaches this block's attention at all, e.g. dropped when a custom bias or padding mask is passed"
		}
	default: // analysis.PatReadsFuture
		extra := ""
		if f.All {
			extra = " (every position before P changed there, as if that layer had no causal mask)"
		}
		w.Text = fmt.Sprintf("position %d of layer %d changed when only tokens from %d on were changed: something at layer %d reads the future%s.", d.At.Query, first, f.From, first, extra)
		w.Check = fmt.Sprintf("how layer %d builds its attention mask and which kernel path it takes (fused / flash / sliding-window path, a custom bias that disables the causal flag, an off-by-one in the mask); earlier layers agree", first)
	}
}

// headWords words future_heads: the heads whose rows before P changed first.
func headWords(d *analysis.Diagnosis, f *analysis.InvFacts, w *Diagnosis) {
	hl, hs, heads := int(d.Value), d.Heads, f.HeadTotal
	for _, h := range f.HeadChanges {
		w.Evidence = append(w.Evidence, fmt.Sprintf("layer %d head %d batch item %d: rows %s changed (largest difference %.3g)", h.Layer, h.Head, h.Batch, words.Span(h.Rows, 3), h.MaxAbs))
	}
	hw := words.Plural(len(hs), "head", "heads")
	if len(hs) < heads {
		w.Text = fmt.Sprintf("at layer %d only %s %s of %d changed their rows before P: %s the future (the other heads of that layer agree).", hl, hw, words.List(hs), heads, words.Plural(len(hs), "it reads", "they read"))
		w.Check = fmt.Sprintf("the mask or bias given to %s %s of layer %d: a per-head mask broadcast wrongly, or a head-specific path", hw, words.List(hs), hl)
	} else {
		w.Text = fmt.Sprintf("at layer %d every head (%d) changed its rows before P: the layer's mask lets the queries see the future.", hl, heads)
		w.Check = fmt.Sprintf("the mask layer %d passes to its attention", hl)
	}
}
