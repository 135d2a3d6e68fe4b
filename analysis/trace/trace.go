// Package trace explains a prediction: which input tokens one query
// position of an export draws on, by propagating attention (and, where
// exported, its gradients) through the layers. It owns the methods, their
// building blocks and the explanation's result:
//
//   - attention rollout and attention flow (Abnar & Zuidema 2020,
//     "Quantifying Attention Flow in Transformers", ACL): ResidualRows,
//     RolloutRow, Flow;
//   - gradient-weighted relevance and its encoder-decoder rules (Chefer, Gur
//     & Wolf 2021, "Generic Attention-model Explainability for Interpreting
//     Bi-Modal and Encoder-Decoder Transformers", ICCV): GradAbar,
//     SelfRelevanceRow, NormBar, EncDecRelevance;
//   - Trace, which picks the block, reads the layers one head at a time
//     through loader and returns a Result: each input token's share, why a
//     key the query may not see is marked (the mask rules of package
//     analysis), and what the model predicted there (Predicted).
//
// docs/methods.md ("Explanations") states each method with its checks.
// It reads exports through loader and asks analysis only for the mask rules
// of a block and its cancellation error; nothing in analysis depends on it.
// Its error messages keep the "analysis:" prefix heed has always printed.
package trace

import (
	"context"
	"errors"
	"fmt"
	"math"
	"runtime"
	"sync"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/loader"
)

// Method is an explanation method of Trace.
type Method string

// The explanation methods.
const (
	// MethodRollout is attention rollout (Abnar & Zuidema 2020, eq. 1): per
	// layer the mean over heads, A' = 0.5 A + 0.5 I with rows renormalised
	// to sum 1 (so rows of A that do not sum to 1 are handled), R = A'_L ...
	// A'_1; shares are a row of R and sum to 1. Through cross-attention (an
	// encoder-decoder export) it uses Chefer et al. (2021)'s update rules
	// with Abar = the head mean of A (no gradients).
	MethodRollout Method = "rollout"
	// MethodFlow is attention flow (Abnar & Zuidema 2020): max-flow from the
	// query's node at the top layer to each input token separately, over the
	// layered graph whose edge capacities are the residual-augmented weights
	// A' of MethodRollout. Shares are not normalised across inputs (each is a
	// flow in [0, 1]). Self-attention blocks only, within FlowLimit.
	MethodFlow Method = "flow"
	// MethodGrad is gradient-weighted relevance (Chefer, Gur & Wolf 2021):
	// Abar = E_h[(-G * A)^+] (the exported G = dL/dA is of a loss, the
	// paper's gradient is of the target's score: negated), R = I, R += Abar R
	// per self-attention layer; for encoder-decoder exports the decoder's
	// self-attention updates R^tt and R^ts and cross-attention adds
	// (Rbar^tt)^T Abar Rbar^ss to R^ts (eq. 10), Rbar = I + rows of (R - I)
	// scaled to sum 1. Shares are a row of R (self) or of R^ts (cross), not
	// normalised. Needs BLOCK/grad for every block used.
	MethodGrad Method = "grad"
)

// FlowLimit bounds attention flow's work: layers * n^3 (n the number of
// positions the query can reach) must not exceed it, since each of the n
// max-flow problems runs on a graph of layers * n^2 edges. Beyond it Trace
// returns an error saying so (use rollout).
const FlowLimit = 1 << 27

// ErrFlowCross (test with errors.Is) is the error of the flow method asked
// to trace through a cross block: attention flow is defined for
// self-attention stacks. Callers say what to use instead in their own terms
// (heed trace's --method, the Trace screen's other columns).
var ErrFlowCross = errors.New("analysis: attention flow is defined for self-attention stacks")

// FlowTooLargeError is the error of attention flow refused beyond
// FlowLimit. As ErrFlowCross, it leaves the alternative (rollout) to the
// caller's wording.
type FlowTooLargeError struct {
	Layers, Positions int
	Work              int64 // layers * positions^3
}

