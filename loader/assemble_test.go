package loader

import (
	"errors"
	"reflect"
	"strings"
	"testing"
)

// The expectations below follow the heed-export/1 convention as the README
// states it (names, axes by rank, kinds, KV-cache query offset). Values are
// built from a formula of their indices so every read can be checked.

func val(idx ...int) float64 {
	v := 0.0
	for _, i := range idx {
		v = v*16 + float64(i)
	}
	return v
}

// fill returns data for shape with each element = val(its indices).
func fill(shape []int) []float64 {
	n := prod(shape)
	out := make([]float64, n)
	idx := make([]int, len(shape))
	for i := 0; i < n; i++ {
		out[i] = val(idx...)
		for a := len(shape) - 1; a >= 0; a-- {
			idx[a]++
			if idx[a] < shape[a] {
				break
			}
			idx[a] = 0
		}
	}
	return out
}

func toks(n int) []string {
	s := make([]string, n)
	for i := range s {
		s[i] = string(rune('a' + i))
	}
	return s
}

func mustAssemble(t *testing.T, arrs []Array, meta string, opt Options) *Export {
	t.Helper()
	ex, err := Assemble(arrs, meta, opt)
	if err != nil {
		t.Fatalf("Assemble: %v", err)
	}
	return ex
}

func TestAssembleWhole5D(t *testing.T) {
	shape := []int{2, 3, 4, 5, 5} // layer batch head query key
	meta := `{"format":"heed-export/1","blocks":{"decoder":{"kind":"causal","query":"target","key":"target","window":3,"kv_heads":2}}}`
	ex := mustAssemble(t, []Array{
		NewMemArray("decoder/attn", Float32, shape, fill(shape)),
		NewMemArray("decoder/grad", Float32, shape, fill(shape)),
		NewMemStrings("tokens/target", []int{5}, toks(5)),
		NewMemArray("valid/target", Bool, []int{3, 5}, []float64{1, 1, 1, 1, 1, 0, 1, 1, 1, 1, 0, 0, 1, 1, 1}),
	}, meta, NewOptions())
	if ex.Format != "heed-export/1" {
		t.Errorf("Format = %q", ex.Format)
	}
	b := ex.Block("decoder")
	if b == nil {
		t.Fatal("no decoder block")
	}
	got := []int{b.Layers, b.Batch, b.Heads, b.Queries, b.Keys, b.Window, b.KVHeads, b.QueryOffset}
	if want := []int{2, 3, 4, 5, 5, 3, 2, 0}; !reflect.DeepEqual(got, want) {
		t.Errorf("dims = %v, want %v", got, want)
	}
	if b.Kind != KindCausal || b.QuerySide != "target" || b.KeySide != "target" || !b.HasGrad || b.HasAllow {
		t.Errorf("block = %+v", b)
	}
	dst := make([]float32, 25)
	for l := 0; l < 2; l++ {
		for bt := 0; bt < 3; bt++ {
			for h := 0; h < 4; h++ {
				if err := b.ReadAttn(l, bt, h, dst); err != nil {
					t.Fatal(err)
				}
				for q := 0; q < 5; q++ {
					for k := 0; k < 5; k++ {
						if w := float32(val(l, bt, h, q, k)); dst[q*5+k] != w {
							t.Fatalf("ReadAttn(%d,%d,%d)[%d,%d] = %v, want %v", l, bt, h, q, k, dst[q*5+k], w)
						}
					}
				}
			}
		}
	}
	if err := b.ReadGrad(1, 2, 3, dst); err != nil || dst[24] != float32(val(1, 2, 3, 4, 4)) {
		t.Errorf("ReadGrad = %v, %v", dst[24], err)
	}
	s := ex.Side("target")
	if s.Len != 5 || s.Token(2, 1) != "b" || s.IsValid(1, 0) || !s.IsValid(1, 3) || s.IsValid(2, 1) || !s.IsValid(0, 4) {
		t.Errorf("side = %+v", s)
	}
	if err := b.ReadAttn(2, 0, 0, dst); err == nil {
		t.Error("ReadAttn out of range: no error")
	}
	if err := b.ReadAttn(0, 0, 0, dst[:3]); err == nil {
		t.Error("ReadAttn short buffer: no error")
	}
}

