// Package invariance is the causal-invariance check (Check). It compares two exports of the same model on
// inputs that agree before position P and differ from P on. In a causal
// model nothing at a position before P may depend on a token at P or later,
// so every activation there must come out the same in both runs, whatever
// attention kernel computed it (eager, fused, flash: the check needs no
// attention probabilities). An earlier position that changed shows that
// something reads the future, and the first layer where it changed is where
// the leak enters.
package invariance

import (
	"context"
	"errors"
	"fmt"
	"math"
	"sort"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/loader"
)

// Options tune Check.
type Options struct {
	// From is the first changed position P, the same for every batch item;
	// -1 finds it, per batch item, from the first token that differs.
	From int
	// Tol, when > 0, replaces the dtype's tolerance (Tol).
	Tol float64
	// Progress, when non-nil, is called after each unit of work with the
	// number done and the total.
	Progress func(done, total int)
}

// NewOptions returns the defaults: P from the tokens, tolerance
// from the dtype, no progress reports.
func NewOptions() Options { return Options{From: -1} }

// Tol returns the relative tolerance used for values stored as d.
// Two values a (from A) and b (from B) agree when
//
//	|a - b| <= tol * (|b| + rms)
//
// which is numpy.isclose's rule with rtol = tol and atol = tol*rms, where rms
// is the root mean square of A's values in that layer and batch item at the
// positions before P (so features near zero are judged on the layer's scale,
// not their own).
//
// The values are several times the noise measured on two forward passes of
// a correct causal model on CPU (testdata/invariance/calibrate.py, torch
// 1.13): with the same shapes the positions before P come out bit for bit
// equal; with other matrix shapes (the second pass sees only the prefix, or
// another batch size) they differ by up to 1.8 epsilon of the compute dtype.
//   - f32 and f64: 1e-5 (84 f32 epsilons). An f64 export is often an f32
//     computation stored wider, so it gets the f32 tolerance.
//   - bf16: 6e-2 (8 epsilons of 2^-7; measured up to 1.6 epsilons, 1.25e-2).
//   - f16: 1e-2 (10 epsilons of 2^-10; CPU torch 1.13 has no f16 matmul, so
//     this follows the bf16 measurement scaled by the epsilon ratio).
//
// A model run in bf16, f16 or with TF32 matmuls and exported as f32 carries
// the rounding of the compute dtype: give its tolerance explicitly.
func Tol(d loader.DType) float64 {
	switch d {
	case loader.BFloat16:
		return 6e-2
	case loader.Float16:
		return 1e-2
	default:
		return 1e-5
	}
}

// Result is the result of Check.
type Result struct {
	// Side is the token sequence whose suffix changed ("" when From was given).
	Side string
	// From is P per batch item: the first position whose token differs (the
	// sequence length for an item whose tokens all agree).
	From []int
	// Parts has one entry per block with activations (`BLOCK/out`) in name
	// order, then one for `logits` when both exports have them.
	Parts []*Part
	// Heads lists, for blocks with attention in both exports, every (layer,
	// head, batch item) whose rows before P changed, in that order.
	Heads []analysis.HeadChange
	// Notes say what was not compared and why.
	Notes []string
	// Findings has one entry per part (and per attention-only block) whose
	// positions before P changed, in the order of Parts.
	Findings []Finding
	// Diagnoses say what the findings mean, as pattern codes and facts
	// (see analysis.Diagnosis; package internal/prose words them).
	Diagnoses []analysis.Diagnosis

	headCount map[string]int     // heads per block with attention compared
	tolOf     map[string]attnTol // element type and tolerance of those blocks
}

type attnTol struct {
	d   loader.DType
	tol float64
}

// Finding is an analysis.Finding of rule invariance: check's finding fields
// (Rule is analysis.RuleInvariance) plus what only this check has. For this rule:
// Layers are the layers where a position before P changed, the first being
// where the change enters; Heads the heads whose rows before P changed at
// the first layer where attention changed (empty without attention in both
// exports); Batches the batch items concerned; Mass the sum of the relative
// differences (|a - b| / (|b| + rms)) of the changed (layer, batch,
// position) cells and Cells their number; Max the largest |a - b|; Rows the
// positions that changed at each item's first changed layer; JudgedRows the
// (layer, batch, position) cells compared before P. Worst is the earliest
// changed position at the first layer (Key -1, Value its relative
// difference). A NaN on one side only makes the differences
// math.MaxFloat64 (JSON has no infinity).
type Finding struct {
	analysis.Finding
	// DType and Tol are the compared element type and the tolerance applied.
	DType string  `json:"dtype"`
	Tol   float64 `json:"tol"`
	// From[i] is P of batch item Batches[i].
	From []int `json:"from"`
	// Positions[i] are the positions before P of batch item Batches[i] that
	// changed at that item's first changed layer.
	Positions [][]int `json:"positions"`
	// MaxAbs and MaxRel are the largest |a - b| and |a - b| / (|b| + rms)
	// over every compared cell before P (changed or not).
	MaxAbs float64 `json:"max_abs"`
	MaxRel float64 `json:"max_rel"`
}

