package analysis

import (
	"context"
	"errors"
	"fmt"
	"math"
	"runtime"
	"sync"

	"github.com/heed-dev/heed/internal/bigmem"
	"github.com/heed-dev/heed/internal/kernels"
	"github.com/heed-dev/heed/loader"
)

// DefaultTol is the default leak tolerance: forbidden cells holding at most
// this much mass are not counted as leaks.
const DefaultTol = 1e-6

// DefaultMaxLayerBytes bounds the memory that holds one layer's heads for the
// redundancy (Jensen-Shannon) pass; beyond it, evenly spaced query rows are
// used (see Options.MaxLayerBytes).
const DefaultMaxLayerBytes = 64 << 20

// DefaultRedundancyRows is how many evenly spaced query rows per (layer,
// batch item) the redundancy pass uses by default: comparing every pair of
// heads costs (heads-1)/2 times the main pass over the same rows, so all rows
// of long sequences would dominate the run.
const DefaultRedundancyRows = 128

// Options control an analysis pass. The zero value is not useful: start from
// DefaultOptions.
type Options struct {
	// Rules, when not empty, are exactly the checks that run (mask and row
	// rules: the --rule flag); empty = the mask rules that follow from each
	// block's kind and metadata plus every row check.
	Rules []Rule
	// Tol: a forbidden cell is a leak when its value is above Tol.
	Tol float64
	// SumTol: a judged row is un-normalised when |sum - 1| > SumTol; 0 = by
	// dtype (SumTolerance).
	SumTol float64
	// SumBelow accepts rows summing below 1 (models with learned sink logits):
	// only sums above 1 + SumTol are flagged.
	SumBelow bool
	// Workers is the number of goroutines; 0 = runtime.GOMAXPROCS(0).
	Workers int
	// Progress, when set, is called from the calling goroutine after each
	// (layer, batch item) of each block, with the heads done and the total
	// expected (the total is an estimate when examples differ in shape).
	Progress func(done, total int64)
	// RedundancyRows: the redundancy (mean Jensen-Shannon divergence to the
	// other heads) uses every s-th query row, s the smallest stride giving at
	// most this many rows (0 = DefaultRedundancyRows, -1 = every row). The
	// rows are the same whatever the sharding, so results stay exact.
	RedundancyRows int
	// NoRedundancy leaves the redundancy pass out (heed check prints no
	// statistics, and the pass over head pairs is a large share of the time):
	// Stats.Redundancy is then NaN.
	NoRedundancy bool
	// NoStats leaves out the row statistics only a report of heads prints
	// (entropy, normalised entropy, confidence, distance: heed check prints
	// none of them): they are NaN in the result. The sums the checks and
	// diagnoses read (row sums, zeros, sink and document-sink mass) stay.
	// It leaves the redundancy out too (it is built on the row entropies).
	NoStats bool
	// MaxLayerBytes bounds the float32 copy of one layer's heads kept for the
	// redundancy pass; when a layer needs more, every s-th query row is kept
	// (s the smallest stride that fits) and the redundancy is the mean over
	// those rows. 0 = DefaultMaxLayerBytes.
	MaxLayerBytes int64
	// Blocks, when not empty, restricts the pass to these block names.
	Blocks []string
	// Background runs the workers on operating-system threads of the
	// lowest scheduling priority where the system has one for threads
	// (Linux: nice 19 on each worker's thread, pass_lowprio_linux.go), so that a
	// program drawing a screen while the pass runs behind it keeps the
	// processors for the screen and the terminal whenever they want them.
	// Results do not depend on it.
	Background bool
	// Yield, when set, is called by the workers between heads and every
	// 64 query rows of a head; it may block to leave the processors to
	// something more urgent for a while (the TUI holds the pass while it
	// answers a key: on a small machine a lower priority alone does not
	// keep the pass from slowing the screen down). It must return when the
	// context is canceled. Results do not depend on it.
	Yield func()
	// NoInfer leaves blocks whose kind nobody gave as they are: no mask is
	// inferred from their zeros (analysis/rules_infer.go) and assumed query
	// positions are not tested.
	NoInfer bool
	// read takes read paths off (tests compare them; zero = every path).
	read readPaths
}

// DefaultOptions returns the options heed check and heed rank start from.
func DefaultOptions() Options { return Options{Tol: DefaultTol} }

// SumTolerance is the row-sum tolerance for a dtype: about the rounding of a
// softmax row stored in it (common practice: bf16 keeps 8 bits of mantissa,
// f16 11, f32 24). float64 gets float32's: a float64 export usually holds a
// softmax computed in float32 and widened when saved (numpy's astype, torch's
// .double()), whose rows are off by up to about 1e-7; the bugs the row-sum
// check is for (no softmax, dropout's 1/(1-p), heads summed) are off by far
// more.
func SumTolerance(d loader.DType) float64 {
	switch d {
	case loader.BFloat16:
		return 1e-2
	case loader.Float16:
		return 1e-3
	default:
		return 1e-5
	}
}

