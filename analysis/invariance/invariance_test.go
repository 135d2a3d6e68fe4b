package invariance

import (
	"context"
	"encoding/json"
	"errors"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"strings"
	"testing"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/internal/testpy"
	"github.com/heed-dev/heed/loader"
)

// The fixtures in testdata/invariance are written by gen.py with PyTorch
// 1.13 (torch.nn.MultiheadAttention with need_weights=False, layer outputs
// caught by forward hooks). cases.json records what each model got wrong and
// where the differences must appear; gen.py derives that from the mask it
// built and asserts it against the differences PyTorch itself produced, so
// these tests compare heed with PyTorch, not with heed.

const invDir = "../../testdata/invariance"

type invCase struct {
	A, B     string
	Block    string
	From     []int
	Clean    bool
	BadInput string `json:"bad_input"`
	Broken   *struct {
		Layer, Head, Ahead int
		What               string
	}
	Expect struct {
		FirstLayer int     `json:"first_layer"`
		Layers     []int   `json:"layers"`
		Positions  [][]int `json:"positions"`
		Earliest   []int   `json:"earliest"`
		Heads      []struct {
			Layer, Head int
			Rows        [][]int
		}
	}
	TorchMaxRel float64 `json:"torch_max_rel"`
}

func invCases(t *testing.T) map[string]invCase {
	t.Helper()
	raw, err := os.ReadFile(filepath.Join(invDir, "cases.json"))
	if err != nil {
		t.Fatal(err)
	}
	var m struct{ Cases map[string]invCase }
	if err := json.Unmarshal(raw, &m); err != nil {
		t.Fatal(err)
	}
	return m.Cases
}

func openPair(t *testing.T, c invCase) (*loader.Export, *loader.Export) {
	t.Helper()
	a, err := loader.Open([]string{filepath.Join(invDir, c.A)}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { a.Close() })
	b, err := loader.Open([]string{filepath.Join(invDir, c.B)}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { b.Close() })
	return a, b
}

func runCase(t *testing.T, c invCase, opt Options) *Result {
	t.Helper()
	a, b := openPair(t, c)
	res, err := Check(context.Background(), a, b, opt)
	if err != nil {
		t.Fatalf("CheckInvariance(%s, %s) = %v", c.A, c.B, err)
	}
	return res
}

func findingOf(res *Result, block string) *Finding {
	for i := range res.Findings {
		if res.Findings[i].Block == block {
			return &res.Findings[i]
		}
	}
	return nil
}

func TestInvarianceCorrectModelIsClean(t *testing.T) {
	for _, name := range []string{"causal", "prefix"} {
		c := invCases(t)[name]
		res := runCase(t, c, NewOptions())
		if !res.Clean() || len(res.Findings) != 0 || len(res.Diagnoses) != 0 {
			t.Errorf("%s: Clean() = %v, findings %+v, diagnoses %+v; want clean (cases.json: torch found no change)", name, res.Clean(), res.Findings, res.Diagnoses)
		}
		if !reflect.DeepEqual(res.From, c.From) || res.Side != "target" {
			t.Errorf("%s: From = %v on %q, want %v on target", name, res.From, res.Side, c.From)
		}
		if len(res.Parts) != 2 || res.Parts[0].Block != c.Block || res.Parts[1].Block != "logits" {
			t.Fatalf("%s: parts %v, want %s and logits", name, res.Parts, c.Block)
		}
		p := res.Parts[0]
		if p.Tol != Tol(loader.Float32) || p.DType != loader.Float32 {
			t.Errorf("%s: tol %v dtype %v, want the f32 default", name, p.Tol, p.DType)
		}
		_, rel := p.Max(0)
		if name == "causal" && rel != 0 {
			// Same shapes: PyTorch's passes agree bit for bit before P
			// (gen.py asserts torch.equal), so heed must see exactly 0.
			t.Errorf("causal: max rel %v, want 0", rel)
		}
		if name == "prefix" {
			// Other shapes: rounding differs; heed's measure must be of the
			// order gen.py measured with torch (same formula, float64 here).
			if rel == 0 || rel > 10*c.TorchMaxRel || rel > p.Tol/10 {
				t.Errorf("prefix: max rel %v; torch measured %v, tolerance %v", rel, c.TorchMaxRel, p.Tol)
			}
		}
	}
}

