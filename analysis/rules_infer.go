package analysis

import (
	"context"
	"fmt"
	"maps"
	"math"
	"slices"

	"github.com/heed-dev/heed/internal/words"
	"github.com/heed-dev/heed/loader"
)

// Inferring a block's mask from its exact zeros.
//
// When nobody said a block's kind (no metadata, no kind setting, no attribute),
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

type unitLook int

const (
	lookBlank unitLook = iota
	lookCausal
	lookPrefix
	lookLeaky // mostly masked after the query, or the mirror image
	lookDense
)

// unitSeen is how one sampled matrix looked (lookAt): its window W_u when
// causal, its prefix P_u when a prefix LM.
type unitSeen struct {
	look        unitLook
	w, p, layer int
}

// scanSample reads the sampled matrices of blk once (sampleUnits) and
// returns how each looks (only when classify: lookAt) and the last key
// holding mass in any of them (-1 when none), which tests assumed query
// positions (positionsWhy).
func scanSample(ctx context.Context, blk *loader.Block, qs *loader.Side, classify bool) ([]unitSeen, int, error) {
	Q, K := blk.Queries, blk.Keys
	off := max(K-Q, 0)
	buf := make([]float32, Q*K)
	dead := make([]bool, K)
	var seen []unitSeen
	live := -1
	for _, u := range sampleUnits(blk) {
		if err := ctx.Err(); err != nil {
			return nil, 0, fmt.Errorf("%w: %w", ErrCanceled, err)
		}
		if err := blk.ReadAttn(u[0], u[2], u[1], buf); err != nil {
			return nil, 0, err
		}
		for i := len(buf) - 1; i >= 0; i-- {
			if k := i % K; k > live && buf[i] != 0 && !math.IsNaN(float64(buf[i])) {
				live = k
			}
		}
		if classify {
			look, w, p := lookAt(buf, Q, K, off, u[2], qs, dead)
			seen = append(seen, unitSeen{look, w, p, u[0]})
		}
	}
	return seen, live, nil
}