// Part holds the differences of one activation array, per layer,
// batch item and position: what a view colours (positions before From[batch]
// must agree; later ones are expected to differ).
type Part struct {
	// Block is the block name, or "logits".
	Block string
	// Kind is the block's kind (KindUnknown for logits).
	Kind loader.Kind
	// DType is the coarser of A's and B's element types.
	DType loader.DType
	// Tol is the tolerance applied (see Tol).
	Tol float64
	// Layers, Batch and Positions size the tables below; Positions is the
	// smaller of A's and B's. Logits have one layer.
	Layers, Batch, Positions int
	// From is P per batch item, at most Positions.
	From []int
	// Abs[layer][batch][pos] is the largest |a - b| over the features.
	Abs [][][]float64
	// Rel[layer][batch][pos] is the largest |a - b| / (|b| + rms) over the
	// features; a position differs when it exceeds Tol. A NaN on one side
	// only counts as +Inf; NaN on both sides as equal.
	Rel [][][]float64
	// Pad[batch][pos] is true for padding positions, which are not judged;
	// nil without padding.
	Pad [][]bool
}

// Differs reports whether the position is judged (before P, not padding)
// and its difference exceeds the tolerance.
func (p *Part) Differs(layer, batch, pos int) bool {
	if pos >= p.From[batch] || p.isPad(batch, pos) {
		return false
	}
	return p.Rel[layer][batch][pos] > p.Tol
}

func (p *Part) isPad(batch, pos int) bool {
	return p.Pad != nil && p.Pad[batch][pos]
}

// Changed returns the positions before P of (layer, batch) that differ.
func (p *Part) Changed(layer, batch int) []int {
	var out []int
	for pos := 0; pos < p.From[batch]; pos++ {
		if p.Differs(layer, batch, pos) {
			out = append(out, pos)
		}
	}
	return out
}

// FirstLayer returns the first layer where a position before P of the batch
// item differs, or -1 when none does.
func (p *Part) FirstLayer(batch int) int {
	for l := 0; l < p.Layers; l++ {
		if len(p.Changed(l, batch)) > 0 {
			return l
		}
	}
	return -1
}

// Max returns the largest Abs and Rel over the judged positions of a batch
// item (every layer).
func (p *Part) Max(batch int) (maxAbs, maxRel float64) {
	for l := 0; l < p.Layers; l++ {
		for pos := 0; pos < p.From[batch]; pos++ {
			if p.isPad(batch, pos) {
				continue
			}
			maxAbs = math.Max(maxAbs, p.Abs[l][batch][pos])
			maxRel = math.Max(maxRel, p.Rel[l][batch][pos])
		}
	}
	return maxAbs, maxRel
}

// Clean reports whether no judged position differs in any part or head.
func (r *Result) Clean() bool {
	for _, p := range r.Parts {
		for b := 0; b < p.Batch; b++ {
			if p.FirstLayer(b) >= 0 {
				return false
			}
		}
	}
	return len(r.Heads) == 0
}

// source reads one activation array row by row: position pos of (layer, batch).
type source struct {
	name, file                         string
	layers, batch, positions, features int
	dtype                              loader.DType
	readRow                            func(layer, batch, pos int, dst []float32) error
}

// outSource reads a block's activations; ReadOut hands out a whole
// (layer, batch) matrix, so the current one is kept.
func outSource(blk *loader.Block, file string) *source {
	var (
		buf        []float32
		cur        = [2]int{-1, -1}
		n          = blk.Features
		src        = &source{name: blk.Name + "/out", file: file, layers: blk.OutLayers, batch: blk.Batch, positions: blk.Positions, features: n, dtype: blk.OutDType}
		readMatrix = func(layer, batch int) error {
			if cur == [2]int{layer, batch} {
				return nil
			}
			if buf == nil {
				buf = make([]float32, blk.Positions*blk.Features)
			}
			cur = [2]int{-1, -1}
			if err := blk.ReadOut(layer, batch, buf); err != nil {
				return err
			}
			cur = [2]int{layer, batch}
			return nil
		}
	)
	src.readRow = func(layer, batch, pos int, dst []float32) error {
		if err := readMatrix(layer, batch); err != nil {
			return err
		}
		copy(dst, buf[pos*n:(pos+1)*n])
		return nil
	}
	return src
}