func TestInvarianceNamesTheLeakingLayer(t *testing.T) {
	for _, name := range []string{"leak", "leak_attn"} {
		c := invCases(t)[name]
		res := runCase(t, c, NewOptions())
		if res.Clean() {
			t.Fatalf("%s: clean, want the leak of %s", name, c.Broken.What)
		}
		f := findingOf(res, c.Block)
		if f == nil {
			t.Fatalf("%s: no finding for %s: %+v", name, c.Block, res.Findings)
		}
		if f.Rule != analysis.RuleInvariance || f.Rule.String() != "invariance" {
			t.Errorf("%s: rule %v", name, f.Rule)
		}
		if f.Layers[0] != c.Broken.Layer || !reflect.DeepEqual(f.Layers, c.Expect.Layers) {
			t.Errorf("%s: layers %v, want %v (first = the broken layer %d)", name, f.Layers, c.Expect.Layers, c.Broken.Layer)
		}
		if !reflect.DeepEqual(f.Batches, []int{0, 1}) || !reflect.DeepEqual(f.Positions, c.Expect.Positions) || !reflect.DeepEqual(f.From, c.From) {
			t.Errorf("%s: batches %v positions %v from %v, want [0 1] %v %v", name, f.Batches, f.Positions, f.From, c.Expect.Positions, c.From)
		}
		p := res.Parts[0]
		for b, want := range c.Expect.Earliest {
			if got := p.FirstLayer(b); got != c.Broken.Layer {
				t.Errorf("%s: FirstLayer(%d) = %d, want %d", name, b, got, c.Broken.Layer)
			}
			if got := p.Changed(c.Broken.Layer, b); len(got) == 0 || got[0] != want {
				t.Errorf("%s: item %d earliest changed %v, want %d", name, b, got, want)
			}
		}
		// The logits change at the same positions, and are a finding too.
		if lf := findingOf(res, "logits"); lf == nil || !reflect.DeepEqual(lf.Positions, c.Expect.Positions) {
			t.Errorf("%s: logits finding %+v, want positions %v", name, lf, c.Expect.Positions)
		}
		// The words of this diagnosis are checked in internal/prose
		// (TestInvarianceWords): "position 4 of layer 2 changed when only
		// tokens from 6 on were changed", "... up to q+2".
		d := res.Diagnoses[0]
		if d.Pattern != analysis.PatReadsFuture || d.Rule != analysis.RuleInvariance || d.Facts.Inv == nil || d.Facts.Inv.From != 6 || d.At.Query != 4 || d.Layers[0] != 2 {
			t.Errorf("%s: diagnosis %q at %+v facts %+v, want reads_future at position 4 of layer 2 with P = 6", name, d.Pattern, d.At, d.Facts.Inv)
		}
		if d.Value != float64(c.Broken.Layer) || d.At.Layer != c.Broken.Layer || d.At.Query != c.Expect.Earliest[0] {
			t.Errorf("%s: diagnosis at %+v value %v", name, d.At, d.Value)
		}
		if d.Facts.Inv.Reach != 2 || d.Facts.Inv.All {
			t.Errorf("%s: reach %d (all %v), want 2: the generator's mask is off by %d", name, d.Facts.Inv.Reach, d.Facts.Inv.All, c.Broken.Ahead)
		}
		for _, d := range res.Diagnoses {
			if d.Block == "logits" {
				t.Errorf("%s: a logits diagnosis %q beside the block's", name, d.Pattern)
			}
		}
	}
}