// RowSumTolerance returns the row-sum tolerance of blk and, when the dtype
// the model computed in is unknown, a looser one (else 0). Given SumTol (>
// 0) wins. With a compute dtype (loader.Block.ComputeDType), the tolerance
// is the looser of the stored and the computed dtype's (SumTolerance): a
// bfloat16 softmax saved as float32 keeps bfloat16's rounding. Without one,
// a float32 or float64 export is judged at its own tolerance, and rows off
// by no more than a bfloat16 softmax's rounding (SumTolerance(BFloat16))
// are counted apart (HeadAcc.SumLowRows) and explained in a note rather
// than reported as a bug.
func RowSumTolerance(blk *loader.Block, given float64) (tol, loose float64) {
	if given > 0 {
		return given, 0
	}
	tol = SumTolerance(blk.DType)
	if blk.ComputeDType != loader.Invalid {
		return max(tol, SumTolerance(blk.ComputeDType)), 0
	}
	if low := SumTolerance(loader.BFloat16); low > tol {
		return tol, low
	}
	return tol, 0
}

// ErrCanceled is returned (wrapped with the context's error) when the
// context is canceled during a pass.
var ErrCanceled = errors.New("analysis: canceled")

// reader is what a pass reads from a block; *loader.Block implements it.
type reader interface {
	ReadAttn(layer, batch, head int, dst []float32) error
	ReadGrad(layer, batch, head int, dst []float32) error
	ReadAllow(batch, head int, dst []bool) error
}

// NewPartial returns an empty Partial for passes made with opt.
func NewPartial(opt Options) *Partial {
	po := PartialOptions{Tol: opt.Tol, SumTol: opt.SumTol, SumBelow: opt.SumBelow,
		RedundancyRows: opt.RedundancyRows, MaxLayerBytes: opt.MaxLayerBytes, NoRedundancy: opt.NoRedundancy,
		NoStats: opt.NoStats, NoInfer: opt.NoInfer}
	if !opt.NoStats {
		po.Extra = rowStatNames()
	}
	for _, r := range opt.Rules {
		po.Rules = append(po.Rules, r.String())
	}
	return &Partial{Version: PartialVersion, Options: po}
}

// Analyze runs every statistic and check over one export and returns its Partial.
func Analyze(ctx context.Context, ex *loader.Export, opt Options) (*Partial, error) {
	p := NewPartial(opt)
	name := ""
	if len(ex.Paths) > 0 {
		name = ex.Paths[0]
	}
	err := p.Add(ctx, ex, name, opt)
	return p, err
}

// AnalyzeExamples runs the pass over the examples of set numbered idx (all
// of them when idx is nil), in that order, each named by set.Name.
func AnalyzeExamples(ctx context.Context, set *loader.Set, idx []int, opt Options) (*Partial, error) {
	n := len(idx)
	if idx == nil {
		n = set.Len()
	}
	return AnalyzeSet(ctx, n, func(j int) (*loader.Export, string, error) {
		i := j
		if idx != nil {
			i = idx[j]
		}
		ex, err := set.Open(i)
		return ex, set.Name(i), err
	}, opt)
}

// AnalyzeSet runs the pass over n examples, opening each with open (which
// returns the export and a name for it, usually its first file) and closing
// it after use. Examples are processed one after another, each with all
// workers.
func AnalyzeSet(ctx context.Context, n int, open func(i int) (*loader.Export, string, error), opt Options) (*Partial, error) {
	p := NewPartial(opt)
	var prog *progress
	if opt.Progress != nil {
		prog = &progress{fn: opt.Progress}
	}
	for i := 0; i < n; i++ {
		if err := ctx.Err(); err != nil {
			return p, fmt.Errorf("%w: %w", ErrCanceled, err)
		}
		ex, name, err := open(i)
		if err != nil {
			return p, err
		}
		if prog != nil && i == 0 {
			prog.total = int64(n) * exportUnits(ex, opt)
		}
		err = p.add(ctx, ex, name, opt, prog)
		if cerr := ex.Close(); err == nil && cerr != nil {
			err = cerr
		}
		if err != nil {
			return p, err
		}
	}
	return p, nil
}

type progress struct {
	fn          func(done, total int64)
	done, total int64
}

func exportUnits(ex *loader.Export, opt Options) int64 {
	var n int64
	for _, b := range ex.Blocks {
		if wanted(opt, b.Name) {
			n += int64(b.Layers) * int64(b.Batch) * int64(b.Heads)
		}
	}
	return n
}

func wanted(opt Options, name string) bool {
	if len(opt.Blocks) == 0 {
		return true
	}
	for _, b := range opt.Blocks {
		if b == name {
			return true
		}
	}
	return false
}

// Add runs the pass over one more example (an opened export named example,
// usually its first file) and adds it to p. opt must be the options p was
// made with (NewPartial).
func (p *Partial) Add(ctx context.Context, ex *loader.Export, example string, opt Options) error {
	return p.add(ctx, ex, example, opt, nil)
}

