package trace

import (
	"context"
	"encoding/json"
	"errors"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"testing"

	"github.com/heed-dev/heed/loader"
)

// casesDir holds the exports and the numpy / scipy references that
// testdata/cases/gen_cases.py writes (expected.json).
const casesDir = "../../testdata/cases"

// refs are the parts of expected.json the explanations are checked against.
type refs struct {
	Stats struct {
		Rollout [][]float64          `json:"rollout_batch0"`
		Flow    map[string][]float64 `json:"flow_batch0"`
	} `json:"stats"`
	Importance struct {
		Relevance [][]float64 `json:"relevance_file0_batch0"`
	} `json:"importance"`
	EncDec struct {
		Target    int       `json:"target"`
		Relevance []float64 `json:"relevance_source"`
		Attention []float64 `json:"attention_source"`
	} `json:"encdec"`
}

func loadRefs(t *testing.T) *refs {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(casesDir, "expected.json"))
	if err != nil {
		t.Fatal(err)
	}
	var e struct {
		Refs refs `json:"refs"`
	}
	if err := json.Unmarshal(b, &e); err != nil {
		t.Fatal(err)
	}
	return &e.Refs
}

// near is a relative tolerance above 1 and an absolute one below.
func near(a, b, tol float64) bool {
	if math.IsNaN(a) || math.IsNaN(b) {
		return math.IsNaN(a) && math.IsNaN(b)
	}
	return math.Abs(a-b) <= tol*math.Max(1, math.Abs(b))
}

// The worked example of docs/methods.md (derived from Abnar & Zuidema 2020's
// definitions): A1 = [[1,0],[.5,.5]], A2 = [[1,0],[.2,.8]] give the rollout
// [[1,0],[0.325,0.675]] and the flow from top token 1 to the inputs [0.35, 0.75].
func TestRolloutFlowWorkedExample(t *testing.T) {
	layers := func() [][]float64 {
		l := [][]float64{{1, 0, .5, .5}, {1, 0, .2, .8}}
		for _, m := range l {
			ResidualRows(m, 2)
		}
		return l
	}
	for q, want := range [][]float64{{1, 0}, {0.325, 0.675}} {
		got := RolloutRow(layers(), 2, q)
		for i := range want {
			if !near(got[i], want[i], 1e-12) {
				t.Errorf("rollout row %d = %v, want %v", q, got, want)
			}
		}
	}
	got, err := Flow(context.Background(), layers(), 2, 1)
	if err != nil {
		t.Fatal(err)
	}
	if !near(got[0], 0.35, 1e-12) || !near(got[1], 0.75, 1e-12) {
		t.Errorf("flow from top token 1 = %v, want [0.35 0.75]", got)
	}
}