func TestAssemblePerLayerTransposed(t *testing.T) {
	shape := []int{2, 3, 4} // head key query
	var arrs []Array
	for l := 0; l < 3; l++ {
		d := fill(shape)
		for i := range d {
			d[i] += float64(l) * 1000
		}
		arrs = append(arrs, NewMemArray("enc/attn/"+string(rune('0'+l)), Float32, shape, d))
	}
	meta := `{"blocks":{"enc":{"kind":"bidirectional","axes":"layer head key query"}}}`
	ex := mustAssemble(t, arrs, meta, NewOptions())
	b := ex.Block("enc")
	if b.Layers != 3 || b.Heads != 2 || b.Queries != 4 || b.Keys != 3 || b.Batch != 1 || b.Axes != "head key query" {
		t.Fatalf("block = %+v", b)
	}
	dst := make([]float32, 12)
	if err := b.ReadAttn(2, 0, 1, dst); err != nil {
		t.Fatal(err)
	}
	for q := 0; q < 4; q++ {
		for k := 0; k < 3; k++ {
			if w := float32(val(1, k, q) + 2000); dst[q*3+k] != w {
				t.Fatalf("[%d,%d] = %v, want %v", q, k, dst[q*3+k], w)
			}
		}
	}
}

func TestAssembleKVCacheDecode(t *testing.T) {
	shape := []int{1, 2, 1, 6} // layer head query key: one decode step over 6 cached keys
	ex := mustAssemble(t, []Array{
		NewMemArray("decoder/attn", BFloat16, shape, fill(shape)),
		NewMemStrings("tokens/target", []int{6}, toks(6)),
	}, `{"blocks":{"decoder":{"kind":"causal","query":"target","key":"target"}}}`, NewOptions())
	b := ex.Blocks[0]
	if b.QueryOffset != 5 || b.Queries != 1 || b.Keys != 6 {
		t.Errorf("QueryOffset %d Queries %d Keys %d", b.QueryOffset, b.Queries, b.Keys)
	}
}

func TestAssembleBare(t *testing.T) {
	ex := mustAssemble(t, []Array{NewMemArray("weights", Float64, []int{3, 2, 2}, fill([]int{3, 2, 2}))}, "", NewOptions())
	if len(ex.Blocks) != 1 || ex.Blocks[0].Name != "weights" || ex.Blocks[0].Heads != 3 || ex.Blocks[0].Kind != KindUnknown {
		t.Fatalf("blocks = %+v", ex.Blocks[0])
	}
	// Numbered bare arrays become the layers of one block; --kind applies.
	opt := NewOptions()
	opt.Kind = KindCausal
	ex = mustAssemble(t, []Array{
		NewMemArray("layer_1", Float32, []int{2, 3, 3}, fill([]int{2, 3, 3})),
		NewMemArray("layer_0", Float32, []int{2, 3, 3}, fill([]int{2, 3, 3})),
	}, "", opt)
	if len(ex.Blocks) != 1 || ex.Blocks[0].Name != "layer" || ex.Blocks[0].Layers != 2 || ex.Blocks[0].Kind != KindCausal {
		t.Fatalf("blocks = %+v", ex.Blocks)
	}
	// Head axis of length 1: warning.
	ex = mustAssemble(t, []Array{NewMemArray("attn", Float32, []int{1, 3, 3}, fill([]int{1, 3, 3}))}, "", NewOptions())
	if !strings.Contains(strings.Join(ex.Warnings, "\n"), "averaged") {
		t.Errorf("Warnings = %q", ex.Warnings)
	}
}

func TestAssembleOutOnly(t *testing.T) {
	ex := mustAssemble(t, []Array{NewMemArray("dec/out", Float32, []int{3, 2, 4, 5}, fill([]int{3, 2, 4, 5}))}, "", NewOptions())
	b := ex.Blocks[0]
	if b.Layers != 0 || b.OutLayers != 3 || b.Batch != 2 || b.Positions != 4 || b.Features != 5 {
		t.Fatalf("block = %+v", b)
	}
	dst := make([]float32, 20)
	if err := b.ReadOut(2, 1, dst); err != nil || dst[19] != float32(val(2, 1, 3, 4)) {
		t.Errorf("ReadOut = %v %v", dst[19], err)
	}
}

func TestAssembleAllow(t *testing.T) {
	shape := []int{2, 2, 3, 3} // batch head query key (per-layer form: one layer)
	allow := []float64{1, 0, 0, 1, 1, 0, 1, 1, 1}
	ex := mustAssemble(t, []Array{
		NewMemArray("d/attn/0", Float32, shape, fill(shape)),
		NewMemArray("d/allow", Bool, []int{3, 3}, allow),
	}, "", NewOptions())
	b := ex.Blocks[0]
	if !b.HasAllow || b.Batch != 2 {
		t.Fatalf("block = %+v", b)
	}
	got := make([]bool, 9)
	if err := b.ReadAllow(1, 1, got); err != nil {
		t.Fatal(err)
	}
	for i, v := range allow {
		if got[i] != (v != 0) {
			t.Fatalf("ReadAllow[%d] = %v", i, got[i])
		}
	}
	// additive float bias, per batch item: [batch, 1, 1, key]
	bias := []float64{0, 0, -1e9, 0, 0, 0}
	ex = mustAssemble(t, []Array{
		NewMemArray("d/attn/0", Float32, shape, fill(shape)),
		NewMemArray("d/allow", Float32, []int{2, 1, 1, 3}, bias),
	}, "", NewOptions())
	if err := ex.Blocks[0].ReadAllow(0, 1, got); err != nil {
		t.Fatal(err)
	}
	if want := []bool{true, true, false, true, true, false, true, true, false}; !reflect.DeepEqual(got, want) {
		t.Errorf("additive ReadAllow = %v, want %v", got, want)
	}
}