// logitsSource reads `logits` [batch, position, vocab] one row at a time (a
// whole [position, vocab] matrix can be gigabytes).
func logitsSource(arr loader.Array) (*source, error) {
	sh := arr.Shape()
	if len(sh) != 3 {
		return nil, fmt.Errorf("%s: logits: shape %v, want [batch, position, vocab]", arr.File(), sh)
	}
	return &source{name: "logits", file: arr.File(), layers: 1, batch: sh[0], positions: sh[1], features: sh[2], dtype: arr.DType(),
		readRow: func(_, batch, pos int, dst []float32) error {
			return arr.ReadFloat32([]int{batch, pos}, dst)
		}}, nil
}

// exportFile names an export in messages.
func exportFile(e *loader.Export) string {
	if len(e.Paths) == 0 {
		return "(export)"
	}
	if len(e.Paths) == 1 {
		return e.Paths[0]
	}
	return e.Paths[0] + " (+" + fmt.Sprint(len(e.Paths)-1) + " files)"
}

// sideFrom finds P per batch item for one side: the first position whose
// token differs, or where one sequence ends. changed is false when every
// item's tokens agree.
func sideFrom(sa, sb *loader.Side, batch int) (from []int, changed bool) {
	from = make([]int, batch)
	for b := 0; b < batch; b++ {
		n := min(sa.Len, sb.Len)
		p := n
		for i := 0; i < n; i++ {
			if sa.Token(b, i) != sb.Token(b, i) {
				p = i
				break
			}
		}
		if p < n || sa.Len != sb.Len {
			changed = true
		}
		from[b] = p
	}
	return from, changed
}

func hasTokens(s *loader.Side) bool { return s != nil && len(s.Tokens) > 0 }

// ErrNeedFrom (test with errors.Is) ends the errors of Check
// when the tokens do not tell where the change starts: the caller names
// its own way to give that position (the from setting, Options.From).
var ErrNeedFrom = errors.New("give the first changed position P")

