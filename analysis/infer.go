package analysis

import (
	"context"
	"fmt"
	"math"
	"sort"

	"github.com/heed-dev/heed/loader"
)

// Inferring a block's mask from its exact zeros.
//
// When nobody said a block's kind (no metadata, no --kind, no attribute),
// heed reads a sample of its (layer, head, batch item) matrices and looks at
// where the exact zeros are: a mask sets the probabilities of the keys it
// blocks to exactly 0 (softmax of -inf), the same cells in every head,
// while a head that merely pays little attention to a key gives it a small
// positive weight. The rule, per sampled matrix ("unit"):
//
//   - Keys that hold no mass in any row of the unit are "dead" (padding, or
//     the unused slots of a pre-allocated cache) and are left out, and so
//     are rows whose own position is a dead key.
//   - A row "looks past itself" when it has mass on a key after its own
//     position p (row q sits at p = q + K - Q: the last Q of K positions).
//     A unit with no such row and at least one live key after some row's
//     position (so there was something to see) looks causal; its window is
//     W_u = max over rows of (p - first key with mass + 1).
//   - A unit whose rows that look past themselves all sit before some P < K,
//     and reach no further than P - 1, while rows from P on exist and do
//     not, and at least 90% of the rows before P - 1 reach exactly P - 1,
//     looks like a prefix LM with prefix P.
//   - A unit with rows looking past themselves whose live cells after the
//     query's position are still at least half exact zeros, a share at least
//     0.4 above that of the cells before it, looks "mostly masked": a causal
//     mask that leaks (a cell let through, a mask shifted by +1). Sharp
//     heads whose small weights underflow have zeros on both sides. The
//     mirror image (cells before the query mostly zeros, mass after it: an
//     inverted boolean mask) counts the same way.
//   - Any other unit with rows looking past themselves is dense.
//
// Over the units: causal when at least half of them look causal or like a
// prefix (a mask lost in some layers or heads leaves the others masked: the
// heads that break the pattern are then the findings, not a reason to call
// the block bidirectional); prefix P when at least half look like a prefix
// with the same P; a window W when at least 60% of the causal-looking units
// have the same W_u = W and W is less than the longest row's reach (a row
// that sees key 0 gives W_u = p + 1, so a causal block without a window
// shows no W shared below that). At least 80% dense units: a square block
// is bidirectional, one with more queries than keys cross-attention; with
// fewer queries than keys it is not decided (cross-attention over a longer
// source, or a KV-cache step whose mask let the future through). Anything
// in between is not decided either, and the block is reported as not
// judged.
//
// The thresholds (1/2, 60%, 80%) are ours, chosen so that a mask lost in a
// minority of layers stays a finding and a block whose heads disagree
// about equally is not guessed at.

// inferMaxValues bounds how many values the sample reads per block.
const inferMaxValues = 1 << 24

// InferAcc holds the counts behind an inference.
type InferAcc struct {
	// Units sampled ((layer, head, batch item) matrices); Causal, Prefix and
	// Dense count how each looked; Blank the units with nothing to show
	// (no live key after any row's position, or no finite row).
	Units, Causal, Prefix, Shifted, Dense, Blank int64
	// Shift is the most common s of the units whose rows all stop s keys
	// after their own position (a causal mask shifted by +s).
	Shift int
	// Window and Prefix (Len) are the inferred W and P (0 = none), WindowUnits
	// and PrefixUnits the units showing exactly them.
	Window      int
	WindowUnits int64
	PrefixLen   int
	PrefixUnits int64
	// BreakLayers are the layers with a unit that breaks the inferred mask
	// (dense units of a block inferred causal).
	BreakLayers []int
}

// Inference is the outcome of InferMask for one block.
type Inference struct {
	// Kind is the inferred kind, loader.KindUnknown when not decided.
	Kind loader.Kind
	// Window and Prefix are the inferred W and P (0 = none).
	Window, Prefix int
	// Evidence says what the data showed, in words.
	Evidence string
	// Acc holds the counts behind it.
	Acc InferAcc
}

type unitLook int

const (
	lookBlank unitLook = iota
	lookCausal
	lookPrefix
	lookShifted
	lookDense
)