func (p *Partial) add(ctx context.Context, ex *loader.Export, example string, opt Options, prog *progress) error {
	if prog == nil && opt.Progress != nil {
		prog = &progress{fn: opt.Progress, total: exportUnits(ex, opt)}
	}
	for _, name := range opt.Blocks {
		if ex.Block(name) == nil {
			return fmt.Errorf("analysis: %s: no block %q", example, name)
		}
	}
	for _, blk := range ex.Blocks {
		if !wanted(opt, blk.Name) {
			continue
		}
		qs, ks := ex.Side(blk.QuerySide), ex.Side(blk.KeySide)
		if bp := p.block(blk.Name); bp != nil && blk.KindFrom == "" && bp.KindFrom == "inferred" {
			// an earlier example showed the mask: judge this one by it too
			setKind(blk, loader.Kind(bp.Kind), bp.Window, bp.Prefix, bp.Evidence)
		}
		if !opt.NoInfer {
			if err := inferBlock(ctx, blk, qs); err != nil {
				return err
			}
		}
		if err := p.addBlock(ctx, blockIn{blk: blk, rd: blk, qs: qs, ks: ks, example: example}, opt, prog); err != nil {
			return err
		}
	}
	p.Examples++
	return nil
}

func maskRules(rs []Rule) []Rule {
	var out []Rule
	for _, r := range rs {
		if r.IsMask() {
			out = append(out, r)
		}
	}
	if len(rs) > 0 && len(out) == 0 {
		return []Rule{} // --rule given with row rules only: no mask rule
	}
	return out
}

// rowChecks returns which row rules run.
func rowChecks(rs []Rule) (nan, sum, neg bool) {
	if len(rs) == 0 {
		return true, true, true
	}
	for _, r := range rs {
		switch r {
		case RuleNaNRows:
			nan = true
		case RuleRowSum:
			sum = true
		case RuleNegative:
			neg = true
		}
	}
	return
}

// blockIn is one block of one example as the pass reads it: the block, what
// its matrices are read from (the block itself but in tests), its query and
// key sides, and the example's name.
type blockIn struct {
	blk     *loader.Block
	rd      reader
	qs, ks  *loader.Side
	example string
}

func (p *Partial) addBlock(ctx context.Context, in blockIn, opt Options, prog *progress) error {
	blk, qs, ks, example := in.blk, in.qs, in.ks, in.example
	only := maskRules(opt.Rules)
	var rules *Rules
	var err error
	if only != nil && len(only) == 0 {
		rules, err = NewRules(blk, qs, ks, nil)
		if err == nil {
			rules.active = [numMask]bool{}
		}
	} else {
		rules, err = NewRules(blk, qs, ks, only)
	}
	if err != nil {
		return err
	}
	if blk.Queries <= 0 || blk.Keys <= 0 || blk.Layers <= 0 || blk.Heads <= 0 || blk.Batch <= 0 {
		return fmt.Errorf("analysis: block %s: empty shape", blk.Name)
	}
	// the example's block is analysed on its own, then added to the set's
	// as a shard's is (merge): so what this example found is known
	// (exampleDone) and the sums are the same as adding it in place
	bp := p.block(blk.Name)
	nb := newBlockPartial(blk, rules, opt)
	if bp != nil {
		if why := bp.sameShape(nb); why != "" {
			return fmt.Errorf("analysis: %s: block %s: %s (every example must have the same layout)", example, blk.Name, why)
		}
	}
	for b := range nb.Geometry {
		nb.Geometry[b] = geometry(rules, b)
	}
	if err := runBlock(ctx, nb, in, rules, opt, prog); err != nil {
		return err
	}
	nb.exampleDone()
	if bp == nil {
		p.Blocks = append(p.Blocks, nb)
		sortBlocks(p.Blocks)
	} else {
		bp.merge(nb)
	}
	return nil
}

func sortBlocks(bs []*BlockPartial) {
	for i := 1; i < len(bs); i++ {
		for j := i; j > 0 && bs[j].Name < bs[j-1].Name; j-- {
			bs[j], bs[j-1] = bs[j-1], bs[j]
		}
	}
}

func newBlockPartial(blk *loader.Block, rules *Rules, opt Options) *BlockPartial {
	bp := &BlockPartial{
		Name: blk.Name, Kind: string(blk.Kind), DType: blk.DType.String(),
		Layers: blk.Layers, Heads: blk.Heads, Batch: blk.Batch, Queries: blk.Queries, Keys: blk.Keys,
		QueryOffset: blk.QueryOffset, Window: blk.Window, Prefix: blk.Prefix, KVHeads: blk.KVHeads,
		SelfAttn: rules.SelfAttention(), HasGrad: blk.HasGrad,
		KindFrom: blk.KindFrom, Evidence: blk.KindEvidence, Axes: blk.Axes, AxesFrom: blk.AxesFrom, AxesOther: blk.AxesOther,
		PosFrom: blk.PosFrom, PosEvidence: blk.PosEvidence, RulesGiven: len(opt.Rules) > 0,
	}
	if blk.ComputeDType != loader.Invalid {
		bp.ComputeDType = blk.ComputeDType.String()
	}
	bp.SumTol, bp.SumLoose = RowSumTolerance(blk, opt.SumTol)
	for _, r := range rules.Active() {
		bp.Rules = append(bp.Rules, r.String())
	}
	for _, r := range rules.RowChecks(opt.Rules) {
		bp.RowChecks = append(bp.RowChecks, r.String())
	}
	bp.Units = make([][]HeadAcc, blk.Layers*blk.Heads)
	for i := range bp.Units {
		bp.Units[i] = make([]HeadAcc, blk.Batch)
	}
	bp.Geometry = make([]GeometryAcc, blk.Batch)
	return bp
}