func (e *FlowTooLargeError) Error() string {
	return fmt.Sprintf("analysis: attention flow over %d layers x %d positions is too large (layers*n^3 = %d > %d)", e.Layers, e.Positions, e.Work, FlowLimit)
}

// RelevanceLimit bounds the sequence length of encoder-decoder relevance,
// which multiplies full n x n matrices per layer.
const RelevanceLimit = 2048

// Options select what Trace explains.
type Options struct {
	Method Method
	// Block is the block whose queries are explained; "" = the cross block
	// when there is one (a target explained by source tokens), else the
	// first causal block, else the first block.
	Block string
	Batch int
	Query int
}

// TokenShare is one input token's share of the explanation.
type TokenShare struct {
	Index int     `json:"index"`
	Token string  `json:"token"`
	Share float64 `json:"share"`
	// Status is "" for a key the query may see, else why it may not:
	// "future" (after the query under a causal mask, or outside its
	// window), "padding" (a padding key), "other document" (packed
	// sequences). Such a key's share is what leaked through, not an
	// explanation.
	Status string `json:"status,omitempty"`
}

// Prediction is what the model predicted at the explained position.
type Prediction struct {
	// From is "logits" (the exported logits' largest entry), "next token"
	// (the input token after the query: what a model trained with teacher
	// forcing was asked to predict there) or "" when neither is known.
	From string `json:"from"`
	// ID is the vocabulary index (logits), -1 otherwise.
	ID int `json:"id"`
	// Token is its text ("" when the export has no vocab array).
	Token string `json:"token"`
	// Prob is its softmax probability (logits only; absent otherwise).
	Prob *float64 `json:"prob,omitempty"`
}

// Result is the explanation of one query position: the input tokens
// (of the key side: source tokens through cross-attention) with their shares.
type Result struct {
	Block  string       `json:"block"`
	Query  int          `json:"query"`
	Batch  int          `json:"batch"`
	Method Method       `json:"method"`
	Side   string       `json:"side"`
	Tokens []TokenShare `json:"tokens"`
	// Normalised tells whether the shares sum to 1 (rollout on self-attention).
	Normalised bool `json:"normalised"`
	// LessIdentity: the shares are the relevance the layers add, Chefer et
	// al.'s R less its identity start (gradient relevance on self-attention).
	LessIdentity bool `json:"-"`
	// QueryToken is the explained position's own token, Position its key
	// position (the row plus the decode offset).
	QueryToken string `json:"query_token"`
	Position   int    `json:"position"`
	// Predicted is what the model predicted there.
	Predicted Prediction `json:"predicted"`
	// Scale says how the shares are scaled, in words: set by whoever
	// prints the result (heed trace: internal/prose's TraceScale), as this
	// package words nothing.
	Scale string `json:"scale"`
}

// ResidualRows overwrites the n x n matrix a with 0.5 a + 0.5 I, each row
// renormalised to sum 1 (Abnar & Zuidema 2020's residual augmentation; a row
// summing to 0 becomes the identity row).
func ResidualRows(a []float64, n int) {
	for i := 0; i < n; i++ {
		row := a[i*n : (i+1)*n]
		var s float64
		for j := range row {
			row[j] *= 0.5
			if j == i {
				row[j] += 0.5
			}
			s += row[j]
		}
		if s > 0 {
			for j := range row {
				row[j] /= s
			}
		}
	}
}

// RolloutRow returns row q of the rollout R = A'_{L-1} ... A'_0 of the
// residual-augmented layer matrices (each n x n, layer 0 first, as made by
// ResidualRows): the share of each input position in query q at the top.
func RolloutRow(layers [][]float64, n, q int) []float64 {
	v := make([]float64, n)
	w := make([]float64, n)
	v[q] = 1
	for l := len(layers) - 1; l >= 0; l-- {
		vecMat(w, v, layers[l], n, n)
		v, w = w, v
	}
	return v
}

// vecMat sets dst = v^T M for an r x c matrix M.
func vecMat(dst, v, m []float64, r, c int) {
	for j := range dst[:c] {
		dst[j] = 0
	}
	for i := 0; i < r; i++ {
		if v[i] == 0 {
			continue
		}
		row := m[i*c : (i+1)*c]
		for j, x := range row {
			dst[j] += v[i] * x
		}
	}
}