// InferMask samples the matrices of blk and infers its mask (see the rule
// above). qs and ks are the block's query and key sides (nil without);
// padding query rows (valid = 0) are left out.
func InferMask(ctx context.Context, blk *loader.Block, qs, ks *loader.Side) (Inference, error) {
	var inf Inference
	Q, K := blk.Queries, blk.Keys
	if Q <= 0 || K <= 0 || blk.Layers <= 0 {
		return inf, nil
	}
	off := 0
	if Q < K {
		off = K - Q
	}
	units := sampleUnits(blk)
	buf := make([]float32, Q*K)
	dead := make([]bool, K)
	type seen struct {
		look      unitLook
		w, p, lay int
	}
	var all []seen
	for _, u := range units {
		if err := ctx.Err(); err != nil {
			return inf, fmt.Errorf("%w: %w", ErrCanceled, err)
		}
		if err := blk.ReadAttn(u[0], u[2], u[1], buf); err != nil {
			return inf, err
		}
		look, w, p := lookAt(buf, Q, K, off, u[2], qs, dead)
		all = append(all, seen{look, w, p, u[0]})
	}
	a := &inf.Acc
	wins := map[int]int64{}
	pres := map[int]int64{}
	shifts := map[int]int64{}
	maxReach := 0
	for _, s := range all {
		a.Units++
		switch s.look {
		case lookBlank:
			a.Blank++
		case lookCausal:
			a.Causal++
			wins[s.w]++
		case lookPrefix:
			a.Prefix++
			pres[s.p]++
		case lookShifted:
			a.Shifted++
			shifts[s.w]++
		case lookDense:
			a.Dense++
		}
	}
	maxReach = off + Q // a row that sees key 0 from the last position
	informative := a.Units - a.Blank
	if informative == 0 {
		inf.Evidence = fmt.Sprintf("no sampled head shows a key after its query's position (%d sampled): nothing to infer a mask from", a.Units)
		return inf, nil
	}
	masked := a.Causal + a.Prefix + a.Shifted
	pct := func(n int64) string { return fmt.Sprintf("%d of %d", n, informative) }
	switch {
	case 2*masked >= informative:
		inf.Kind = loader.KindCausal
		if p, n := mode(pres); 2*n >= informative && p > 0 {
			inf.Prefix, a.PrefixLen, a.PrefixUnits = p, p, n
		}
		if w, n := mode(wins); a.Causal > 0 && 10*n >= 6*a.Causal && w < maxReach && inf.Prefix == 0 {
			inf.Window, a.Window, a.WindowUnits = w, w, n
		}
		var breaks []int
		for _, s := range all {
			if (s.look == lookDense || s.look == lookShifted) && (len(breaks) == 0 || breaks[len(breaks)-1] != s.lay) {
				breaks = append(breaks, s.lay)
			}
		}
		a.BreakLayers = uniqueSorted(breaks)
		switch {
		case inf.Prefix > 0:
			inf.Evidence = fmt.Sprintf("causal mask with a prefix of %d: %s sampled heads have exact zeros after each query's position except inside the first %d positions", inf.Prefix, pct(a.PrefixUnits), inf.Prefix)
		case inf.Window > 0:
			inf.Evidence = fmt.Sprintf("causal mask with a window of %d: %s sampled heads have exact zeros after each query's position, and %d of them before each query's last %d keys", inf.Window, pct(a.Causal), a.WindowUnits, inf.Window)
		default:
			inf.Evidence = fmt.Sprintf("causal mask: %s sampled heads have exact zeros after each query's position", pct(masked))
		}
		if a.Shifted > 0 {
			sh, _ := mode(shifts)
			a.Shift = sh
			inf.Evidence += fmt.Sprintf("; %d have exact zeros in most cells after it but mass in some (a mask that leaks?)", a.Shifted)
		}
		if a.Shifted > 0 && a.Causal+a.Prefix == 0 {
			inf.Evidence = fmt.Sprintf("causal mask that leaks: every informative sampled head (%s) has exact zeros in most cells after each query's position, and mass in some", pct(a.Shifted))
		}
		if a.Dense+a.Shifted > 0 {
			inf.Evidence += fmt.Sprintf("; judged against a causal mask, the heads that break it (layer %s) are findings", list(a.BreakLayers))
		}
		if Q > K {
			// more queries than keys: not a self-attention block; a
			// triangle there is cross-attention made causal, which the cut
			// check judges
			inf.Kind, inf.Window, inf.Prefix = loader.KindCross, 0, 0
			inf.Evidence = fmt.Sprintf("cross-attention (%d queries over %d keys): %s sampled heads have exact zeros after each query's position, a triangular cut the cut check judges", Q, K, pct(masked))
		}
	case 10*a.Dense >= 8*informative && Q < K:
		// cross-attention over a longer source, or a KV-cache step whose
		// mask let the future through: the zeros cannot tell them apart
		inf.Evidence = fmt.Sprintf("not decided: %s sampled heads have mass after their query's position (taken as the last %d of %d), which cross-attention over a longer sequence has and a KV-cache step should not", pct(a.Dense), Q, K)
	case 10*a.Dense >= 8*informative:
		inf.Kind = loader.KindBidirectional
		what := "bidirectional"
		if Q != K {
			inf.Kind, what = loader.KindCross, "cross-attention"
		}
		inf.Evidence = fmt.Sprintf("%s (no positional mask): %s sampled heads have mass after their query's position", what, pct(a.Dense))
	default:
		inf.Evidence = fmt.Sprintf("not decided: %s sampled heads have exact zeros after each query's position and %d do not: a mask in some heads only, or none", pct(masked), a.Dense)
	}
	return inf, nil
}