// geometry counts the cells each positional rule forbids in the judged rows
// of batch item b, by offset k - p: the cells that could leak at that
// offset. Padding keys are left out (whether or not the padding rule is
// checked): a padded key is blocked by the padding mask, so a mask shifted
// by +n cannot show at the last real query of a padded item.
func geometry(r *Rules, b int) GeometryAcc {
	var g GeometryAcc
	base := r.MaxPos()
	diff := make([][]int64, numMask)
	var valid []bool // nil = every key is real
	if r.validK != nil {
		valid = r.validK[b]
	}
	add := func(rule Rule, p, lo, hi int) { // keys [lo, hi) of position p
		for lo < hi {
			for valid != nil && lo < hi && !valid[lo] {
				lo++
			}
			e := lo
			for e < hi && (valid == nil || valid[e]) {
				e++
			}
			if lo >= e {
				return
			}
			if diff[rule] == nil {
				diff[rule] = make([]int64, base+r.Keys+1)
			}
			diff[rule][lo-p+base]++
			diff[rule][e-p+base]--
			lo = e
		}
	}
	for q := 0; q < r.Queries; q++ {
		if !r.Judged(b, q) {
			continue
		}
		g.Rows++
		p := r.Pos(b, q)
		if r.active[RuleCausal] {
			if r.active[RulePrefix] && p < r.Prefix {
				add(RulePrefix, p, max(r.Prefix, p+1), r.Keys)
			} else {
				add(RuleCausal, p, p+1, r.Keys)
			}
		}
		if r.active[RuleWindow] && p-r.Window >= 0 {
			add(RuleWindow, p, 0, min(p-r.Window, r.Keys-1)+1)
		}
	}
	for rule, d := range diff {
		if d == nil {
			continue
		}
		m := map[int]int64{}
		var run int64
		for i, v := range d {
			run += v
			if run != 0 {
				m[i-base] = run
			}
		}
		g.Forbidden[rule] = m
	}
	g.Reach = reach(r, b) // rules_cut.go
	return g
}

// worker holds the buffers one goroutine reuses for every head.
type worker struct {
	a, g  []float32
	allow []bool
	rr    []Rule
	hist  [numMask][]int64
	lo    [numMask]int
	hi    [numMask]int
	u     unitAcc
	r16   []uint16  // the head's 16-bit patterns on the pattern path (pass_raw16.go)
	sums  []runSums // the allowed runs' sums of one row (cells16Clean)
	wide  []float32 // one row's run widened from patterns (pass_raw16.go)
	// freeR16 frees r16 (internal/bigmem), nil until r16 is made
	freeR16 func()
	cut     CutAcc   // the unit's rows cut off before allowed keys (rules_cut.go)
	runs    ruleRuns // the rule runs of every row of one batch item (pass_f32.go)
	one     ruleRuns // the rule runs of one row, with an explicit mask
	stats   bool     // compute the row statistics (not Options.NoStats)
	// the block's constants the cell loops read: rules.MaxPos(), the leak
	// tolerance, the example's name
	base    int
	tol     float64
	example string
	x       *extraAcc // the statistics declared with a row function (statistic_rows.go); nil = none
}

// unitAt names one (layer, batch item, head) of a block.
type unitAt struct{ l, b, h int }

// unitAcc holds the float64 sums of one (example, layer, head, batch item),
// computed in row order by one worker: deterministic, then added exactly.
type unitAcc struct {
	rows, nanRows, padRows, padNaN int64
	ent, entN, conf, dist          float64
	posRows, selfRows              int64
	prev, self                     float64
	sinkRows, docRows              int64
	sink, doc                      float64
	imp                            float64
	gradSkip                       int64
	rowSum, badDev                 float64
	sumBad                         int64
	sumLow                         int64   // rows off by more than sumTol, within sumLoose
	sumLowMax                      float64 // their largest |sum - 1|
	sumMin, sumMax                 float64
	sumSeen                        bool
	negCells, negRows              int64
	negMass                        float64
	allowCells, allowZeros         int64
	allowMass                      float64
	nanFirst, sumWorst             Cell
	leak                           [numMask]leakUnit
}

type leakUnit struct {
	mass              float64
	cells, rows, forb int64
	worst             Cell
}

// layerStore keeps (possibly strided) rows of every head of one (layer,
// batch item) for the redundancy pass, a head's rows side by side (st.at,
// st.vrow): each worker writes its own head's, and a layout with a row's
// heads side by side had two workers share cache lines of the facts and
// measured slower on short rows. The pass over pairs takes a run of rows
// at a time and every pair of heads at each, so a row's H heads stay in
// the caches while the H(H-1)/2 pairs read them.
type layerStore struct {
	stride, rows, keys int
	vals               []float32 // [head][row][key]
	ent                []float64 // [head][row]
	ok                 []bool    // [head][row]: judged and finite
	neg                []bool    // [head][row]: holds a negative value
	lo, hi             []int32   // [head][row]: first and last nonzero key
	div                []float64 // [pair][row]: the pair's divergence at the row, -1 when not both judged and finite
}