// Check compares export a with export b (the same model, inputs
// that agree before P and differ from P on) and returns the differences of
// every activation array at the positions before P. It returns an error for
// inputs that cannot be compared: no activations, logits or attention in
// common, shapes that do not match, no tokens to find P from (and opt.From
// < 0), or tokens that do not differ at all.
//
// P comes from opt.From, or from the side whose tokens differ: a block is
// checked when its query side is that side (or unknown); blocks on a side
// whose tokens agree while another side changed are skipped with a note,
// since they may legitimately read the changed side (cross-attention).
// Padding positions of A (valid/SIDE) are not judged.
func Check(ctx context.Context, a, b *loader.Export, opt Options) (*Result, error) {
	fa, fb := exportFile(a), exportFile(b)
	res := &Result{}

	// Pair up what both exports hold.
	type pair struct {
		blk    *loader.Block // A's block; nil for logits
		sa, sb *source
	}
	var pairs []pair
	var attnPairs [][2]*loader.Block
	for _, ba := range a.Blocks {
		bb := b.Block(ba.Name)
		if ba.OutLayers > 0 {
			if bb == nil || bb.OutLayers == 0 {
				return nil, fmt.Errorf("%s/out: in %s but not in %s", ba.Name, fa, fb)
			}
			pairs = append(pairs, pair{ba, outSource(ba, fa), outSource(bb, fb)})
		}
		if bb != nil && ba.Layers > 0 && bb.Layers > 0 {
			attnPairs = append(attnPairs, [2]*loader.Block{ba, bb})
		} else if ba.Layers > 0 {
			res.Notes = append(res.Notes, fmt.Sprintf("%s/attn: only in %s, heads not compared", ba.Name, fa))
		}
	}
	for _, bb := range b.Blocks {
		if bb.OutLayers > 0 {
			if ba := a.Block(bb.Name); ba == nil || ba.OutLayers == 0 {
				return nil, fmt.Errorf("%s/out: in %s but not in %s", bb.Name, fb, fa)
			}
		}
	}
	switch {
	case a.Logits != nil && b.Logits != nil:
		la, err := logitsSource(a.Logits)
		if err != nil {
			return nil, err
		}
		lb, err := logitsSource(b.Logits)
		if err != nil {
			return nil, err
		}
		pairs = append(pairs, pair{nil, la, lb})
	case a.Logits != nil:
		res.Notes = append(res.Notes, "logits: only in "+fa+", not compared")
	case b.Logits != nil:
		res.Notes = append(res.Notes, "logits: only in "+fb+", not compared")
	}
	if len(pairs) == 0 && len(attnPairs) == 0 {
		return nil, fmt.Errorf("%s and %s: nothing to compare: no BLOCK/out, logits or BLOCK/attn in both", fa, fb)
	}
	for _, p := range pairs {
		if err := sameShape(p.sa, p.sb); err != nil {
			return nil, err
		}
	}
	for _, ab := range attnPairs {
		x, y := ab[0], ab[1]
		if x.Layers != y.Layers || x.Heads != y.Heads || x.Batch != y.Batch {
			return nil, fmt.Errorf("%s/attn: [layer %d, batch %d, head %d] in %s but [layer %d, batch %d, head %d] in %s",
				x.Name, x.Layers, x.Batch, x.Heads, fa, y.Layers, y.Batch, y.Heads, fb)
		}
	}

	batch := 0
	for _, p := range pairs {
		batch = max(batch, p.sa.batch)
	}
	for _, ab := range attnPairs {
		batch = max(batch, ab[0].Batch)
	}

	// Find P.
	sideOf := func(blk *loader.Block) string {
		if blk == nil {
			return ""
		}
		return blk.QuerySide
	}
	changedSide := map[string][]int{}
	if opt.From < 0 {
		var names []string
		for name, sa := range a.Sides {
			if sb := b.Side(name); hasTokens(sa) && hasTokens(sb) {
				names = append(names, name)
			}
		}
		sort.Strings(names)
		if len(names) == 0 {
			return nil, fmt.Errorf("%s and %s: no tokens/SIDE in both to find the first changed position P: %w", fa, fb, ErrNeedFrom)
		}
		for _, name := range names {
			if from, ch := sideFrom(a.Side(name), b.Side(name), batch); ch {
				changedSide[name] = from
			}
		}
		switch len(changedSide) {
		case 0:
			return nil, fmt.Errorf("%s and %s: the tokens are the same, so nothing tells where the change starts; export B with the tokens from P on replaced, or %w", fa, fb, ErrNeedFrom)
		case 1:
			for name, from := range changedSide {
				res.Side, res.From = name, from
			}
		default:
			var ch []string
			for name := range changedSide {
				ch = append(ch, name)
			}
			sort.Strings(ch)
			return nil, fmt.Errorf("%s and %s: tokens differ on more than one side (%v); change one side only, or %w", fa, fb, ch, ErrNeedFrom)
		}
	} else {
		res.From = make([]int, batch)
		for i := range res.From {
			res.From[i] = opt.From
		}
	}
	// Which blocks the change applies to.
	applies := func(side string) bool {
		if opt.From >= 0 || side == "" || side == res.Side {
			return true
		}
		return false
	}

	total := 0
	for _, p := range pairs {
		total += p.sa.layers * p.sa.batch
	}
	for _, ab := range attnPairs {
		total += ab[0].Layers * ab[0].Batch * ab[0].Heads
	}
	done := 0
	step := func() error {
		done++
		if opt.Progress != nil {
			opt.Progress(done, total)
		}
		return ctx.Err()
	}

	for _, p := range pairs {
		side := sideOf(p.blk)
		if p.blk == nil {
			side = res.Side // logits follow the changed side
		}
		if !applies(side) {
			res.Notes = append(res.Notes, fmt.Sprintf("%s: tokens/%s are the same in both and tokens/%s changed; not checked (it may read %s)", p.sa.name, side, res.Side, res.Side))
			for i := 0; i < p.sa.layers*p.sa.batch; i++ {
				if err := step(); err != nil {
					return nil, err
				}
			}
			continue
		}
		part, err := comparePart(p.blk, p.sa, p.sb, res.From, a.Side(side), opt.Tol, step)
		if err != nil {
			return nil, err
		}
		res.Parts = append(res.Parts, part)
	}
	for _, ab := range attnPairs {
		if !applies(ab[0].QuerySide) {
			res.Notes = append(res.Notes, fmt.Sprintf("%s/attn: tokens/%s are the same in both and tokens/%s changed; heads not compared", ab[0].Name, ab[0].QuerySide, res.Side))
			for i := 0; i < ab[0].Layers*ab[0].Batch*ab[0].Heads; i++ {
				if err := step(); err != nil {
					return nil, err
				}
			}
			continue
		}
		dt := coarser(ab[0].DType, ab[1].DType)
		tol := Tol(dt)
		if opt.Tol > 0 {
			tol = opt.Tol
		}
		if res.headCount == nil {
			res.headCount, res.tolOf = map[string]int{}, map[string]attnTol{}
		}
		res.headCount[ab[0].Name], res.tolOf[ab[0].Name] = ab[0].Heads, attnTol{dt, tol}
		hs, err := compareHeads(ab[0], ab[1], res.From, a.Side(ab[0].QuerySide), tol, step)
		if err != nil {
			return nil, err
		}
		res.Heads = append(res.Heads, hs...)
	}
	res.explain()
	return res, nil
}