// lookAt classifies one matrix (see the rule at the top of this file) and
// returns its window W_u (causal) or prefix P_u (prefix).
func lookAt(a []float32, Q, K, off, b int, qs *loader.Side, dead []bool) (unitLook, int, int) {
	for k := range dead {
		dead[k] = true
	}
	for q := 0; q < Q; q++ {
		row := a[q*K : (q+1)*K]
		for k, v := range row {
			if v != 0 && dead[k] {
				dead[k] = false
			}
		}
	}
	var rows, past, room int
	w := 0
	excess := 0                // max over rows of last - p
	var upN, upZ, loN, loZ int // live cells after / before the row's position, and their exact zeros
	pastMaxPos, pastReach := -1, -1
	firstClean := K // smallest position of a row that does not look past itself
	var cleanPos []int
	var lasts [][2]int // (p, last) of every row looked at
	for q := 0; q < Q; q++ {
		p := q + off
		if p >= K || dead[p] || (qs != nil && !qs.IsValid(b, p)) {
			continue
		}
		row := a[q*K : (q+1)*K]
		first, last := -1, -1
		ok := true
		for k, v := range row {
			if math.IsNaN(float64(v)) || math.IsInf(float64(v), 0) {
				ok = false
				break
			}
			if v != 0 {
				if first < 0 {
					first = k
				}
				last = k
			}
		}
		if !ok || first < 0 {
			continue
		}
		rows++
		lasts = append(lasts, [2]int{p, last})
		for k, v := range row {
			switch {
			case dead[k] || k == p:
			case k > p:
				upN++
				if v == 0 {
					upZ++
				}
			default:
				loN++
				if v == 0 {
					loZ++
				}
			}
		}
		excess = max(excess, last-p)
		for k := p + 1; k < K; k++ {
			if !dead[k] {
				room++
				break
			}
		}
		if last > p {
			past++
			pastMaxPos = max(pastMaxPos, p)
			pastReach = max(pastReach, last)
		} else {
			cleanPos = append(cleanPos, p)
			w = max(w, p-first+1)
		}
	}
	if rows == 0 || room == 0 {
		return lookBlank, 0, 0
	}
	if past == 0 {
		return lookCausal, w, 0
	}
	P := pastReach + 1
	for _, p := range cleanPos {
		if p >= P {
			firstClean = min(firstClean, p)
		}
	}
	// a prefix LM lets every row before P - 1 see up to P - 1: a few rows
	// reaching past themselves (a leak) are not a prefix
	var before, full int
	for _, pl := range lasts {
		if pl[0] < P-1 {
			before++
			if pl[1] == P-1 {
				full++
			}
		}
	}
	if pastMaxPos < P && P < K && firstClean < K && before > 0 && 10*full >= 9*before {
		return lookPrefix, 0, P
	}
	// mostly masked: most live cells after the query's position are exact
	// zeros, clearly more than before it (sharp heads whose small weights
	// underflow have zeros on both sides)
	if upN > 0 && 2*upZ >= upN && (loN == 0 || float64(upZ)/float64(upN)-float64(loZ)/float64(loN) >= 0.4) {
		return lookShifted, excess, 0
	}
	// inverted polarity (True = allowed passed where True = blocked is
	// meant): the mass sits after the query, the cells up to it are zeros;
	// the block is still triangular, and judged against a causal mask
	if loN > 0 && upN > 0 && 2*loZ >= loN && float64(loZ)/float64(loN)-float64(upZ)/float64(upN) >= 0.4 {
		return lookShifted, excess, 0
	}
	return lookDense, 0, 0
}

// sampleUnits picks the (layer, head, batch item) matrices InferMask reads:
// every layer, heads spread evenly (up to 8 a layer), the first and last
// batch item, within inferMaxValues values.
func sampleUnits(blk *loader.Block) [][3]int {
	per := int64(blk.Queries) * int64(blk.Keys)
	heads := min(blk.Heads, 8)
	batches := []int{0}
	if blk.Batch > 1 {
		batches = append(batches, blk.Batch-1)
	}
	for heads > 1 && int64(blk.Layers*heads*len(batches))*per > inferMaxValues {
		heads /= 2
	}
	if int64(blk.Layers*heads*len(batches))*per > inferMaxValues {
		batches = batches[:1]
	}
	lstep := 1
	for int64((blk.Layers+lstep-1)/lstep*heads*len(batches))*per > inferMaxValues && lstep < blk.Layers {
		lstep *= 2
	}
	var out [][3]int
	for l := 0; l < blk.Layers; l += lstep {
		for i := 0; i < heads; i++ {
			h := i * blk.Heads / heads
			for _, b := range batches {
				out = append(out, [3]int{l, h, b})
			}
		}
	}
	return out
}