func runBlock(ctx context.Context, bp *BlockPartial, in blockIn, rules *Rules, opt Options, prog *progress) error {
	blk, rd, example := in.blk, in.rd, in.example
	Q, K, H := blk.Queries, blk.Keys, blk.Heads
	kernels.InitXlogx() // x ln x tables for float16/bfloat16 values (internal/kernels)
	nw := opt.Workers
	if nw <= 0 {
		nw = runtime.GOMAXPROCS(0)
	}
	nw = min(nw, H)
	limit := opt.MaxLayerBytes
	if limit <= 0 {
		limit = DefaultMaxLayerBytes
	}
	maxRows := opt.RedundancyRows
	if maxRows == 0 {
		maxRows = DefaultRedundancyRows
	}
	if opt.NoStats {
		opt.NoRedundancy = true // the redundancy needs the row entropies
	}
	if opt.NoRedundancy {
		maxRows = 1 // one row kept per head, never compared
	}
	stride := 1
	if maxRows > 0 {
		stride = (Q + maxRows - 1) / maxRows
	}
	for int64(H)*int64((Q+stride-1)/stride)*int64(K)*4 > limit && stride < Q {
		stride++
	}
	nr := (Q + stride - 1) / stride
	// the large buffers (a head per worker, a layer's rows) are freed when
	// the block is done (internal/bigmem: huge pages, few page faults)
	var frees []func()
	defer func() {
		for _, f := range frees {
			f()
		}
	}()
	big := func(n int) []float32 {
		b, free := bigmem.Float32s(n)
		frees = append(frees, free)
		return b
	}
	st := &layerStore{stride: stride, rows: nr, keys: K,
		vals: big(H * nr * K), ent: make([]float64, H*nr), ok: make([]bool, H*nr), neg: make([]bool, H*nr),
		lo: make([]int32, H*nr), hi: make([]int32, H*nr)}
	sumTol, sumLoose := RowSumTolerance(blk, opt.SumTol)
	doNaN, doSum, doNeg := rowChecks(opt.Rules)
	cfg := passConfig{tol: opt.Tol, sumTol: sumTol, sumLoose: sumLoose, sumBelow: opt.SumBelow, doNaN: doNaN, doSum: doSum, doNeg: doNeg,
		grad: blk.HasGrad, allow: blk.HasAllow && rules.active[RuleExplicit], example: example, yield: opt.Yield, read: opt.read}
	cfg.doCut = cutCheck(opt.Rules) && cutBlock(rules)
	cfg.tiny = max(underflowTiny(blk.DType), underflowTiny(blk.ComputeDType))
	workers := make([]*worker, nw)
	base := rules.MaxPos()
	for i := range workers {
		w := &worker{a: big(Q * K), rr: make([]Rule, K), runs: ruleRuns{batch: -1}, stats: !opt.NoStats,
			base: base, tol: opt.Tol, example: example}
		if w.stats && len(extraStats) > 0 {
			w.x = newExtraAcc(K)
		}
		if cfg.grad {
			w.g = big(Q * K)
		}
		frees = append(frees, func() {
			if w.freeR16 != nil {
				w.freeR16()
			}
		})
		if cfg.allow {
			w.allow = make([]bool, Q*K)
		}
		for _, r := range []Rule{RuleCausal, RulePrefix, RuleWindow} {
			if rules.active[r] {
				w.hist[r] = make([]int64, base+K)
			}
		}
		workers[i] = w
	}
	pairs := H * (H - 1) / 2
	pi, pj := make([]int, pairs), make([]int, pairs)
	for i, n := 0, 0; i < H; i++ {
		for j := i + 1; j < H; j++ {
			pi[n], pj[n] = i, j
			n++
		}
	}
	// the pair pass's tasks: runs of rows, about four per worker (a task a
	// row cost more in scheduling than it gained on short rows)
	chunk := max(1, nr/(4*nw))
	pairTasks := (nr + chunk - 1) / chunk
	if opt.NoRedundancy {
		pairs, pairTasks = 0, 0
	}
	st.div = make([]float64, pairs*nr)
	for l := 0; l < blk.Layers; l++ {
		for b := 0; b < blk.Batch; b++ {
			if err := ctx.Err(); err != nil {
				return fmt.Errorf("%w: %w", ErrCanceled, err)
			}
			err := parallel(ctx, workers, H, opt.Background, opt.Yield, func(w *worker, h int) error {
				return w.head(rd, rules, cfg, bp.Unit(l, h, b), st, unitAt{l, b, h})
			})
			if err != nil {
				return err
			}
			// every pair of heads at each row of a task's run: the heads'
			// rows are read from the caches, where a pair per task read two
			// heads' rows from memory for each of the H(H-1)/2 pairs
			err = parallel(ctx, workers, pairTasks, opt.Background, opt.Yield, func(w *worker, t int) error {
				for r := t * chunk; r < min(nr, (t+1)*chunk); r++ {
					st.pairsAt(r, pi, pj)
				}
				return nil
			})
			if err != nil {
				return err
			}
			for n := 0; n < pairs; n++ {
				sum, cnt := st.pairSum(n)
				for _, h := range [2]int{pi[n], pj[n]} {
					u := bp.Unit(l, h, b)
					u.JS.Add(sum)
					u.JSRows += cnt
				}
			}
			if prog != nil {
				prog.done += int64(H)
				prog.fn(prog.done, max(prog.total, prog.done))
			}
		}
	}
	return nil
}