func sameShape(x, y *source) error {
	if x.layers != y.layers || x.batch != y.batch || x.features != y.features {
		what := "feature"
		if x.name == "logits" {
			what = "vocab"
		}
		return fmt.Errorf("%s: [layer %d, batch %d, %s %d] in %s but [layer %d, batch %d, %s %d] in %s; A and B must come from the same model and batch",
			x.name, x.layers, x.batch, what, x.features, x.file, y.layers, y.batch, what, y.features, y.file)
	}
	return nil
}

// coarser returns the element type with the larger tolerance.
func coarser(x, y loader.DType) loader.DType {
	if Tol(y) > Tol(x) {
		return y
	}
	return x
}

// diff is |a - b| and |a - b| / (|b| + scale) with the NaN rule of
// Part.Rel.
func diff(a, b, scale float64) (abs, rel float64) {
	an, bn := math.IsNaN(a), math.IsNaN(b)
	switch {
	case an && bn, a == b: // equal infinities too
		return 0, 0
	case an || bn || math.IsInf(a, 0) || math.IsInf(b, 0):
		return math.Inf(1), math.Inf(1)
	}
	abs = math.Abs(a - b)
	den := math.Abs(b) + scale
	if den == 0 {
		return abs, math.Inf(1)
	}
	return abs, abs / den
}

// rmsFloor keeps the scale positive for an all-zero layer, so that exact
// zeros on both sides compare equal and anything else counts as a change.
const rmsFloor = 1e-30

func comparePart(blk *loader.Block, sa, sb *source, from []int, side *loader.Side, tolOpt float64, step func() error) (*Part, error) {
	p := &Part{Block: sa.name, DType: coarser(sa.dtype, sb.dtype), Layers: sa.layers, Batch: sa.batch,
		Positions: min(sa.positions, sb.positions)}
	if blk != nil {
		p.Block, p.Kind = blk.Name, blk.Kind
	}
	p.Tol = Tol(p.DType)
	if tolOpt > 0 {
		p.Tol = tolOpt
	}
	p.From = make([]int, p.Batch)
	for bi := range p.From {
		f := from[len(from)-1]
		if bi < len(from) {
			f = from[bi]
		}
		p.From[bi] = min(max(f, 0), p.Positions)
	}
	if side != nil && len(side.Valid) > 0 {
		p.Pad = make([][]bool, p.Batch)
		for bi := range p.Pad {
			p.Pad[bi] = make([]bool, p.Positions)
			for pos := range p.Pad[bi] {
				p.Pad[bi][pos] = !side.IsValid(bi, pos)
			}
		}
	}
	ra := make([]float32, sa.features)
	rb := make([]float32, sb.features)
	p.Abs = make([][][]float64, p.Layers)
	p.Rel = make([][][]float64, p.Layers)
	for l := 0; l < p.Layers; l++ {
		p.Abs[l] = make([][]float64, p.Batch)
		p.Rel[l] = make([][]float64, p.Batch)
		for bi := 0; bi < p.Batch; bi++ {
			// Scale: root mean square of A at the judged positions.
			var ss float64
			var cnt int
			for pos := 0; pos < p.From[bi]; pos++ {
				if p.isPad(bi, pos) {
					continue
				}
				if err := sa.readRow(l, bi, pos, ra); err != nil {
					return nil, err
				}
				for _, v := range ra {
					if x := float64(v); !math.IsNaN(x) && !math.IsInf(x, 0) {
						ss += x * x
						cnt++
					}
				}
			}
			scale := rmsFloor
			if cnt > 0 {
				scale = max(math.Sqrt(ss/float64(cnt)), rmsFloor)
			}
			absRow := make([]float64, p.Positions)
			relRow := make([]float64, p.Positions)
			for pos := 0; pos < p.Positions; pos++ {
				if err := sa.readRow(l, bi, pos, ra); err != nil {
					return nil, err
				}
				if err := sb.readRow(l, bi, pos, rb); err != nil {
					return nil, err
				}
				var ma, mr float64
				for f := range ra {
					d, r := diff(float64(ra[f]), float64(rb[f]), scale)
					ma, mr = math.Max(ma, d), math.Max(mr, r)
				}
				absRow[pos], relRow[pos] = ma, mr
			}
			p.Abs[l][bi], p.Rel[l][bi] = absRow, relRow
			if err := step(); err != nil {
				return nil, err
			}
		}
	}
	return p, nil
}