// Flow returns, for each input position j, the maximum flow from node
// (top, q) to node (0, j) in the layered graph with edges (l+1, i) -> (l, j)
// of capacity layers[l][i*n+j] (Abnar & Zuidema 2020's attention flow). It
// refuses graphs beyond FlowLimit with a *FlowTooLargeError.
func Flow(ctx context.Context, layers [][]float64, n, q int) ([]float64, error) {
	L := len(layers)
	if w := int64(L) * int64(n) * int64(n) * int64(n); w > FlowLimit {
		return nil, &FlowTooLargeError{Layers: L, Positions: n, Work: w}
	}
	g := newFlowGraph(layers, n)
	out := make([]float64, n)
	src := L*n + q
	for j := 0; j < n; j++ {
		if err := ctx.Err(); err != nil {
			return nil, fmt.Errorf("%w: %w", analysis.ErrCanceled, err)
		}
		if src == j {
			out[j] = 1
			continue
		}
		out[j] = g.maxflow(src, j)
	}
	return out, nil
}

// flowGraph is a residual graph for Dinic's max-flow algorithm.
type flowGraph struct {
	head          []int
	to, next      []int
	capa, cap0    []float64
	level, it, qu []int
}

const flowEps = 1e-12

func newFlowGraph(layers [][]float64, n int) *flowGraph {
	L := len(layers)
	V := (L + 1) * n
	g := &flowGraph{head: make([]int, V), level: make([]int, V), it: make([]int, V), qu: make([]int, V)}
	for i := range g.head {
		g.head[i] = -1
	}
	add := func(u, v int, c float64) {
		g.to = append(g.to, v, u)
		g.capa = append(g.capa, c, 0)
		g.next = append(g.next, g.head[u], g.head[v])
		g.head[u] = len(g.to) - 2
		g.head[v] = len(g.to) - 1
	}
	for l := 0; l < L; l++ {
		for i := 0; i < n; i++ {
			for j := 0; j < n; j++ {
				if c := layers[l][i*n+j]; c > 0 {
					add((l+1)*n+i, l*n+j, c)
				}
			}
		}
	}
	g.cap0 = append([]float64(nil), g.capa...)
	return g
}

func (g *flowGraph) maxflow(s, t int) float64 {
	copy(g.capa, g.cap0)
	var total float64
	for g.bfs(s, t) {
		copy(g.it, g.head)
		for {
			f := g.dfs(s, t, math.Inf(1))
			if f <= flowEps {
				break
			}
			total += f
		}
	}
	return total
}

func (g *flowGraph) bfs(s, t int) bool {
	for i := range g.level {
		g.level[i] = -1
	}
	g.level[s] = 0
	qh, qt := 0, 0
	g.qu[qt] = s
	qt++
	for qh < qt {
		u := g.qu[qh]
		qh++
		for e := g.head[u]; e >= 0; e = g.next[e] {
			if v := g.to[e]; g.capa[e] > flowEps && g.level[v] < 0 {
				g.level[v] = g.level[u] + 1
				g.qu[qt] = v
				qt++
			}
		}
	}
	return g.level[t] >= 0
}

func (g *flowGraph) dfs(u, t int, f float64) float64 {
	if u == t {
		return f
	}
	for ; g.it[u] >= 0; g.it[u] = g.next[g.it[u]] {
		e := g.it[u]
		v := g.to[e]
		if g.capa[e] > flowEps && g.level[v] == g.level[u]+1 {
			if d := g.dfs(v, t, math.Min(f, g.capa[e])); d > flowEps {
				g.capa[e] -= d
				g.capa[e^1] += d
				return d
			}
		}
	}
	return 0
}

// GradAbar sets dst (n x m) to Chefer et al. (2021)'s head-averaged
// relevance map E_h[(-G_h * A_h)^+] from per-head attention and dL/dA
// matrices (the minus turns a loss gradient into a score gradient).
func GradAbar(dst []float64, attn, grad [][]float32) {
	for i := range dst {
		dst[i] = 0
	}
	for h := range attn {
		addGradTerm(dst, attn[h], grad[h])
	}
	scaleBy(dst, 1/float64(len(attn)))
}