// parallel runs fn(w, i) for i in [0, n) over the workers and returns the
// first error. With bg, each worker goroutine runs on a thread of its own
// whose priority it lowers (Options.Background); the thread ends with the
// goroutine, so no lowered thread goes back to the runtime's pool.
func parallel(ctx context.Context, workers []*worker, n int, bg bool, yield func(), fn func(w *worker, i int) error) error {
	if n == 0 {
		return nil
	}
	var (
		mu    sync.Mutex
		next  int
		first error
		wg    sync.WaitGroup
	)
	for _, w := range workers[:min(len(workers), n)] {
		wg.Add(1)
		go func(w *worker) {
			defer wg.Done()
			if bg {
				runtime.LockOSThread() // never unlocked: the thread exits with the goroutine
				lowerThreadPriority()
			}
			for {
				mu.Lock()
				if first != nil || next >= n {
					mu.Unlock()
					return
				}
				i := next
				next++
				mu.Unlock()
				if yield != nil {
					yield()
				}
				err := ctx.Err()
				if err != nil {
					err = fmt.Errorf("%w: %w", ErrCanceled, err)
				} else {
					err = fn(w, i)
				}
				if err != nil {
					mu.Lock()
					if first == nil {
						first = err
					}
					mu.Unlock()
					return
				}
			}
		}(w)
	}
	wg.Wait()
	return first
}

type passConfig struct {
	tol, sumTol                   float64
	sumLoose                      float64 // > sumTol: rows within it are counted apart (compute dtype unknown)
	tiny                          float64 // > 0: a row with a value this small may have underflowed to 0 (rules_cut.go)
	sumBelow, doNaN, doSum, doNeg bool
	grad, allow                   bool
	doCut                         bool // the cut check reads this block's rows (rules_cut.go)
	example                       string
	yield                         func() // Options.Yield
	read                          readPaths
}

// lnN returns ln n for n >= 1, from a table up to 4096 keys.
func lnN(n int64) float64 {
	if t := lnTable(); n < int64(len(t)) {
		return t[n]
	}
	return math.Log(float64(n))
}

// lnTable is built on first use, not at every start of heed (32 KB).
var lnTable = sync.OnceValue(func() *[4097]float64 {
	t := new([4097]float64)
	for n := 1; n < len(t); n++ {
		t[n] = math.Log(float64(n))
	}
	return t
})