func compareHeads(xa, xb *loader.Block, from []int, side *loader.Side, tol float64, step func() error) ([]analysis.HeadChange, error) {
	bufA := make([]float32, xa.Queries*xa.Keys)
	bufB := make([]float32, xb.Queries*xb.Keys)
	keys := min(xa.Keys, xb.Keys)
	var out []analysis.HeadChange
	for l := 0; l < xa.Layers; l++ {
		for bi := 0; bi < xa.Batch; bi++ {
			f := from[len(from)-1]
			if bi < len(from) {
				f = from[bi]
			}
			// Absolute query positions present in both and before P.
			lo := max(xa.QueryOffset, xb.QueryOffset)
			hi := min(f, xa.QueryOffset+xa.Queries, xb.QueryOffset+xb.Queries)
			for h := 0; h < xa.Heads; h++ {
				if hi <= lo {
					if err := step(); err != nil {
						return nil, err
					}
					continue
				}
				if err := xa.ReadAttn(l, bi, h, bufA); err != nil {
					return nil, err
				}
				if err := xb.ReadAttn(l, bi, h, bufB); err != nil {
					return nil, err
				}
				var ss float64
				var cnt int
				for q := lo; q < hi; q++ {
					if side != nil && !side.IsValid(bi, q) {
						continue
					}
					row := bufA[(q-xa.QueryOffset)*xa.Keys:]
					for k := 0; k < keys; k++ {
						if x := float64(row[k]); !math.IsNaN(x) && !math.IsInf(x, 0) {
							ss += x * x
							cnt++
						}
					}
				}
				scale := rmsFloor
				if cnt > 0 {
					scale = max(math.Sqrt(ss/float64(cnt)), rmsFloor)
				}
				hc := analysis.HeadChange{Block: xa.Name, Layer: l, Head: h, Batch: bi}
				for q := lo; q < hi; q++ {
					if side != nil && !side.IsValid(bi, q) {
						continue
					}
					rowA := bufA[(q-xa.QueryOffset)*xa.Keys:]
					rowB := bufB[(q-xb.QueryOffset)*xb.Keys:]
					var ma, mr float64
					for k := 0; k < keys; k++ {
						d, r := diff(float64(rowA[k]), float64(rowB[k]), scale)
						ma, mr = math.Max(ma, d), math.Max(mr, r)
					}
					if mr > tol {
						hc.Rows = append(hc.Rows, q)
						hc.MaxAbs, hc.MaxRel = math.Max(hc.MaxAbs, ma), math.Max(hc.MaxRel, mr)
					}
				}
				if len(hc.Rows) > 0 {
					out = append(out, hc)
				}
				if err := step(); err != nil {
					return nil, err
				}
			}
		}
	}
	return out, nil
}

// finite keeps JSON-bound numbers finite: +Inf (a NaN on one side only)
// becomes math.MaxFloat64.
func finite(x float64) float64 {
	if math.IsInf(x, 1) || math.IsNaN(x) {
		return math.MaxFloat64
	}
	return x
}

// judged returns the judged positions before P of a batch item.
func (p *Part) judged(batch int) int {
	n := 0
	for pos := 0; pos < p.From[batch]; pos++ {
		if !p.isPad(batch, pos) {
			n++
		}
	}
	return n
}

// headsAt returns the first layer where heads of the block changed rows
// before P and those heads (sorted, over batch items), or -1.
func (r *Result) headsAt(block string) (int, []int) {
	first := -1
	for _, h := range r.Heads {
		if h.Block == block && (first < 0 || h.Layer < first) {
			first = h.Layer
		}
	}
	if first < 0 {
		return -1, nil
	}
	seen := map[int]bool{}
	var hs []int
	for _, h := range r.Heads {
		if h.Block == block && h.Layer == first && !seen[h.Head] {
			seen[h.Head] = true
			hs = append(hs, h.Head)
		}
	}
	sort.Ints(hs)
	return first, hs
}

// explain turns the differences into findings and diagnoses.
func (r *Result) explain() {
	blockFound := false
	for _, p := range r.Parts {
		if p.Block != "logits" {
			for b := 0; b < p.Batch; b++ {
				if p.FirstLayer(b) >= 0 {
					blockFound = true
				}
			}
		}
	}
	for _, p := range r.Parts {
		f, ok := r.partFinding(p)
		if !ok {
			continue
		}
		r.Findings = append(r.Findings, f)
		if p.Block == "logits" && blockFound {
			continue // a consequence of the block's finding
		}
		r.Diagnoses = append(r.Diagnoses, r.partDiagnoses(p, f)...)
	}
	// Attention-only blocks: heads changed but no activations to say more.
	for _, name := range r.headBlocks() {
		hasPart := false
		for _, p := range r.Parts {
			hasPart = hasPart || p.Block == name
		}
		if hasPart {
			continue
		}
		f := r.headFinding(name)
		r.Findings = append(r.Findings, f)
		r.Diagnoses = append(r.Diagnoses, r.headDiagnosis(name, f.From, f.Batches))
	}
}