// inferMask decides a block's kind from how its sampled matrices looked
// (the rule at the top of this file). It returns KindUnknown when it does
// not decide; evidence says what the data showed either way.
func inferMask(seen []unitSeen, Q, K int) (kind loader.Kind, window, prefix int, evidence string) {
	var causal, pre, leaky, dense, blank int64
	wins, pres := map[int]int64{}, map[int]int64{}
	var breaks []int // layers of the units that break a mask
	for _, s := range seen {
		switch s.look {
		case lookBlank:
			blank++
		case lookCausal:
			causal++
			wins[s.w]++
		case lookPrefix:
			pre++
			pres[s.p]++
		case lookLeaky:
			leaky++
			breaks = append(breaks, s.layer)
		case lookDense:
			dense++
			breaks = append(breaks, s.layer)
		}
	}
	informative := int64(len(seen)) - blank
	if informative == 0 {
		return loader.KindUnknown, 0, 0, fmt.Sprintf("no sampled head shows a key after its query's position (%d sampled): nothing to infer a mask from", len(seen))
	}
	masked := causal + pre + leaky
	pct := func(n int64) string { return fmt.Sprintf("%d of %d", n, informative) }
	switch {
	case 2*masked >= informative && Q > K:
		// more queries than keys: not a self-attention block; a triangle
		// there is cross-attention made causal, which the cut check judges
		return loader.KindCross, 0, 0, fmt.Sprintf("cross-attention (%d queries over %d keys): %s sampled heads have exact zeros after each query's position, a triangular cut the cut check judges", Q, K, pct(masked))
	case 2*masked >= informative:
		var winUnits int64
		if p, n := mode(pres); 2*n >= informative && p > 0 {
			prefix = p
			evidence = fmt.Sprintf("causal mask with a prefix of %d: %s sampled heads have exact zeros after each query's position except inside the first %d positions", p, pct(n), p)
		} else if w, n := mode(wins); causal > 0 && 10*n >= 6*causal && w < max(K-Q, 0)+Q {
			// a row that sees key 0 from the last position has W_u = K
			window, winUnits = w, n
			evidence = fmt.Sprintf("causal mask with a window of %d: %s sampled heads have exact zeros after each query's position, and %d of them before each query's last %d keys", w, pct(causal), winUnits, w)
		} else {
			evidence = fmt.Sprintf("causal mask: %s sampled heads have exact zeros after each query's position", pct(masked))
		}
		if leaky > 0 && causal+pre == 0 {
			evidence = fmt.Sprintf("causal mask that leaks: every informative sampled head (%s) has exact zeros in most cells after each query's position, and mass in some", pct(leaky))
		} else if leaky > 0 {
			evidence += fmt.Sprintf("; %d have exact zeros in most cells after it but mass in some (a mask that leaks?)", leaky)
		}
		if len(breaks) > 0 {
			slices.Sort(breaks)
			evidence += fmt.Sprintf("; judged against a causal mask, the heads that break it (layer %s) are findings", words.List(slices.Compact(breaks)))
		}
		return loader.KindCausal, window, prefix, evidence
	case 10*dense >= 8*informative && Q < K:
		// cross-attention over a longer source, or a KV-cache step whose
		// mask let the future through: the zeros cannot tell them apart
		return loader.KindUnknown, 0, 0, fmt.Sprintf("not decided: %s sampled heads have mass after their query's position (taken as the last %d of %d), which cross-attention over a longer sequence has and a KV-cache step should not", pct(dense), Q, K)
	case 10*dense >= 8*informative:
		kind, what := loader.KindBidirectional, "bidirectional"
		if Q != K {
			kind, what = loader.KindCross, "cross-attention"
		}
		return kind, 0, 0, fmt.Sprintf("%s (no positional mask): %s sampled heads have mass after their query's position", what, pct(dense))
	}
	return loader.KindUnknown, 0, 0, fmt.Sprintf("not decided: %s sampled heads have exact zeros after each query's position and %d do not: a mask in some heads only, or none", pct(masked), dense)
}

// lookAt classifies one matrix (see the rule at the top of this file) and
// returns its window W_u (causal) or prefix P_u (prefix).
func lookAt(a []float32, Q, K, off, b int, qs *loader.Side, dead []bool) (unitLook, int, int) {
	for k := range dead {
		dead[k] = true
	}
	for i, v := range a {
		if v != 0 {
			dead[i%K] = false
		}
	}
	var rows, past, room int
	w := 0
	var upN, upZ, loN, loZ int // live cells after / before the row's position, and their exact zeros
	pastMaxPos, pastReach, maxPos := -1, -1, -1
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
		maxPos = p
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
		if slices.Contains(dead[p+1:], false) {
			room++
		}
		if last > p {
			past++
			pastMaxPos = max(pastMaxPos, p)
			pastReach = max(pastReach, last)
		} else {
			w = max(w, p-first+1)
		}
	}
	if rows == 0 || room == 0 {
		return lookBlank, 0, 0
	}
	if past == 0 {
		return lookCausal, w, 0
	}
	// a prefix LM lets every row before P - 1 see up to P - 1, and rows
	// from P on (which then do not look past themselves) exist: a few rows
	// reaching past themselves (a leak) are not a prefix
	P := pastReach + 1
	var before, full int
	for _, pl := range lasts {
		if pl[0] < P-1 {
			before++
			if pl[1] == P-1 {
				full++
			}
		}
	}
	if pastMaxPos < P && P < K && maxPos >= P && before > 0 && 10*full >= 9*before {
		return lookPrefix, 0, P
	}
	// mostly masked: most live cells after the query's position are exact
	// zeros, clearly more than before it (sharp heads whose small weights
	// underflow have zeros on both sides); or the mirror image, an inverted
	// boolean mask: the mass after the query, the cells up to it zeros
	share := func(z, n int) float64 { return float64(z) / float64(n) }
	if upN > 0 && 2*upZ >= upN && (loN == 0 || share(upZ, upN)-share(loZ, loN) >= 0.4) {
		return lookLeaky, 0, 0
	}
	if loN > 0 && upN > 0 && 2*loZ >= loN && share(loZ, loN)-share(upZ, upN) >= 0.4 {
		return lookLeaky, 0, 0
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
	for _, k := range slices.Sorted(maps.Keys(m)) {
		if m[k] > n {
			best, n = k, m[k]
		}
	}
	return best, n
}