func traceOf(t *testing.T, path string, opt Options) *Result {
	t.Helper()
	ex, err := loader.Open([]string{path}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	defer ex.Close()
	r, err := Trace(context.Background(), ex, opt)
	if err != nil {
		t.Fatal(err)
	}
	return r
}

// TestRolloutAgainstNumpy: rollout rows equal numpy's matrix product of the
// residual-augmented head means (gen_cases.py), and rows sum to 1; causal
// rollout has nothing above the diagonal.
func TestRolloutAgainstNumpy(t *testing.T) {
	ref := loadRefs(t).Stats.Rollout
	for q, want := range ref {
		r := traceOf(t, filepath.Join(casesDir, "stats.npz"), Options{Method: MethodRollout, Query: q})
		var sum float64
		for i, tok := range r.Tokens {
			sum += tok.Share
			if !near(tok.Share, want[i], 1e-6) {
				t.Errorf("rollout q%d token %d = %v, want %v (numpy)", q, i, tok.Share, want[i])
			}
			if i > q && tok.Share != 0 {
				t.Errorf("rollout q%d has mass %v above the diagonal at %d", q, tok.Share, i)
			}
		}
		if !near(sum, 1, 1e-9) || !r.Normalised {
			t.Errorf("rollout q%d sums to %v", q, sum)
		}
		if q == 0 && r.Tokens[0].Token == "" {
			t.Error("trace lost the tokens")
		}
	}
}

// TestFlowAgainstScipy: attention flow equals scipy.sparse.csgraph.maximum_flow
// on the same graph with capacities scaled to integers by 1e6 (so within
// about edges/1e6).
func TestFlowAgainstScipy(t *testing.T) {
	for qs, want := range loadRefs(t).Stats.Flow {
		q, _ := strconv.Atoi(qs)
		r := traceOf(t, filepath.Join(casesDir, "stats.npz"), Options{Method: MethodFlow, Query: q})
		for i, tok := range r.Tokens {
			if math.Abs(tok.Share-want[i]) > 2e-4 {
				t.Errorf("flow q%d token %d = %v, want %v (scipy maximum_flow)", q, i, tok.Share, want[i])
			}
		}
		if r.Normalised {
			t.Error("flow says it is normalised")
		}
	}
}

func TestFlowLimit(t *testing.T) {
	n := 600
	layers := [][]float64{make([]float64, n*n)}
	_, err := Flow(context.Background(), layers, n, 0)
	var big *FlowTooLargeError
	if !errors.As(err, &big) || big.Layers != 1 || big.Positions != n || big.Work != int64(n)*int64(n)*int64(n) {
		t.Fatalf("flow beyond the limit: err = %v, want a *FlowTooLargeError of 1 layer x %d positions", err, n)
	}
}

// TestRelevanceDecoder: Chefer et al. (2021)'s self-attention rule from the
// exported A and G, against gen_cases.py's numpy version of the same rules;
// heed reports row q of R less R's identity start (1 at q itself).
func TestRelevanceDecoder(t *testing.T) {
	ref := loadRefs(t).Importance.Relevance
	for q, want := range ref {
		r := traceOf(t, filepath.Join(casesDir, "importance", "ex0.npz"), Options{Method: MethodGrad, Query: q})
		for i, tok := range r.Tokens {
			w := want[i]
			if i == q {
				w-- // the identity R starts from
			}
			if !near(tok.Share, w, 1e-6) {
				t.Errorf("relevance q%d token %d = %v, want %v (numpy's R less I)", q, i, tok.Share, w)
			}
		}
	}
}

// TestRelevanceEncoderDecoder: a target position explained by source tokens
// through cross-attention (Chefer et al. 2021, encoder-decoder rules), with
// gradients and with attention only (rollout method on a cross block).
func TestRelevanceEncoderDecoder(t *testing.T) {
	ref := loadRefs(t).EncDec
	path := filepath.Join(casesDir, "encdec_grad.npz")
	for _, c := range []struct {
		m    Method
		want []float64
	}{{MethodGrad, ref.Relevance}, {MethodRollout, ref.Attention}} {
		r := traceOf(t, path, Options{Method: c.m, Query: ref.Target})
		if r.Block != "cross" || r.Side != "source" || len(r.Tokens) != len(c.want) {
			t.Fatalf("%s: block %s side %s, %d tokens", c.m, r.Block, r.Side, len(r.Tokens))
		}
		for i, tok := range r.Tokens {
			if !near(tok.Share, c.want[i], 1e-6) {
				t.Errorf("%s: source token %d = %v, want %v", c.m, i, tok.Share, c.want[i])
			}
		}
	}
	set, _ := loader.OpenSet([]string{path}, loader.NewOptions())
	ex, _ := set.Open(0)
	defer ex.Close()
	if _, err := Trace(context.Background(), ex, Options{Method: MethodFlow, Query: 0}); !errors.Is(err, ErrFlowCross) {
		t.Errorf("flow through cross-attention: err = %v, want ErrFlowCross", err)
	}
	if _, err := Trace(context.Background(), ex, Options{Query: 99}); err == nil {
		t.Error("query out of range: no error")
	}
}

// The streamed rows (one layer at a time, top down) equal the plain
// products over every layer's matrix at once, bit for bit: same sums in the
// same order.
func TestStreamRowMatchesFullProduct(t *testing.T) {
	for _, tc := range []struct {
		file string
		grad bool
	}{
		{filepath.Join(casesDir, "stats.npz"), false},
		{filepath.Join(casesDir, "importance", "ex0.npz"), false},
		{filepath.Join(casesDir, "importance", "ex0.npz"), true},
	} {
		ex, err := loader.Open([]string{tc.file}, loader.NewOptions())
		if err != nil {
			t.Fatal(err)
		}
		blk := defaultBlock(ex)
		n := blk.Keys
		mats, err := layerAbar(blk, 0, tc.grad)
		if err != nil {
			t.Fatal(err)
		}
		if !tc.grad {
			for _, m := range mats {
				ResidualRows(m, n)
			}
		}
		for q := 0; q < blk.Queries; q++ {
			var want []float64
			if tc.grad {
				want = SelfRelevanceRow(mats, n, q)
			} else {
				want = RolloutRow(mats, n, q)
			}
			got, err := streamRow(blk, 0, q, tc.grad)
			if err != nil {
				t.Fatal(err)
			}
			for k := range want {
				if got[k] != want[k] {
					t.Fatalf("%s grad=%v q%d k%d: streamed %v, full product %v", tc.file, tc.grad, q, k, got[k], want[k])
				}
			}
		}
		ex.Close()
	}
}

// The head mean through the stored float16 patterns equals the plain loop
// over converted heads bit for bit (documents_good.npz is float16).
func TestRawMeanMatchesPlainLoop(t *testing.T) {
	ex, err := loader.Open([]string{filepath.Join(casesDir, "documents_good.npz")}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	defer ex.Close()
	blk := ex.Blocks[0]
	n := blk.Queries * blk.Keys
	if dt, err := blk.ReadRaw16(0, 0, 0, make([]uint16, n)); err != nil || dt != loader.Float16 {
		t.Fatalf("the fixture is not read as float16 patterns: %v %v", dt, err)
	}
	lb := layerBufs{split: 7} // split even these small heads over the processors
	for b := 0; b < blk.Batch; b++ {
		for l := 0; l < blk.Layers; l++ {
			want, err := headMean(blk, l, b, make([]float32, n))
			if err != nil {
				t.Fatal(err)
			}
			got, err := lb.layer(blk, l, b, false)
			if err != nil {
				t.Fatal(err)
			}
			for i := range want {
				if got[i] != want[i] {
					t.Fatalf("batch %d layer %d cell %d: %v, plain loop %v", b, l, i, got[i], want[i])
				}
			}
		}
	}
}

// The layer matrices read a head ahead on a second goroutine equal the plain
// loops over the heads (headMean, GradAbar) bit for bit.
func TestLayerMatchesPlainLoops(t *testing.T) {
	ex, err := loader.Open([]string{filepath.Join(casesDir, "importance", "ex0.npz")}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	defer ex.Close()
	blk := defaultBlock(ex)
	n := blk.Queries * blk.Keys
	var lb layerBufs
	for l := 0; l < blk.Layers; l++ {
		want, err := headMean(blk, l, 0, make([]float32, n))
		if err != nil {
			t.Fatal(err)
		}
		as, gs := make([][]float32, blk.Heads), make([][]float32, blk.Heads)
		for h := range as {
			as[h], gs[h] = make([]float32, n), make([]float32, n)
			if err := blk.ReadAttn(l, 0, h, as[h]); err != nil {
				t.Fatal(err)
			}
			if err := blk.ReadGrad(l, 0, h, gs[h]); err != nil {
				t.Fatal(err)
			}
		}
		wantG := make([]float64, n)
		GradAbar(wantG, as, gs)
		for _, grad := range []bool{false, true} {
			got, err := lb.layer(blk, l, 0, grad)
			if err != nil {
				t.Fatal(err)
			}
			w := want
			if grad {
				w = wantG
			}
			for i := range w {
				if got[i] != w[i] {
					t.Fatalf("layer %d grad=%v cell %d: %v, plain loop %v", l, grad, i, got[i], w[i])
				}
			}
		}
	}
}

// headMean, the plain loop the head mean of rollout is tested against, reads every head of (layer, batch) and returns their mean as float64.
func headMean(blk *loader.Block, layer, batch int, buf []float32) ([]float64, error) {
	out := make([]float64, blk.Queries*blk.Keys)
	for h := 0; h < blk.Heads; h++ {
		if err := blk.ReadAttn(layer, batch, h, buf); err != nil {
			return nil, err
		}
		for i, x := range buf {
			out[i] += float64(x)
		}
	}
	for i := range out {
		out[i] /= float64(blk.Heads)
	}
	return out, nil
}