func TestInvarianceHeads(t *testing.T) {
	c := invCases(t)["leak_attn"]
	res := runCase(t, c, NewOptions())
	type hk struct{ l, h int }
	got := map[hk][][]int{}
	for _, h := range res.Heads {
		k := hk{h.Layer, h.Head}
		for len(got[k]) <= h.Batch {
			got[k] = append(got[k], nil)
		}
		got[k][h.Batch] = h.Rows
	}
	want := map[hk][][]int{}
	for _, h := range c.Expect.Heads {
		want[hk{h.Layer, h.Head}] = h.Rows
	}
	if !reflect.DeepEqual(got, want) {
		t.Errorf("heads %v, want %v (cases.json, from torch)", got, want)
	}
	f := findingOf(res, c.Block)
	if f == nil || !reflect.DeepEqual(f.Heads, []int{c.Broken.Head}) {
		t.Fatalf("finding heads %+v, want [%d]", f, c.Broken.Head)
	}
	var hd *analysis.Diagnosis
	for i := range res.Diagnoses {
		if res.Diagnoses[i].Pattern == analysis.PatFutureHeads {
			hd = &res.Diagnoses[i]
		}
	}
	// its words, "at layer 2 only head 1 of 4 changed their rows before P",
	// are checked in internal/prose (TestInvarianceWords)
	if hd == nil || !reflect.DeepEqual(hd.Heads, []int{1}) || hd.Layers[0] != 2 || hd.Value != 2 || hd.Facts.Inv == nil || hd.Facts.Inv.HeadTotal != 4 {
		t.Errorf("heads diagnosis %+v", hd)
	}
	// Without attention (leak_*) there is no heads diagnosis and no heads.
	res = runCase(t, invCases(t)["leak"], NewOptions())
	if len(res.Heads) != 0 || len(findingOf(res, "decoder").Heads) != 0 {
		t.Errorf("leak without attention: heads %v", res.Heads)
	}
}

func TestInvarianceEncoderIsNotCausal(t *testing.T) {
	c := invCases(t)["encoder"]
	res := runCase(t, c, NewOptions())
	f := findingOf(res, "encoder")
	if f == nil || f.Layers[0] != 0 || !reflect.DeepEqual(f.Positions, c.Expect.Positions) || !reflect.DeepEqual(f.Layers, c.Expect.Layers) {
		t.Fatalf("encoder finding %+v, want every position before P at layers %v: %v", f, c.Expect.Layers, c.Expect.Positions)
	}
	d := res.Diagnoses[0]
	// its words ("not causal", "declares it bidirectional") are checked in
	// internal/prose (TestInvarianceWords)
	if d.Pattern != analysis.PatNotCausal || d.Facts.Inv == nil || !d.Facts.Inv.Bidirectional {
		t.Errorf("encoder diagnosis %q: %+v", d.Pattern, d.Facts.Inv)
	}
}

func TestInvarianceFrom(t *testing.T) {
	cs := invCases(t)
	// P = 3 for both items: the correct model is clean before 3.
	opt := NewOptions()
	opt.From = 3
	res := runCase(t, cs["causal"], opt)
	if !res.Clean() || res.Side != "" || !reflect.DeepEqual(res.From, []int{3, 3}) {
		t.Errorf("causal --from 3: clean %v side %q from %v", res.Clean(), res.Side, res.From)
	}
	// P = 6 for both: item 1's tokens change from 7 on, its leak reaches 5
	// and 6 (cases.json), so before 6 only position 5 is left.
	opt.From = 6
	res = runCase(t, cs["leak"], opt)
	f := findingOf(res, "decoder")
	if f == nil || !reflect.DeepEqual(f.Positions, [][]int{{4, 5}, {5}}) {
		t.Errorf("leak --from 6: finding %+v, want positions [[4 5] [5]]", f)
	}
	// A larger tolerance than the leak's largest difference hides it.
	opt = NewOptions()
	opt.Tol = 0.5
	if res := runCase(t, cs["leak"], opt); !res.Clean() {
		t.Errorf("leak --tol 0.5: findings %+v", res.Findings)
	}
}

func TestInvarianceBadInput(t *testing.T) {
	cs := invCases(t)
	c := cs["mismatch"]
	a, b := openPair(t, c)
	_, err := Check(context.Background(), a, b, NewOptions())
	if err == nil || !strings.Contains(err.Error(), "decoder/out") || !strings.Contains(err.Error(), "layer 4") || !strings.Contains(err.Error(), "layer 3") {
		t.Errorf("mismatch: err = %v, want a shape error naming decoder/out and both layer counts (%s)", err, c.BadInput)
	}
	// The same export twice: nothing changed, nothing tells P.
	a, _ = openPair(t, cs["causal"])
	_, err = Check(context.Background(), a, a, NewOptions())
	if err == nil || !strings.Contains(err.Error(), "tokens are the same") {
		t.Errorf("same export: err = %v", err)
	}
	// A decoder against an encoder: blocks do not pair up.
	a, b = openPair(t, invCase{A: "causal_a.npz", B: "encoder_b.npz"})
	if _, err := Check(context.Background(), a, b, NewOptions()); err == nil || !strings.Contains(err.Error(), "decoder/out: in") {
		t.Errorf("decoder vs encoder: err = %v", err)
	}
	// Cancelled.
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	a, b = openPair(t, cs["causal"])
	if _, err := Check(ctx, a, b, NewOptions()); !errors.Is(err, context.Canceled) {
		t.Errorf("cancelled: err = %v", err)
	}
}