// head computes everything about one (layer, batch item, head) in one pass
// over its matrix and adds it to acc; it also copies the rows the redundancy
// pass needs into st.
func (w *worker) head(rd reader, rules *Rules, cfg passConfig, acc *HeadAcc, st *layerStore, at unitAt) error {
	l, b, h := at.l, at.b, at.h
	Q, K := rules.Queries, rules.Keys
	// the gradient and the explicit mask first: a view of the patterns holds
	// the file open, and no other read may wait behind a pending Close then
	if cfg.grad {
		if err := rd.ReadGrad(l, b, h, w.g); err != nil {
			return err
		}
	}
	if cfg.allow {
		if err := rd.ReadAllow(b, h, w.allow); err != nil {
			return err
		}
	}
	rt, r16, release, err := w.readRaw16(rd, cfg, at) // float16/bfloat16 patterns (pass_raw16.go)
	if err != nil {
		return err
	}
	if release != nil {
		defer release()
	}
	if rt == nil {
		if err := rd.ReadAttn(l, b, h, w.a); err != nil {
			return err
		}
	}
	u := &w.u
	*u = unitAcc{}
	for r := range w.lo {
		w.lo[r], w.hi[r] = math.MaxInt, -1
	}
	masked := false
	for r := RuleCausal; r < numMask; r++ {
		masked = masked || rules.active[r]
	}
	self := rules.SelfAttention()
	var row []float32
	var row16 []uint16
	val := func(k int) float64 { // float64(row[k]) on either path
		if rt != nil {
			return float64(rt.Val[row16[k]])
		}
		return float64(row[k])
	}
	for q := 0; q < Q; q++ {
		if cfg.yield != nil && q&63 == 63 {
			cfg.yield()
		}
		p := rules.Pos(b, q)
		var badK int
		var fin, negRow bool
		// a judged row of patterns is scanned for non-finite and negative
		// values on the way (cells16Clean), and with kernels.Finite16 only when it
		// has some: until then it counts as finite and without negatives
		judged := rules.Judged(b, q)
		clean := rt != nil && judged
		if rt != nil {
			row16 = r16[q*K : (q+1)*K]
			badK, fin, negRow = -1, true, false
			if !clean {
				badK, fin, negRow = kernels.Finite16(row16, rt.Exp)
			}
		} else {
			row = w.a[q*K : (q+1)*K]
			badK, fin, negRow = kernels.Finite32(row)
		}
		if cfg.grad {
			grow := w.g[q*K : (q+1)*K]
			if _, gfin, _ := kernels.Finite32(grow); fin && gfin {
				var s float64
				for k, x := range row {
					s += float64(x) * float64(grow[k])
				}
				u.imp += s
			} else {
				u.gradSkip++
			}
		}
		sr := q / st.stride
		keep := q%st.stride == 0
		if keep {
			st.ok[st.at(h, sr)] = false
		}
		if !judged {
			u.padRows++
			if !fin {
				u.padNaN++
			}
			continue
		}
		if !fin {
			u.nanRow(cfg.example, q, badK)
			continue
		}
		var allowRow []bool
		if cfg.allow {
			allowRow = w.allow[q*K : (q+1)*K]
		}
		cut := cfg.doCut && cutRow(rules, p)
		ends, rrs := w.rowRuns(rules, b, q, allowRow, cut)
		rw := rowAt{q: q, p: p, ends: ends, rules: rrs}
		ra := rowAcc{mx: math.Inf(-1), nzLo: -1, nzHi: -1, negRow: negRow}
		if rt != nil { // pass_raw16.go
			if !clean || !w.cells16Clean(&ra, rt, row16, &rw) {
				if clean {
					if badK, fin, negRow = kernels.Finite16(row16, rt.Exp); !fin {
						u.nanRow(cfg.example, q, badK)
						continue
					}
					ra.negRow = negRow
				}
				w.cells16(&ra, rt, row16, &rw)
			}
		} else {
			w.cells(&ra, row, &rw) // pass_f32.go
		}
		if w.x != nil {
			w.x.row(row, row16, rt, &rw) // statistic_rows.go
		}
		if cut && !(cfg.tiny > 0 && rowReachesUnderflow(row, row16, rt, cfg.tiny)) {
			w.cut.row(w.rr, p, q, ra.nzHi, cfg.example)
		}
		s, ent, dist, amass, negm, mx := ra.s, ra.ent, ra.dist, ra.amass, ra.negm, ra.mx
		nAllow, zeros, neg, hit, nzLo, nzHi := ra.nAllow, ra.zeros, ra.neg, ra.hit, ra.nzLo, ra.nzHi
		for r := range hit {
			if hit[r] {
				u.leak[r].rows++
			}
		}
		u.rows++
		u.ent += ent
		n := int64(K)
		if masked {
			n = nAllow
		}
		if n > 1 && w.stats {
			u.entN += ent / lnN(n)
		}
		u.conf += mx
		u.dist += dist
		if self {
			if p-1 >= 0 && p-1 < K {
				u.prev += val(p - 1)
				u.posRows++
			}
			if p < K {
				u.self += val(p)
				u.selfRows++
			}
			if p != 0 {
				u.sink += val(0)
				u.sinkRows++
			}
			if ds := rules.DocStart(b, p); ds != p {
				u.doc += val(ds)
				u.docRows++
			}
		} else {
			u.sink += val(0)
			u.sinkRows++
			u.doc += val(0)
			u.docRows++
		}
		u.allowCells += nAllow
		u.allowZeros += zeros
		u.allowMass += amass
		u.rowSum += s
		if !u.sumSeen || s < u.sumMin {
			u.sumMin = s
		}
		if !u.sumSeen || s > u.sumMax {
			u.sumMax = s
		}
		u.sumSeen = true
		if dev := s - 1; dev > cfg.sumTol || (!cfg.sumBelow && dev < -cfg.sumTol) {
			if ad := math.Abs(dev); ad <= cfg.sumLoose {
				u.sumLow++
				u.sumLowMax = max(u.sumLowMax, ad)
			} else {
				u.sumBad++
				u.badDev += ad
				c := Cell{Set: true, Example: cfg.example, Query: q, Key: -1, Value: ad}
				if c.worse(u.sumWorst) {
					u.sumWorst = c
				}
			}
		}
		if neg > 0 {
			u.negCells += neg
			u.negRows++
			u.negMass += negm
		}
		if keep {
			i, v := st.at(h, sr), st.vrow(h, sr)
			if rt != nil {
				kernels.Widen16(rt, v, row16) // a finite row
			} else {
				copy(v, row)
			}
			st.ent[i] = ent
			st.ok[i] = true
			st.neg[i] = negRow
			st.lo[i], st.hi[i] = int32(nzLo), int32(nzHi)
		}
	}
	w.commit(acc, cfg)
	if w.x != nil {
		w.x.commit(acc)
	}
	return nil
}

// nanRow counts judged row q as not finite, badK its first non-finite key.
func (u *unitAcc) nanRow(example string, q, badK int) {
	u.nanRows++
	c := Cell{Set: true, Example: example, Query: q, Key: badK}
	if c.first(u.nanFirst) {
		u.nanFirst = c
	}
}