// addGradTerm adds one head's (-G * A)^+ to dst: the gradient-weighted
// attention, its negatives clamped before the mean over heads.
func addGradTerm(dst []float64, a, g []float32) {
	for i := range dst {
		if v := -float64(g[i]) * float64(a[i]); v > 0 {
			dst[i] += v
		}
	}
}

// scaleBy multiplies dst by s.
func scaleBy(dst []float64, s float64) {
	for i := range dst {
		dst[i] *= s
	}
}

// SelfRelevanceRow returns row q of R = (I + Abar_{L-1}) ... (I + Abar_0),
// Chefer et al. (2021)'s self-attention rule R += Abar R applied layer by
// layer from R = I.
func SelfRelevanceRow(abars [][]float64, n, q int) []float64 {
	v := make([]float64, n)
	w := make([]float64, n)
	v[q] = 1
	for l := len(abars) - 1; l >= 0; l-- {
		vecMat(w, v, abars[l], n, n)
		for j := range w {
			w[j] += v[j]
		}
		v, w = w, v
	}
	return v
}

// NormBar returns Rbar = I + Rhat for an n x n R, where Rhat = R - I with
// each row scaled to sum 1 (rows summing to 0 stay 0): Chefer et al.
// (2021)'s normalisation before a cross-attention update.
func NormBar(r []float64, n int) []float64 {
	out := make([]float64, n*n)
	for i := 0; i < n; i++ {
		var s float64
		for j := 0; j < n; j++ {
			v := r[i*n+j]
			if i == j {
				v--
			}
			out[i*n+j] = v
			s += v
		}
		for j := 0; j < n; j++ {
			if s != 0 {
				out[i*n+j] /= s
			} else {
				out[i*n+j] = 0
			}
		}
		out[i*n+i]++
	}
	return out
}

// matMul sets dst (r x c) = a (r x m) b (m x c).
func matMul(dst, a, b []float64, r, m, c int) {
	for i := range dst[:r*c] {
		dst[i] = 0
	}
	for i := 0; i < r; i++ {
		for k := 0; k < m; k++ {
			x := a[i*m+k]
			if x == 0 {
				continue
			}
			row := b[k*c : (k+1)*c]
			d := dst[i*c : (i+1)*c]
			for j, y := range row {
				d[j] += x * y
			}
		}
	}
}

func transpose(a []float64, r, c int) []float64 {
	out := make([]float64, r*c)
	for i := 0; i < r; i++ {
		for j := 0; j < c; j++ {
			out[j*r+i] = a[i*c+j]
		}
	}
	return out
}

// EncDecRelevance returns R^ts (t x s) of Chefer et al. (2021)'s
// encoder-decoder rules: enc are the encoder's per-layer Abar (s x s), dec
// the decoder self-attention's (t x t) and cross the cross-attention's (t x
// s), decoder layer l's self-attention before its cross-attention.
func EncDecRelevance(enc, dec, cross [][]float64, s, t int) []float64 {
	rss := eye(s)
	tmp := make([]float64, max(s, t)*max(s, t))
	for _, ab := range enc {
		matMul(tmp[:s*s], ab, rss, s, s, s)
		for i := range rss {
			rss[i] += tmp[i]
		}
	}
	rssBar := NormBar(rss, s)
	rtt := eye(t)
	rts := make([]float64, t*s)
	ts := make([]float64, t*s)
	for l := range dec {
		matMul(tmp[:t*t], dec[l], rtt, t, t, t)
		for i := range rtt {
			rtt[i] += tmp[i]
		}
		matMul(ts, dec[l], rts, t, t, s)
		for i := range rts {
			rts[i] += ts[i]
		}
		if l < len(cross) {
			left := transpose(NormBar(rtt, t), t, t)
			mid := make([]float64, t*s)
			matMul(mid, left, cross[l], t, t, s)
			matMul(ts, mid, rssBar, t, s, s)
			for i := range rts {
				rts[i] += ts[i]
			}
		}
	}
	return rts
}