func TestReadAttnNoAllocs(t *testing.T) {
	shape := []int{2, 2, 4, 8, 8}
	ex := mustAssemble(t, []Array{NewMemArray("d/attn", Float16, shape, fill(shape))}, "", NewOptions())
	dst := make([]float32, 64)
	b := ex.Blocks[0]
	n := testing.AllocsPerRun(100, func() { _ = b.ReadAttn(1, 1, 3, dst) })
	if n != 0 {
		t.Errorf("ReadAttn allocates %v times per call, want 0", n)
	}
}

func TestAssembleErrors(t *testing.T) {
	a5 := func(name string, shape ...int) Array { return NewMemArray(name, Float32, shape, fill(shape)) }
	withTokens := NewOptions()
	withTokens.Tokens = []Tokens{{Source: "toks.txt", Rows: [][]string{{"a", "b", "c"}}}}
	tokens := func(ts ...Tokens) Options { o := NewOptions(); o.Tokens = ts; return o }
	abc := [][]string{{"a", "b", "c"}}
	cases := []struct {
		name   string
		arrs   []Array
		meta   string
		opt    Options
		substr string // expected in the error
	}{
		{"grad shape", []Array{a5("d/attn", 2, 3, 4, 4), a5("d/grad", 2, 3, 4, 5)}, "", NewOptions(), "d/grad: gradient shape [2 3 4 5]"},
		{"tokens length", []Array{a5("d/attn", 2, 4, 4), NewMemStrings("tokens/t", []int{3}, toks(3))},
			`{"blocks":{"d":{"kind":"causal","query":"t","key":"t"}}}`, NewOptions(), "tokens/t: 3 tokens, but block \"d\" has 4"},
		{"tokens file length", []Array{a5("d/attn", 2, 4, 4)}, "", withTokens, "toks.txt: 3 tokens, but block \"d\" has 4 queries"},
		{"tokens twice", []Array{a5("d/attn", 2, 3, 3)}, "", tokens(Tokens{Source: "one", Rows: abc}, Tokens{Side: "target", Source: "two", Rows: abc}),
			`two: tokens for side "target" given twice (also by one)`},
		{"tokens empty", []Array{a5("d/attn", 2, 3, 3)}, "", tokens(Tokens{Source: "e", Rows: [][]string{{}}}), "e: empty token list"},
		{"tokens rows", []Array{a5("d/attn", 2, 2, 3, 3)}, `{"blocks":{"d":{"axes":"batch head query key"}}}`,
			tokens(Tokens{Source: "r", Rows: [][]string{{"a", "b", "c"}, {"a"}}}), "r: token lists of different lengths (3 and 1)"},
		{"valid shape", []Array{a5("d/attn", 2, 4, 4), NewMemArray("valid/t", Bool, []int{1, 2, 4}, make([]float64, 8))},
			`{"blocks":{"d":{"query":"t"}}}`, NewOptions(), "valid/t: must be [seq] or [batch, seq]"},
		{"valid vs tokens", []Array{a5("d/attn", 2, 4, 4), NewMemStrings("tokens/t", []int{4}, toks(4)), NewMemArray("valid/t", Bool, []int{5}, make([]float64, 5))},
			"", NewOptions(), "valid/t: 5 positions, but tokens/t gives side \"t\" 4"},
		{"segments batch", []Array{a5("d/attn", 2, 2, 4, 4), NewMemArray("segments/t", Int64, []int{3, 4}, make([]float64, 12))},
			`{"blocks":{"d":{"query":"t","axes":"batch head query key"}}}`, NewOptions(), "3 batch rows"},
		{"allow", []Array{a5("d/attn", 2, 4, 4), NewMemArray("d/allow", Bool, []int{3, 4, 4}, make([]float64, 48))}, "", NewOptions(), "not broadcastable"},
		{"int attn", []Array{NewMemArray("d/attn", Int32, []int{4, 4}, make([]float64, 16))}, "", NewOptions(), "floating point"},
		{"layer gap", []Array{a5("d/attn/0", 2, 4, 4), a5("d/attn/2", 2, 4, 4)}, "", NewOptions(), "without gaps"},
		{"mixed", []Array{a5("d/attn/0", 2, 4, 4), a5("d/attn", 2, 4, 4)}, "", NewOptions(), "given twice"},
		{"axes", []Array{a5("d/attn", 2, 4, 4)}, `{"blocks":{"d":{"axes":"head query"}}}`, NewOptions(), "name 2 axes"},
		{"axes order", []Array{a5("d/attn", 2, 4, 4)}, `{"blocks":{"d":{"axes":"query head key"}}}`, NewOptions(), "last two"},
		{"rank", []Array{a5("d/attn", 1, 1, 1, 1, 2, 2)}, "", NewOptions(), "cannot infer the axes"},
		{"kind", []Array{a5("d/attn", 2, 4, 4)}, `{"blocks":{"d":{"kind":"sideways"}}}`, NewOptions(), "sideways"},
		{"kv heads", []Array{a5("d/attn", 6, 4, 4)}, `{"blocks":{"d":{"kv_heads":4}}}`, NewOptions(), "kv_heads 4"},
		{"causal q>k", []Array{a5("d/attn", 2, 5, 4)}, `{"blocks":{"d":{"kind":"causal"}}}`, NewOptions(), "more queries"},
		{"format", []Array{a5("d/attn", 2, 4, 4)}, `{"format":"heed-export/2"}`, NewOptions(), "heed-export/2"},
		{"json", []Array{a5("d/attn", 2, 4, 4)}, `{"format":`, NewOptions(), "not a JSON object"},
		{"nothing", []Array{NewMemStrings("tokens/t", []int{2}, toks(2))}, "", NewOptions(), "no attention arrays"},
		{"dup", []Array{a5("d/attn", 2, 4, 4), a5("d/attn", 2, 4, 4)}, "", NewOptions(), "also used"},
	}
	for _, c := range cases {
		_, err := Assemble(c.arrs, c.meta, c.opt)
		var fe *FormatError
		if err == nil || !errors.As(err, &fe) {
			t.Errorf("%s: Assemble error = %v, want a *FormatError", c.name, err)
			continue
		}
		if !strings.Contains(err.Error(), c.substr) || strings.Contains(err.Error(), "\n") {
			t.Errorf("%s: error %q, want one line containing %q", c.name, err, c.substr)
		}
	}
}