// TestInvarianceFixturesMatchTorch regenerates the fixtures with PyTorch and
// compares them with the committed files (gen.py --check).
func TestInvarianceFixturesMatchTorch(t *testing.T) {
	py := pythonWithTorch(t)
	cmd := exec.Command(py, filepath.Join(invDir, "gen.py"), "--check")
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("gen.py --check: %v\n%s", err, out)
	}
}

func pythonWithTorch(t *testing.T) string {
	t.Helper()
	return testpy.Require(t, "torch", "numpy")
}

func TestInvarianceDiff(t *testing.T) {
	nan, inf := math.NaN(), math.Inf(1)
	for _, c := range []struct{ a, b, scale, abs, rel float64 }{
		{1, 1, 1, 0, 0},
		{1.5, 1, 1, 0.5, 0.25},           // |a-b| / (|b| + rms)
		{0, 1e-3, 0, 1e-3, 1},            // no scale: purely relative
		{nan, nan, 1, 0, 0},              // NaN on both sides: the same
		{nan, 1, 1, inf, inf},            // NaN on one side: changed
		{inf, inf, 1, 0, 0},              // equal infinities
		{inf, -inf, 1, inf, inf},         // opposite infinities
		{0, 0, rmsFloor, 0, 0},           // zeros agree
		{1e-20, 0, rmsFloor, 1e-20, inf}, // anything against an all-zero layer
	} {
		abs, rel := diff(c.a, c.b, c.scale)
		if abs != c.abs || (rel != c.rel && !(math.IsInf(c.rel, 1) && rel > 1e9)) {
			t.Errorf("diff(%v, %v, %v) = %v, %v, want %v, %v", c.a, c.b, c.scale, abs, rel, c.abs, c.rel)
		}
	}
}

func TestInvarianceTol(t *testing.T) {
	// Epsilons (IEEE 754 binary16, binary32; bfloat16 has 8 significand
	// bits): each tolerance is several times the rounding measured by
	// calibrate.py (1.8 epsilons), and below the smallest leak of the
	// fixtures (6.6e-3 relative in f32).
	for _, c := range []struct {
		d   loader.DType
		eps float64
	}{{loader.Float32, 0x1p-23}, {loader.Float64, 0x1p-23}, {loader.Float16, 0x1p-10}, {loader.BFloat16, 0x1p-7}} {
		tol := Tol(c.d)
		if tol < 4*1.8*c.eps {
			t.Errorf("InvarianceTol(%v) = %v, want >= 4 x 1.8 eps = %v", c.d, tol, 4*1.8*c.eps)
		}
	}
	if Tol(loader.Float32) >= 6.6e-3 {
		t.Errorf("f32 tolerance %v would hide the fixture's leak", Tol(loader.Float32))
	}
}

func TestInvarianceSideFrom(t *testing.T) {
	tok := func(rows ...string) *loader.Side {
		s := &loader.Side{}
		for _, r := range rows {
			s.Tokens = append(s.Tokens, strings.Fields(r))
		}
		s.Len = len(s.Tokens[0])
		return s
	}
	for _, c := range []struct {
		a, b    *loader.Side
		batch   int
		want    []int
		changed bool
	}{
		{tok("x y z w"), tok("x y q w"), 1, []int{2}, true},
		{tok("x y z w", "a b c d"), tok("x y z q", "a b c d"), 2, []int{3, 4}, true}, // item 1 unchanged: whole row judged
		{tok("x y z w"), tok("x y"), 1, []int{2}, true},                              // B shorter: P = its length
		{tok("x y z w"), tok("x y z w"), 2, []int{4, 4}, false},                      // shared [seq] tokens, no change
	} {
		got, ch := sideFrom(c.a, c.b, c.batch)
		if !reflect.DeepEqual(got, c.want) || ch != c.changed {
			t.Errorf("sideFrom(%v, %v) = %v, %v, want %v, %v", c.a.Tokens, c.b.Tokens, got, ch, c.want, c.changed)
		}
	}
}