func eye(n int) []float64 {
	m := make([]float64, n*n)
	for i := 0; i < n; i++ {
		m[i*n+i] = 1
	}
	return m
}

// layerAbar returns per layer the matrix a method propagates: the head mean
// of A (rollout) or GradAbar (grad). Only attention flow and the
// encoder-decoder rules need every layer at once; a self-attention rollout
// or relevance row streams one layer at a time (traceSelf).
func layerAbar(blk *loader.Block, batch int, grad bool) ([][]float64, error) {
	if grad && !blk.HasGrad {
		return nil, noGrad(blk)
	}
	out := make([][]float64, blk.Layers)
	var lb layerBufs
	for l := range out {
		m, err := lb.layer(blk, l, batch, grad)
		if err != nil {
			return nil, err
		}
		out[l] = m
	}
	return out, nil
}

// ErrNoGrad (test with errors.Is) is the error of gradient relevance asked
// of a block exported without dL/dA; callers say what to use instead in
// their own terms (heed trace's --method).
var ErrNoGrad = errors.New("gradient relevance needs them; rollout and flow do not")

func noGrad(blk *loader.Block) error {
	return fmt.Errorf("analysis: block %s has no gradients (%s/grad): %w", blk.Name, blk.Name, ErrNoGrad)
}

// layerBufs are the head buffers of layerBufs.layer, reused across layers:
// two of each, so that the next head is read (converted from its stored
// dtype) while the previous one is added in.
type layerBufs struct {
	a, g [2][]float32
	raw  []uint16 // stored float16/bfloat16 patterns (the head mean's fast path)
	// split is the fewest cells a processor takes in rawMean; 0 means
	// splitCells (tests set it lower to split small heads too).
	split int
}

// rawMean adds the heads of layer l into out (not yet divided) through
// their stored 16-bit patterns and the 65,536-entry value table, one loop
// instead of a conversion and an addition: the values are those ReadAttn
// gives (loader.ReadRaw16), so the sums are headMean's bit for bit. ok is
// false when the block is not held that way.
func (lb *layerBufs) rawMean(blk *loader.Block, l, batch int, out []float64) (ok bool, err error) {
	n := len(out)
	if lb.raw == nil {
		lb.raw = make([]uint16, n)
	}
	dt, err := blk.ReadRaw16(l, batch, 0, lb.raw)
	if err != nil || dt == loader.Invalid {
		return false, err
	}
	tab := loader.RawTable(dt)
	// the cells split over the processors: each adds its own cells in
	// head order, so the sums are the same whatever the split
	split := lb.split
	if split <= 0 {
		split = splitCells
	}
	parts := max(1, min(runtime.GOMAXPROCS(0), n/split))
	for h := 0; h < blk.Heads; h++ {
		if h > 0 {
			if _, err := blk.ReadRaw16(l, batch, h, lb.raw); err != nil {
				return false, err
			}
		}
		raw := lb.raw
		var wg sync.WaitGroup
		for p := range parts {
			lo, hi := p*n/parts, (p+1)*n/parts
			wg.Go(func() {
				o, r := out[lo:hi], raw[lo:hi]
				for i, x := range r {
					o[i] += float64(tab[x])
				}
			})
		}
		wg.Wait()
	}
	return true, nil
}

// eachHead calls add(h, a, g) for every head of layer l in head order, with
// the head's attention (and gradients, with grad) read by a second
// goroutine one head ahead: on two processors reading and adding overlap,
// and the sums keep their order (the result is headMean's, bit for bit).
func (lb *layerBufs) eachHead(blk *loader.Block, l, batch int, grad bool, add func(h int, a, g []float32)) error {
	n := blk.Queries * blk.Keys
	for i := range 2 {
		if lb.a[i] == nil {
			lb.a[i] = make([]float32, n)
		}
		if grad && lb.g[i] == nil {
			lb.g[i] = make([]float32, n)
		}
	}
	read := func(h int) error {
		if err := blk.ReadAttn(l, batch, h, lb.a[h%2]); err != nil {
			return err
		}
		if grad {
			return blk.ReadGrad(l, batch, h, lb.g[h%2])
		}
		return nil
	}
	if err := read(0); err != nil {
		return err
	}
	for h := 0; h < blk.Heads; h++ {
		next := make(chan error, 1)
		if h+1 < blk.Heads {
			go func() { next <- read(h + 1) }()
		} else {
			next <- nil
		}
		add(h, lb.a[h%2], lb.g[h%2])
		if err := <-next; err != nil {
			return err
		}
	}
	return nil
}