// TestGivenTokens: tokens given as data (Options.Tokens) become the side's
// tokens, one list for every batch item or one per item; the block takes the
// only side; without a side name, an export of several sides is a
// *TokensSideError listing them.
func TestGivenTokens(t *testing.T) {
	shape := []int{2, 2, 3, 3}
	for _, rows := range [][][]string{{{" the", "cat", " sat"}}, {{"a", "b", "c"}, {"d", "e", "f"}}} {
		opt := NewOptions()
		opt.Tokens = []Tokens{{Source: "t", Rows: rows}}
		opt.Axes = "batch head query key"
		ex := mustAssemble(t, []Array{NewMemArray("x", Float32, shape, fill(shape))}, "", opt)
		s := ex.Side("target")
		if s == nil || !reflect.DeepEqual(s.Tokens, rows) {
			t.Errorf("%q: side = %+v", rows, s)
			continue
		}
		if b := ex.Blocks[0]; b.QuerySide != "target" || b.KeySide != "target" {
			t.Errorf("%q: sides %q %q", rows, b.QuerySide, b.KeySide)
		}
	}
	arrs := []Array{NewMemArray("d/attn", Float32, []int{2, 3, 4}, fill([]int{2, 3, 4})),
		NewMemStrings("tokens/src", []int{4}, toks(4)), NewMemStrings("tokens/tgt", []int{3}, toks(3))}
	meta := `{"blocks":{"d":{"kind":"cross","query":"tgt","key":"src"}}}`
	opt := NewOptions()
	opt.Tokens = []Tokens{{Source: "toks.json", Rows: [][]string{{"x", "y", "z"}}}}
	_, err := Assemble(arrs, meta, opt)
	var se *TokensSideError
	if !errors.As(err, &se) || se.Source != "toks.json" || !reflect.DeepEqual(se.Sides, []string{"src", "tgt"}) {
		t.Errorf("tokens without a side, two sides: %v, want a *TokensSideError listing src, tgt", err)
	}
	opt.Tokens[0].Side = "tgt"
	ex := mustAssemble(t, arrs, meta, opt)
	if got := ex.Side("tgt").Tokens; !reflect.DeepEqual(got, [][]string{{"x", "y", "z"}}) {
		t.Errorf("tokens for side tgt: %q", got)
	}
	if got := ex.Side("src").Tokens; !reflect.DeepEqual(got, [][]string{toks(4)}) {
		t.Errorf("side src: %q, want the export's own", got)
	}
}