// commit adds the unit's sums to acc (exactly) and clears the histograms.
func (w *worker) commit(acc *HeadAcc, cfg passConfig) {
	u := &w.u
	w.cut.commitTo(&acc.Cut)
	acc.Rows += u.rows
	acc.PadRows += u.padRows
	acc.PadNaNRows += u.padNaN
	if w.stats {
		acc.Entropy.Add(u.ent)
		acc.EntropyNorm.Add(u.entN)
		acc.Confidence.Add(u.conf)
		acc.Distance.Add(u.dist)
	}
	acc.PosRows += u.posRows
	acc.Prev.Add(u.prev)
	acc.SelfRows += u.selfRows
	acc.Self.Add(u.self)
	acc.SinkRows += u.sinkRows
	acc.Sink.Add(u.sink)
	acc.DocSinkRows += u.docRows
	acc.DocSink.Add(u.doc)
	if cfg.grad {
		acc.GradExamples++
		acc.Importance.Add(math.Abs(u.imp))
		acc.GradRows += u.gradSkip
	}
	acc.RowSum.Add(u.rowSum)
	acc.AllowCells += u.allowCells
	acc.AllowZeros += u.allowZeros
	acc.AllowMass.Add(u.allowMass)
	if u.sumSeen {
		o := HeadAcc{SumSeen: true, SumMin: u.sumMin, SumMax: u.sumMax}
		acc.Merge(&o)
	}
	if cfg.doNaN {
		acc.NaNRows += u.nanRows
		if u.nanFirst.first(acc.NaNWorst) {
			acc.NaNWorst = u.nanFirst
		}
	}
	if cfg.doSum {
		acc.SumLowRows += u.sumLow
		acc.SumLowMax = max(acc.SumLowMax, u.sumLowMax)
		acc.SumBadRows += u.sumBad
		acc.SumBadDev.Add(u.badDev)
		if u.sumWorst.worse(acc.SumWorst) {
			acc.SumWorst = u.sumWorst
		}
	}
	if cfg.doNeg {
		acc.NegCells += u.negCells
		acc.NegRows += u.negRows
		acc.NegMass.Add(u.negMass)
	}
	for r := range u.leak {
		lu := &u.leak[r]
		la := &acc.Leaks[r]
		la.Mass.Add(lu.mass)
		la.Cells += lu.cells
		la.Rows += lu.rows
		la.Forbidden += lu.forb
		if lu.worst.worse(la.Worst) {
			la.Worst = lu.worst
		}
		if hs := w.hist[r]; hs != nil && w.hi[r] >= 0 {
			base := len(hs) - len(w.rr) // rules.MaxPos()
			if la.Offsets == nil {
				la.Offsets = map[int]int64{}
			}
			for i := w.lo[r]; i <= w.hi[r]; i++ {
				if hs[i] != 0 {
					la.Offsets[i-base] += hs[i]
					hs[i] = 0
				}
			}
		}
	}
}

// at is the index of the facts of head h's stored row r.
func (st *layerStore) at(h, r int) int { return h*st.rows + r }

// vrow returns the values of head h's stored row r.
func (st *layerStore) vrow(h, r int) []float32 {
	i := (h*st.rows + r) * st.keys
	return st.vals[i : i+st.keys]
}

// pairsAt sets the divergence of every pair of heads (pi[n], pj[n]) at
// row r of the store.
func (st *layerStore) pairsAt(r int, pi, pj []int) {
	for n := range pi {
		d, ok := st.js(pi[n], pj[n], r)
		if !ok {
			d = -1
		}
		st.div[n*st.rows+r] = d
	}
}

// pairSum returns the sum of pair n's divergences over the rows judged and
// finite in both heads, in row order, and the number of rows.
func (st *layerStore) pairSum(n int) (float64, int64) {
	var sum float64
	var cnt int64
	for _, d := range st.div[n*st.rows : (n+1)*st.rows] {
		if d >= 0 {
			sum += d
			cnt++
		}
	}
	return sum, cnt
}

// js returns the Jensen-Shannon divergence between heads i and j at stored
// row r, and false when either row is not judged and finite. JS(P, Q) =
// H(M) - (H(P) + H(Q))/2 with M = (P+Q)/2 (Clark et al. 2019, sec. 6);
// rows are used as exported, not renormalised.
func (st *layerStore) js(i, j, r int) (float64, bool) {
	a, b := st.at(i, r), st.at(j, r)
	if !st.ok[a] || !st.ok[b] {
		return 0, false
	}
	// only keys where either row is nonzero contribute to H(M)
	lo, hi := min(st.lo[a], st.lo[b]), max(st.hi[a], st.hi[b])
	if st.lo[a] < 0 {
		lo = st.lo[b]
	} else if st.lo[b] < 0 {
		lo = st.lo[a]
	}
	var hm float64
	if lo >= 0 {
		pa, pb := st.vrow(i, r)[lo:hi+1], st.vrow(j, r)[lo:hi+1]
		if st.neg[a] || st.neg[b] {
			hm = kernels.MlogmSumSlow(pa, pb)
		} else {
			hm = kernels.MlogmSum(pa, pb)
		}
	}
	return max(hm-0.5*(st.ent[a]+st.ent[b]), 0), true
}