// layer returns one layer's matrix (a new n x n slice): the head mean of A
// or, with grad, GradAbar, reading one head at a time (the sums run in the
// same order as headMean's and GradAbar's over all heads at once).
func (lb *layerBufs) layer(blk *loader.Block, l, batch int, grad bool) ([]float64, error) {
	out := make([]float64, blk.Queries*blk.Keys)
	fast := false
	if !grad {
		var err error
		if fast, err = lb.rawMean(blk, l, batch, out); err != nil {
			return nil, err
		}
	}
	err := error(nil)
	if !fast {
		err = lb.eachHead(blk, l, batch, grad, func(_ int, a, g []float32) {
			if !grad {
				for i, x := range a {
					out[i] += float64(x)
				}
				return
			}
			addGradTerm(out, a, g)
		})
	}
	if err != nil {
		return nil, err
	}
	if !grad {
		for i := range out {
			out[i] /= float64(blk.Heads) // as headMean
		}
	} else {
		scaleBy(out, 1/float64(blk.Heads)) // as GradAbar
	}
	for _, x := range out {
		if math.IsNaN(x) || math.IsInf(x, 0) {
			return nil, errors.New("analysis: the attention holds NaN or Inf in the rows traced: run heed check")
		}
	}
	return out, nil
}

// splitCells is the fewest cells a processor takes in rawMean unless
// layerBufs.split says otherwise.
const splitCells = 1 << 16

// streamRow returns row q of the product M_{L-1} ... M_0 of the layers'
// matrices (rollout: the residual-augmented head means; grad: I + Abar),
// reading the layers from the top down, one at a time: one pass over the
// attention (and gradients) in O(n^2) memory rather than O(layers n^2).
// The arithmetic is RolloutRow's and SelfRelevanceRow's.
func streamRow(blk *loader.Block, batch, q int, grad bool) ([]float64, error) {
	if grad && !blk.HasGrad {
		return nil, noGrad(blk)
	}
	n := blk.Keys
	v := make([]float64, n)
	w := make([]float64, n)
	v[q] = 1
	var lb layerBufs
	for l := blk.Layers - 1; l >= 0; l-- {
		m, err := lb.layer(blk, l, batch, grad)
		if err != nil {
			return nil, err
		}
		if !grad {
			ResidualRows(m, n)
		}
		vecMat(w, v, m, n, n)
		if grad {
			for j := range w {
				w[j] += v[j]
			}
		}
		v, w = w, v
	}
	return v, nil
}

func defaultBlock(ex *loader.Export) *loader.Block {
	for _, b := range ex.Blocks {
		if b.Kind == loader.KindCross {
			return b
		}
	}
	for _, b := range ex.Blocks {
		if b.Kind == loader.KindCausal {
			return b
		}
	}
	if len(ex.Blocks) > 0 {
		return ex.Blocks[0]
	}
	return nil
}

// selfBlockOf returns the self-attention block over the given side.
func selfBlockOf(ex *loader.Export, side string, not *loader.Block) *loader.Block {
	for _, b := range ex.Blocks {
		if b != not && b.Kind != loader.KindCross && b.QuerySide == side && b.KeySide == side {
			return b
		}
	}
	return nil
}