// positionsWhy tests the assumption that the queries of a causal block
// with fewer queries than keys are the last Q of K positions
// (loader.Block.PosFrom "offset") against live, the last key with mass in
// any sampled head. It returns a reason when the data contradicts it: the
// keys from the first query's assumed position on hold no mass, as in a
// decode step written from a pre-allocated (static) cache, whose unused
// slots sit at the end. "" when the assumption holds or cannot be tested.
func positionsWhy(blk *loader.Block, live int) string {
	Q, K := blk.Queries, blk.Keys
	if live < 0 || live >= K-Q {
		return ""
	}
	return fmt.Sprintf("queries taken as the last %d of %d positions (from %d), but no sampled head has mass on any key after %d: a decode step from a pre-allocated (static) cache, whose query sits before its unused slots", Q, K, K-Q, live)
}

// setKind gives blk a kind the data showed (KindFrom "inferred"), with the
// window and prefix that go with it where the block has none, and, for a
// causal block with fewer queries than keys, queries at the last Q of K
// positions (PosFrom "offset", to be tested by positionsWhy).
func setKind(blk *loader.Block, kind loader.Kind, window, prefix int, evidence string) {
	blk.Kind, blk.KindFrom, blk.KindEvidence = kind, "inferred", evidence
	if blk.Window <= 0 && window > 0 {
		blk.Window = window
	}
	if blk.Prefix <= 0 && prefix > 0 {
		blk.Prefix = prefix
	}
	if kind == loader.KindCausal && blk.QPos == nil && blk.Queries < blk.Keys {
		blk.QueryOffset, blk.PosFrom = blk.Keys-blk.Queries, "offset"
	}
}

// InferExport infers the mask of every block of ex whose kind nobody gave
// (loader.Block.KindFrom == "") and sets it on the block (Kind, Window,
// Prefix, KindFrom "inferred", KindEvidence), and tests the assumed query
// positions of causal blocks with fewer queries than keys (PosFrom becomes
// "unknown" and PosEvidence says why when the data contradicts them).
// Blocks it cannot decide keep KindUnknown and get the reason in
// KindEvidence. Calling it again does nothing.
func InferExport(ctx context.Context, ex *loader.Export) error {
	for _, blk := range ex.Blocks {
		if err := inferBlock(ctx, blk, ex.Side(blk.QuerySide)); err != nil {
			return err
		}
	}
	return nil
}

// inferBlock is InferExport for one block: one read of its sample serves
// both the inference and the test of the positions.
func inferBlock(ctx context.Context, blk *loader.Block, qs *loader.Side) error {
	needKind := blk.KindFrom == "" && blk.Kind == loader.KindUnknown && blk.KindEvidence == ""
	offset := func() bool { return blk.PosFrom == "offset" && blk.Kind == loader.KindCausal }
	if blk.Layers <= 0 || blk.Queries <= 0 || blk.Keys <= 0 || (!needKind && !offset()) {
		return nil
	}
	seen, live, err := scanSample(ctx, blk, qs, needKind)
	if err != nil {
		return err
	}
	if needKind {
		kind, window, prefix, evidence := inferMask(seen, blk.Queries, blk.Keys)
		blk.KindEvidence = evidence
		if kind != loader.KindUnknown {
			setKind(blk, kind, window, prefix, evidence)
		}
	}
	if offset() {
		if why := positionsWhy(blk, live); why != "" {
			blk.PosFrom, blk.PosEvidence = "unknown", why
		}
	}
	return nil
}