func (r *Result) headBlocks() []string {
	var out []string
	seen := map[string]bool{}
	for _, h := range r.Heads {
		if !seen[h.Block] {
			seen[h.Block] = true
			out = append(out, h.Block)
		}
	}
	return out
}

func (r *Result) partFinding(p *Part) (Finding, bool) {
	f := Finding{Finding: analysis.Finding{Block: p.Block, Rule: analysis.RuleInvariance, Heads: []int{}},
		DType: p.DType.String(), Tol: p.Tol}
	layerSet := map[int]bool{}
	first := -1
	for b := 0; b < p.Batch; b++ {
		ma, mr := p.Max(b)
		f.MaxAbs, f.MaxRel = math.Max(f.MaxAbs, ma), math.Max(f.MaxRel, mr)
		f.JudgedRows += int64(p.Layers * p.judged(b))
		fl := p.FirstLayer(b)
		if fl < 0 {
			continue
		}
		if first < 0 || fl < first {
			first = fl
		}
		f.Batches = append(f.Batches, b)
		f.From = append(f.From, p.From[b])
		pos := p.Changed(fl, b)
		f.Positions = append(f.Positions, pos)
		f.Rows += int64(len(pos))
		for l := fl; l < p.Layers; l++ {
			for _, q := range p.Changed(l, b) {
				layerSet[l] = true
				f.Cells++
				f.Mass += p.Rel[l][b][q]
				f.Max = math.Max(f.Max, p.Abs[l][b][q])
			}
		}
	}
	if first < 0 {
		return f, false
	}
	for l := 0; l < p.Layers; l++ {
		if layerSet[l] {
			f.Layers = append(f.Layers, l)
		}
	}
	if hl, hs := r.headsAt(p.Block); hl >= 0 {
		f.Heads = hs
	}
	// Worst: the earliest changed position at the first layer.
	wb, wq := -1, -1
	for i, b := range f.Batches {
		if p.FirstLayer(b) != first {
			continue
		}
		if q := f.Positions[i][0]; wq < 0 || q < wq {
			wb, wq = b, q
		}
	}
	head := -1
	if len(f.Heads) > 0 {
		head = f.Heads[0]
	}
	f.Worst = analysis.Location{Block: p.Block, Layer: first, Head: head, Batch: wb, Query: wq, Key: -1, Value: finite(p.Rel[first][wb][wq])}
	f.Mass, f.Max, f.MaxAbs, f.MaxRel = finite(f.Mass), finite(f.Max), finite(f.MaxAbs), finite(f.MaxRel)
	return f, true
}

func (r *Result) partDiagnoses(p *Part, f Finding) []analysis.Diagnosis {
	first := f.Layers[0]
	w := f.Worst
	from := 0
	for i, b := range f.Batches {
		if b == w.Batch {
			from = f.From[i]
		}
	}
	// Does every judged position before P change at the first layer, in
	// every item concerned?
	all := true
	some := false
	for i, b := range f.Batches {
		if p.FirstLayer(b) != first || len(f.Positions[i]) != p.judged(b) {
			all = false
		}
		some = some || p.judged(b) > 1
	}
	all = all && some
	inv := &analysis.InvFacts{From: from, All: all, Bidirectional: p.Kind == loader.KindBidirectional,
		Changed: f.Layers, MaxAbs: f.MaxAbs, MaxRel: f.MaxRel, Tol: f.Tol, DType: f.DType}
	for i, b := range f.Batches {
		inv.Items = append(inv.Items, analysis.ItemChange{Batch: b, Positions: f.Positions[i], FirstLayer: p.FirstLayer(b), From: f.From[i]})
	}
	// The same reach before P in every item suggests a mask that lets a
	// query see the next n keys.
	reach := -1
	for i := range f.Batches {
		n := f.From[i] - f.Positions[i][0]
		contiguous := f.Positions[i][len(f.Positions[i])-1] == f.From[i]-1 && len(f.Positions[i]) == n
		if !contiguous || (reach >= 0 && n != reach) {
			reach = -2
			break
		}
		reach = n
	}
	inv.Reach = reach
	d := analysis.Diagnosis{Block: p.Block, Rule: analysis.RuleInvariance, Layers: []int{first}, Heads: f.Heads, Batches: f.Batches,
		Value: float64(first), At: w, Facts: analysis.Facts{PadNaNLayer: -1, Inv: inv}}
	switch {
	case p.Block == "logits":
		d.Pattern = analysis.PatOutputReadsFuture
		d.Value = 0
	case all && first == 0:
		d.Pattern = analysis.PatNotCausal
		d.Value = 0
	default:
		d.Pattern = analysis.PatReadsFuture
	}
	out := []analysis.Diagnosis{d}
	if hl, _ := r.headsAt(p.Block); hl >= 0 {
		out = append(out, r.headDiagnosis(p.Block, f.From, f.Batches))
	}
	if (p.DType == loader.Float32 || p.DType == loader.Float64) && f.MaxRel <= Tol(loader.BFloat16) && reach < 0 {
		rinv := &analysis.InvFacts{From: from, MaxAbs: f.MaxAbs, MaxRel: f.MaxRel, Tol: f.Tol, DType: f.DType, Suggest: Tol(loader.BFloat16)}
		out = append(out, analysis.Diagnosis{Pattern: analysis.PatRoundingLevel, Block: p.Block, Rule: analysis.RuleInvariance, Layers: []int{first}, Batches: f.Batches, At: w,
			Value: f.MaxRel, Facts: analysis.Facts{PadNaNLayer: -1, Inv: rinv}})
	}
	return out
}