// Trace explains one query position of one batch item of an export with
// the chosen method; see the Method constants for what the shares mean.
func Trace(ctx context.Context, ex *loader.Export, opt Options) (*Result, error) {
	var blk *loader.Block
	if opt.Block == "" {
		blk = defaultBlock(ex)
		if blk == nil {
			return nil, errors.New("analysis: the export has no attention block")
		}
	} else if blk = ex.Block(opt.Block); blk == nil {
		return nil, fmt.Errorf("analysis: no block %q in the export", opt.Block)
	}
	if opt.Batch < 0 || opt.Batch >= blk.Batch {
		return nil, fmt.Errorf("analysis: batch %d out of range (block %s has %d)", opt.Batch, blk.Name, blk.Batch)
	}
	if opt.Query < 0 || opt.Query >= blk.Queries {
		return nil, fmt.Errorf("analysis: query %d out of range (block %s has %d queries)", opt.Query, blk.Name, blk.Queries)
	}
	method := opt.Method
	if method == "" {
		method = MethodRollout
	}
	res := &Result{Block: blk.Name, Query: opt.Query, Batch: opt.Batch, Method: method, Side: blk.KeySide}
	var shares []float64
	var err error
	if blk.Kind == loader.KindCross {
		shares, err = traceCross(ex, blk, opt.Batch, opt.Query, method)
	} else {
		shares, err = traceSelf(ctx, blk, opt.Batch, opt.Query, method)
		res.Normalised = method == MethodRollout
	}
	if err != nil {
		return nil, err
	}
	side := ex.Side(blk.KeySide)
	status := keyStatus(ex, blk, opt.Batch, opt.Query)
	for i, s := range shares {
		res.Tokens = append(res.Tokens, TokenShare{Index: i, Token: side.Token(opt.Batch, i), Share: s, Status: status(i)})
	}
	res.Position = opt.Query + blk.QueryOffset
	res.QueryToken = ex.Side(blk.QuerySide).Token(opt.Batch, res.Position)
	res.Predicted = Predicted(ex, blk, opt.Batch, opt.Query)
	res.LessIdentity = method == MethodGrad && blk.Kind != loader.KindCross
	return res, nil
}

// keyStatus says, for each key of the explained query, why the query may
// not see it ("" when it may), by the block's positional and padding
// rules (head-independent: an explicit per-head mask is not consulted).
func keyStatus(ex *loader.Export, blk *loader.Block, batch, q int) func(k int) string {
	r, err := analysis.BlockRules(ex, blk, nil)
	if err != nil || r == nil || len(r.Active()) == 0 || !r.Judged(batch, q) {
		return func(int) string { return "" }
	}
	row := make([]analysis.Rule, r.Keys)
	r.Row(batch, q, nil, row)
	return func(k int) string {
		if k < 0 || k >= len(row) {
			return ""
		}
		switch row[k] {
		case analysis.RuleNone:
			return ""
		case analysis.RulePadding:
			return "padding"
		case analysis.RuleSegments:
			return "other document"
		}
		return "future"
	}
}

// Predicted returns what the model predicted at query q of blk (batch
// item batch): the exported logits' argmax at the query's position with its
// softmax probability, else the next input token of the query's side.
func Predicted(ex *loader.Export, blk *loader.Block, batch, q int) Prediction {
	pos := q + blk.QueryOffset
	if a := ex.Logits; a != nil {
		sh := a.Shape()
		v := sh[len(sh)-1]
		idx := []int{pos}
		if len(sh) == 3 {
			idx = []int{batch, pos}
		}
		if pos < sh[len(sh)-2] && (len(sh) == 2 || batch < sh[0]) {
			row := make([]float32, v)
			if err := a.ReadFloat32(idx, row); err == nil && v > 0 {
				best := 0
				for i, x := range row {
					if x > row[best] {
						best = i
					}
				}
				// softmax of the best: 1 / sum_i exp(x_i - x_best)
				var z float64
				for _, x := range row {
					z += math.Exp(float64(x) - float64(row[best]))
				}
				p := 1 / z
				pr := Prediction{From: "logits", ID: best, Prob: &p}
				if t, err := ex.VocabText(best); err == nil {
					pr.Token = t // "" without a vocabulary (or one that cannot be read)
				}
				return pr
			}
		}
	}
	side := ex.Side(blk.QuerySide)
	if blk.Kind == loader.KindCross || blk.QuerySide == blk.KeySide {
		if t := side.Token(batch, pos+1); t != "" && side.IsValid(batch, pos+1) {
			return Prediction{From: "next token", ID: -1, Token: t}
		}
	}
	return Prediction{ID: -1}
}