// memPair builds two in-memory exports of one causal block: attention
// (f32, uniform causal rows: the same in A and B), activations outA / outB
// of dtype d with shape [1, 1, n, 2], and tokens that differ from `from` on.
func memPair(t *testing.T, d loader.DType, n, from int, outA, outB []float64, valid []float64) (*loader.Export, *loader.Export) {
	t.Helper()
	attn := make([]float64, n*n)
	for q := 0; q < n; q++ {
		for k := 0; k <= q; k++ {
			attn[q*n+k] = 1 / float64(q+1)
		}
	}
	mk := func(out []float64, changed bool) *loader.Export {
		toks := make([]string, n)
		for i := range toks {
			toks[i] = "w" + string(rune('a'+i))
			if changed && i >= from {
				toks[i] = "v" + string(rune('a'+i))
			}
		}
		arrs := []loader.Array{
			loader.NewMemArray("decoder/attn", loader.Float32, []int{1, 1, 1, n, n}, attn),
			loader.NewMemArray("decoder/out", d, []int{1, 1, n, 2}, out),
			loader.NewMemStrings("tokens/target", []int{1, n}, toks),
		}
		if valid != nil {
			arrs = append(arrs, loader.NewMemArray("valid/target", loader.Bool, []int{1, n}, valid))
		}
		ex, err := loader.Assemble(arrs, `{"format":"heed-export/1","blocks":{"decoder":{"kind":"causal","query":"target","key":"target"}}}`, loader.NewOptions())
		if err != nil {
			t.Fatal(err)
		}
		return ex
	}
	return mk(outA, false), mk(outB, true)
}