func (r *Result) headDiagnosis(block string, from, batches []int) analysis.Diagnosis {
	hl, hs := r.headsAt(block)
	heads := 0
	var rows []int
	var changes []analysis.HeadChange
	var worst analysis.HeadChange
	for _, h := range r.Heads {
		if h.Block != block {
			continue
		}
		heads = max(heads, h.Head+1)
		if h.Layer == hl {
			changes = append(changes, h)
			if len(rows) == 0 || h.Rows[0] < rows[0] {
				rows, worst = h.Rows, h
			}
		}
	}
	if r.headCount != nil {
		heads = r.headCount[block]
	}
	return analysis.Diagnosis{Pattern: analysis.PatFutureHeads, Block: block, Rule: analysis.RuleInvariance, Layers: []int{hl}, Heads: hs, Batches: batches,
		Value: float64(hl), Facts: analysis.Facts{PadNaNLayer: -1, Inv: &analysis.InvFacts{HeadChanges: changes, HeadTotal: heads}},
		At: analysis.Location{Block: block, Layer: hl, Head: worst.Head, Batch: worst.Batch, Query: worst.Rows[0], Key: -1, Value: finite(worst.MaxRel)}}
}

func (r *Result) headFinding(block string) Finding {
	hl, hs := r.headsAt(block)
	f := Finding{Finding: analysis.Finding{Block: block, Rule: analysis.RuleInvariance, Heads: hs}, DType: "", Tol: 0}
	layerSet := map[int]bool{}
	batchRows := map[int]map[int]bool{}
	for _, h := range r.Heads {
		if h.Block != block {
			continue
		}
		layerSet[h.Layer] = true
		f.Cells += int64(len(h.Rows))
		f.Mass += h.MaxRel
		f.Max = math.Max(f.Max, h.MaxAbs)
		f.MaxAbs, f.MaxRel = math.Max(f.MaxAbs, h.MaxAbs), math.Max(f.MaxRel, h.MaxRel)
		if h.Layer == hl {
			if batchRows[h.Batch] == nil {
				batchRows[h.Batch] = map[int]bool{}
			}
			for _, q := range h.Rows {
				batchRows[h.Batch][q] = true
			}
		}
	}
	for l := range layerSet {
		f.Layers = append(f.Layers, l)
	}
	sort.Ints(f.Layers)
	for b := range batchRows {
		f.Batches = append(f.Batches, b)
	}
	sort.Ints(f.Batches)
	for _, b := range f.Batches {
		var pos []int
		for q := range batchRows[b] {
			pos = append(pos, q)
		}
		sort.Ints(pos)
		f.Positions = append(f.Positions, pos)
		f.Rows += int64(len(pos))
		fb := r.From[len(r.From)-1]
		if b < len(r.From) {
			fb = r.From[b]
		}
		f.From = append(f.From, fb)
	}
	if r.tolOf != nil {
		f.DType, f.Tol = r.tolOf[block].d.String(), r.tolOf[block].tol
	}
	f.Worst = analysis.Location{Block: block, Layer: hl, Head: hs[0], Batch: f.Batches[0], Query: f.Positions[0][0], Key: -1, Value: finite(f.MaxRel)}
	f.Mass, f.Max, f.MaxAbs, f.MaxRel = finite(f.Mass), finite(f.Max), finite(f.MaxAbs), finite(f.MaxRel)
	return f
}