func traceSelf(ctx context.Context, blk *loader.Block, batch, q int, method Method) ([]float64, error) {
	if blk.Queries != blk.Keys {
		return nil, fmt.Errorf("analysis: block %s has %d queries over %d keys (a decode step): propagation through layers needs square self-attention", blk.Name, blk.Queries, blk.Keys)
	}
	n := blk.Keys
	switch method {
	case MethodGrad:
		// R starts as I, so row q of R holds 1 at q itself whatever the
		// attention did: report what the layers added, R - I (row q less
		// its identity start), or the query explains itself by 100%
		r, err := streamRow(blk, batch, q, true)
		if err != nil {
			return nil, err
		}
		r[q]--
		return r, nil
	case MethodRollout:
		return streamRow(blk, batch, q, false)
	case MethodFlow:
		// only positions reachable from q matter; under a causal mask that is 0..q
		reach := n
		if blk.Kind == loader.KindCausal {
			reach = q + 1
		}
		// refused beyond the limit before anything is read
		if w := int64(blk.Layers) * int64(reach) * int64(reach) * int64(reach); w > FlowLimit {
			return nil, &FlowTooLargeError{Layers: blk.Layers, Positions: reach, Work: w}
		}
		mats, err := layerAbar(blk, batch, false)
		if err != nil {
			return nil, err
		}
		for _, m := range mats {
			ResidualRows(m, n)
		}
		if blk.Kind == loader.KindCausal {
			for l, m := range mats {
				sub := make([]float64, reach*reach)
				for i := 0; i < reach; i++ {
					copy(sub[i*reach:(i+1)*reach], m[i*n:i*n+reach])
				}
				mats[l] = sub
			}
		}
		f, err := Flow(ctx, mats, reach, q)
		if err != nil {
			return nil, err
		}
		out := make([]float64, n)
		copy(out, f)
		return out, nil
	}
	return nil, fmt.Errorf("analysis: unknown method %q (want rollout, flow or grad)", method)
}

func traceCross(ex *loader.Export, cross *loader.Block, batch, q int, method Method) ([]float64, error) {
	if method == MethodFlow {
		return nil, ErrFlowCross
	}
	if method != MethodRollout && method != MethodGrad {
		return nil, fmt.Errorf("analysis: unknown method %q (want rollout, flow or grad)", method)
	}
	enc := selfBlockOf(ex, cross.KeySide, nil)
	dec := selfBlockOf(ex, cross.QuerySide, nil)
	if enc == nil || dec == nil {
		return nil, fmt.Errorf("analysis: tracing through cross block %s needs self-attention blocks over %q (encoder) and %q (decoder)", cross.Name, cross.KeySide, cross.QuerySide)
	}
	if dec.Layers != cross.Layers {
		return nil, fmt.Errorf("analysis: decoder block %s has %d layers, cross block %s %d: they must match", dec.Name, dec.Layers, cross.Name, cross.Layers)
	}
	s, t := cross.Keys, cross.Queries
	if enc.Keys != s || dec.Keys != t || enc.Queries != s || dec.Queries != t {
		return nil, fmt.Errorf("analysis: block sizes do not line up: encoder %dx%d, decoder %dx%d, cross %dx%d", enc.Queries, enc.Keys, dec.Queries, dec.Keys, t, s)
	}
	if s > RelevanceLimit || t > RelevanceLimit {
		return nil, fmt.Errorf("analysis: sequences of %d and %d positions exceed the relevance limit of %d", t, s, RelevanceLimit)
	}
	grad := method == MethodGrad
	var ms [3][][]float64
	for i, b := range []*loader.Block{enc, dec, cross} {
		m, err := layerAbar(b, batch, grad)
		if err != nil {
			return nil, err
		}
		ms[i] = m
	}
	rts := EncDecRelevance(ms[0], ms[1], ms[2], s, t)
	return append([]float64(nil), rts[q*s:(q+1)*s]...), nil
}