func TestInvarianceOutDType(t *testing.T) {
	// Activations stored in f16 beside f32 attention: the f16 tolerance
	// applies to them. Position 1 differs by 2 f16 ulps of 1.0 (2^-9):
	// rounding for f16, a change for f32.
	outA := []float64{1, 1, 1, 1, 0.5, 0.5}
	outB := []float64{1, 1, 1 + 0x1p-9, 1, 0.7, 0.1}
	a, b := memPair(t, loader.Float16, 3, 2, outA, outB, nil)
	res, err := Check(context.Background(), a, b, NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	p := res.Parts[0]
	if p.DType != loader.Float16 || p.Tol != Tol(loader.Float16) || !res.Clean() {
		t.Errorf("f16 out: dtype %v tol %v clean %v (rel %v)", p.DType, p.Tol, res.Clean(), p.Rel[0][0])
	}
	opt := NewOptions()
	opt.Tol = 1e-5
	if res, _ := Check(context.Background(), a, b, opt); res.Clean() || !reflect.DeepEqual(res.Findings[0].Positions, [][]int{{1}}) {
		t.Errorf("f16 out with --tol 1e-5: want position 1 changed, got %+v", res.Findings)
	}
}

func TestInvariancePaddingNotJudged(t *testing.T) {
	// Position 0 is padding (valid = 0): NaN on one side there is not
	// judged; position 1 is real and changed.
	nan := math.NaN()
	outA := []float64{nan, nan, 1, 2, 3, 4, 5, 6}
	outB := []float64{0, 0, 1, 2.5, 3, 4, 9, 9}
	a, b := memPair(t, loader.Float32, 4, 3, outA, outB, []float64{0, 1, 1, 1})
	res, err := Check(context.Background(), a, b, NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	f := findingOf(res, "decoder")
	if f == nil || !reflect.DeepEqual(f.Positions, [][]int{{1}}) || f.JudgedRows != 2 {
		t.Fatalf("padding: finding %+v, want position 1 only, 2 judged cells", f)
	}
	if _, err := json.Marshal(res.Findings); err != nil {
		t.Errorf("findings do not encode: %v", err)
	}
	// Without padding the NaN at position 0 is a change, encoded finitely.
	a, b = memPair(t, loader.Float32, 4, 3, outA, outB, nil)
	res, _ = Check(context.Background(), a, b, NewOptions())
	if f := findingOf(res, "decoder"); f == nil || !reflect.DeepEqual(f.Positions, [][]int{{0, 1}}) || f.MaxRel != math.MaxFloat64 {
		t.Errorf("NaN on one side: finding %+v", f)
	} else if _, err := json.Marshal(res.Findings); err != nil {
		t.Errorf("findings with NaN do not encode: %v", err)
	}
}

// encDec builds an encoder-decoder-shaped export: encoder/out on side
// source, decoder/out on side target, both [1, 1, 3, 2] of value v.
func encDec(t *testing.T, src, tgt string, v float64) *loader.Export {
	t.Helper()
	vals := make([]float64, 6)
	for i := range vals {
		vals[i] = v
	}
	ex, err := loader.Assemble([]loader.Array{
		loader.NewMemArray("encoder/out", loader.Float32, []int{1, 1, 3, 2}, vals),
		loader.NewMemArray("decoder/out", loader.Float32, []int{1, 1, 3, 2}, vals),
		loader.NewMemStrings("tokens/source", []int{3}, strings.Fields(src)),
		loader.NewMemStrings("tokens/target", []int{3}, strings.Fields(tgt)),
	}, `{"format":"heed-export/1","blocks":{"encoder":{"kind":"bidirectional","query":"source","key":"source"},"decoder":{"kind":"causal","query":"target","key":"target"}}}`, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	return ex
}

func TestInvarianceSides(t *testing.T) {
	// Only the target changed: the decoder is checked from P = 1; the
	// encoder, on the unchanged source, is skipped with a note.
	res, err := Check(context.Background(), encDec(t, "a b c", "x y z", 1), encDec(t, "a b c", "x q z", 2), NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	if res.Side != "target" || !reflect.DeepEqual(res.From, []int{1}) || len(res.Parts) != 1 || res.Parts[0].Block != "decoder" ||
		len(res.Notes) != 1 || !strings.Contains(res.Notes[0], "encoder/out") {
		t.Errorf("target changed: side %q from %v parts %d notes %q", res.Side, res.From, len(res.Parts), res.Notes)
	}
	if f := findingOf(res, "decoder"); f == nil || !reflect.DeepEqual(f.Positions, [][]int{{0}}) {
		t.Errorf("decoder finding %+v, want position 0", f)
	}
	// Both sides changed: P is ambiguous without --from.
	_, err = Check(context.Background(), encDec(t, "a b c", "x y z", 1), encDec(t, "a q c", "x q z", 1), NewOptions())
	if err == nil || !strings.Contains(err.Error(), "more than one side") {
		t.Errorf("both sides changed: err = %v", err)
	}
	opt := NewOptions()
	opt.From = 1
	res, err = Check(context.Background(), encDec(t, "a b c", "x y z", 1), encDec(t, "a q c", "x q z", 1), opt)
	if err != nil || !res.Clean() || len(res.Parts) != 2 {
		t.Errorf("both sides changed, --from 1: err %v, parts %d", err, len(res.Parts))
	}
}

func TestInvarianceRoundingHint(t *testing.T) {
	// Small differences at scattered positions (1 and 3 of 5 before P), the
	// signature of reduced-precision rounding rather than a window leak.
	outA := []float64{1, 1, 1, 1, 1, 1, 1, 1, 1, 1, 1, 1}
	outB := []float64{1, 1, 1.002, 1, 1, 1, 1, 0.998, 1, 1, 5, 5}
	a, b := memPair(t, loader.Float32, 6, 5, outA, outB, nil)
	res, err := Check(context.Background(), a, b, NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	var pats []string
	for _, d := range res.Diagnoses {
		pats = append(pats, d.Pattern)
	}
	// the tolerance to try again with is bfloat16's; internal/prose words
	// it as "--tol 0.06" (TestRoundingWords)
	if !reflect.DeepEqual(pats, []string{analysis.PatReadsFuture, analysis.PatRoundingLevel}) || res.Diagnoses[1].Facts.Inv == nil || res.Diagnoses[1].Facts.Inv.Suggest != 0.06 {
		t.Errorf("patterns %v, want reads_future and rounding_level; %+v", pats, res.Diagnoses)
	}
	// A leak that ends at P (the last positions before it) gets no hint.
	outB = []float64{1, 1, 1, 1, 1, 1, 1, 1, 1.002, 1, 5, 5}
	a, b = memPair(t, loader.Float32, 6, 5, outA, outB, nil)
	res, _ = Check(context.Background(), a, b, NewOptions())
	for _, d := range res.Diagnoses {
		if d.Pattern == analysis.PatRoundingLevel {
			t.Errorf("contiguous change up to P-1 got a rounding hint: %+v", d.Facts.Inv)
		}
	}
}