// mode returns the most frequent key (the smallest on ties) and its count.
func mode(m map[int]int64) (int, int64) {
	best, n := 0, int64(0)
	keys := make([]int, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Ints(keys)
	for _, k := range keys {
		if m[k] > n {
			best, n = k, m[k]
		}
	}
	return best, n
}

func uniqueSorted(xs []int) []int {
	sort.Ints(xs)
	out := xs[:0]
	for i, x := range xs {
		if i == 0 || x != xs[i-1] {
			out = append(out, x)
		}
	}
	return out
}

// CheckPositions tests, on a sample, the assumption that the queries of a
// causal block with fewer queries than keys are the last Q of K positions
// (loader.Block.PosFrom "offset"). It returns a reason when the data
// contradicts it: every sampled head leaves the keys from some k0 <= the
// first query's assumed position without any mass, as a decode step
// written from a pre-allocated (static) cache does, whose unused slots sit
// at the end. "" when the assumption holds or cannot be tested.
func CheckPositions(ctx context.Context, blk *loader.Block) (string, error) {
	if blk.PosFrom != "offset" || blk.Kind != loader.KindCausal {
		return "", nil
	}
	Q, K := blk.Queries, blk.Keys
	buf := make([]float32, Q*K)
	live := -1 // the last key with mass in any sampled head
	for _, u := range sampleUnits(blk) {
		if err := ctx.Err(); err != nil {
			return "", fmt.Errorf("%w: %w", ErrCanceled, err)
		}
		if err := blk.ReadAttn(u[0], u[2], u[1], buf); err != nil {
			return "", err
		}
		for i := len(buf) - 1; i >= 0; i-- {
			if k := i % K; k > live && buf[i] != 0 && !math.IsNaN(float64(buf[i])) {
				live = k
			}
		}
		if live >= K-Q {
			return "", nil
		}
	}
	if live < 0 {
		return "", nil
	}
	return fmt.Sprintf("queries taken as the last %d of %d positions (from %d), but no sampled head has mass on any key after %d: a decode step from a pre-allocated (static) cache, whose query sits before its unused slots", Q, K, K-Q, live), nil
}

// InferExport infers the mask of every block of ex whose kind nobody gave
// (loader.Block.KindFrom == "") and sets it on the block (Kind, Window,
// Prefix, KindFrom "inferred", KindEvidence), and tests the assumed query
// positions of causal blocks with fewer queries than keys (CheckPositions;
// PosFrom becomes "unknown" and KindEvidence says why when the data
// contradicts them). Blocks it cannot decide keep KindUnknown and get the
// reason in KindEvidence. Calling it again does nothing.
func InferExport(ctx context.Context, ex *loader.Export) error {
	for _, blk := range ex.Blocks {
		if err := inferBlock(ctx, blk, ex.Side(blk.QuerySide), ex.Side(blk.KeySide)); err != nil {
			return err
		}
	}
	return nil
}

func inferBlock(ctx context.Context, blk *loader.Block, qs, ks *loader.Side) error {
	if blk.Layers <= 0 {
		return nil
	}
	if blk.KindFrom == "" && blk.Kind == loader.KindUnknown && blk.KindEvidence == "" {
		inf, err := InferMask(ctx, blk, qs, ks)
		if err != nil {
			return err
		}
		blk.KindEvidence = inf.Evidence
		if inf.Kind != loader.KindUnknown {
			blk.Kind, blk.KindFrom = inf.Kind, "inferred"
			if blk.Window <= 0 {
				blk.Window = inf.Window
			}
			if blk.Prefix <= 0 {
				blk.Prefix = inf.Prefix
			}
			if blk.Kind == loader.KindCausal && blk.QPos == nil && blk.Queries < blk.Keys {
				blk.QueryOffset, blk.PosFrom = blk.Keys-blk.Queries, "offset"
			}
		}
	}
	if blk.PosFrom == "offset" {
		why, err := CheckPositions(ctx, blk)
		if err != nil {
			return err
		}
		if why != "" {
			blk.PosFrom, blk.PosEvidence = "unknown", why
		}
	}
	return nil
}
