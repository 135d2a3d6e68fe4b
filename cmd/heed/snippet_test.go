package main

import (
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"strings"
	"testing"

	"github.com/heed-dev/heed/internal/testdoc"
	"github.com/heed-dev/heed/internal/testpy"
	"github.com/heed-dev/heed/loader"
)

// exportSnippet returns the README's "export from your model" snippet
// (between the <!-- export-snippet --> markers, code fences dropped).
func exportSnippet(t *testing.T) (code, from string) {
	t.Helper()
	const readme = "../../README.md"
	return testdoc.Code(t, readme, "export-snippet"), readme
}

// snippetPrelude defines what the README's snippet uses: a torch.nn.Transformer
// (2 + 2 layers, 4 heads, batch_first) with embeddings and an output layer,
// a padded batch of 3 (lengths differ per item and side), tokens and gold
// labels. The snippet is then run twice (snippetRuns): with PyTorch's own
// causal mask (Transformer.generate_square_subsequent_mask) and with
// triu(diagonal=2), which lets query q see key q+1. As the reference it also
// writes what the first encoder layer's nn.MultiheadAttention returns when
// called directly on the embeddings (PyTorch's own computation, not through
// heed_capture).
const snippetPrelude = `
import os, sys, json
sys.path.insert(0, sys.argv[1])
os.chdir(sys.argv[2])
import torch
from torch import nn

torch.manual_seed(11)
V, D, S, T = 20, 32, 7, 6
src_len, tgt_len = [7, 4, 5], [6, 3, 5]


class Model(nn.Module):
    def __init__(self):
        super().__init__()
        self.emb = nn.Embedding(V, D)
        self.transformer = nn.Transformer(D, 4, 2, 2, 64, dropout=0.0, batch_first=True)
        self.out = nn.Linear(D, V)

    def forward(self, src, tgt, **masks):
        return self.out(self.transformer(self.emb(src), self.emb(tgt), **masks))


model = Model()
src, tgt, gold = torch.randint(1, V, (3, S)), torch.randint(1, V, (3, T)), torch.randint(0, V, (3, T))
src_pad = torch.arange(S)[None] >= torch.tensor(src_len)[:, None]
tgt_pad = torch.arange(T)[None] >= torch.tensor(tgt_len)[:, None]
words = lambda ids, pad: [[("<pad>" if p else "w%d" % i) for i, p in zip(r, q)] for r, q in zip(ids.tolist(), pad.tolist())]
src_words, tgt_words = words(src, src_pad), words(tgt, tgt_pad)
masks = {"ok": nn.Transformer.generate_square_subsequent_mask(T),
         "leak": torch.triu(torch.full((T, T), float("-inf")), diagonal=2)}
`

// snippetRuns runs the snippet (SNIPPET, a string) once per mask and keeps
// each run.npz, then writes the reference.
const snippetRuns = `
for name, tgt_mask in masks.items():
    exec(compile(SNIPPET, "README.md export-snippet", "exec"))
    os.replace("run.npz", name + ".npz")
    model.zero_grad()

assert all("forward" not in m.__dict__ for m in model.modules())  # heed_capture restored every forward
with torch.no_grad():
    x = model.emb(src)
    _, w = model.transformer.encoder.layers[0].self_attn(x, x, x, key_padding_mask=src_pad, need_weights=True,
                                                         average_attn_weights=False)
json.dump({"encoder_layer0": w.tolist(), "source": src_words}, open("ref.json", "w"))
`

func torchPython(t *testing.T) string {
	t.Helper()
	return testpy.Require(t, "torch", "numpy")
}

// TestExportSnippet runs the README's snippet exactly as printed (with
// python/heed_capture.py) on a torch model, opens what it wrote with heed's
// loader, compares the first encoder layer with what PyTorch's
// nn.MultiheadAttention returns for the same input, and runs heed check on
// both masks.
func TestExportSnippet(t *testing.T) {
	py := torchPython(t)
	snip, from := exportSnippet(t)
	dir := t.TempDir()
	script := filepath.Join(dir, "export.py")
	quoted, err := json.Marshal(snip) // a JSON string is a Python string literal
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(script, []byte(snippetPrelude+"SNIPPET = "+string(quoted)+"\n"+snippetRuns), 0o644); err != nil {
		t.Fatal(err)
	}
	pydir, err := filepath.Abs("../../python")
	if err != nil {
		t.Fatal(err)
	}
	if out, err := exec.Command(py, script, pydir, dir).CombinedOutput(); err != nil {
		t.Fatalf("snippet from %s: %v\n%s", from, err, out)
	}
	var ref struct {
		Encoder0 [][][][]float64 `json:"encoder_layer0"` // [batch, head, query, key]
		Source   [][]string      `json:"source"`
	}
	raw, err := os.ReadFile(filepath.Join(dir, "ref.json"))
	if err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(raw, &ref); err != nil {
		t.Fatal(err)
	}

	ex, err := loader.Open([]string{filepath.Join(dir, "ok.npz")}, loader.NewOptions())
	if err != nil {
		t.Fatalf("loader on the snippet's file: %v", err)
	}
	defer ex.Close()
	want := map[string][6]any{ // kind, query side, key side, layers, queries, keys
		"encoder": {loader.KindBidirectional, "source", "source", 2, 7, 7},
		"decoder": {loader.KindCausal, "target", "target", 2, 6, 6},
		"cross":   {loader.KindCross, "target", "source", 2, 6, 7},
	}
	if len(ex.Blocks) != len(want) {
		t.Fatalf("%d blocks, want %d", len(ex.Blocks), len(want))
	}
	for name, w := range want {
		b := ex.Block(name)
		if b == nil {
			t.Fatalf("no block %q", name)
		}
		got := [6]any{b.Kind, b.QuerySide, b.KeySide, b.Layers, b.Queries, b.Keys}
		if got != w || b.Batch != 3 || b.Heads != 4 {
			t.Errorf("block %s: %v batch %d heads %d, want %v batch 3 heads 4", name, got, b.Batch, b.Heads, w)
		}
		if !b.HasGrad { // the snippet's backward ran inside the block
			t.Errorf("block %s: no gradients", name)
		}
	}
	if ex.Logits == nil || !reflect.DeepEqual(ex.Logits.Shape(), []int{3, 6, 20}) {
		t.Errorf("logits %v, want an array [3, 6, 20] (rec.logits)", ex.Logits)
	}
	if src := ex.Side("source"); src == nil || !reflect.DeepEqual(src.Tokens, ref.Source) || src.IsValid(1, 4) || !src.IsValid(1, 3) {
		t.Errorf("source side: %+v, want tokens %v with item 1 padded from position 4", src, ref.Source)
	}
	enc := ex.Block("encoder")
	buf := make([]float32, enc.Queries*enc.Keys)
	// The snippet's array must be what nn.MultiheadAttention computes; the
	// reference call may take PyTorch's fused path, so allow float32 rounding.
	const tol = 1e-5
	for b := 0; b < 3; b++ {
		for h := 0; h < 4; h++ {
			if err := enc.ReadAttn(0, b, h, buf); err != nil {
				t.Fatal(err)
			}
			for q := 0; q < enc.Queries; q++ {
				for k := 0; k < enc.Keys; k++ {
					if d := math.Abs(float64(buf[q*enc.Keys+k]) - ref.Encoder0[b][h][q][k]); d > tol {
						t.Fatalf("encoder L0 B%d H%d [%d,%d] = %g, PyTorch gives %g", b, h, q, k, buf[q*enc.Keys+k], ref.Encoder0[b][h][q][k])
					}
				}
			}
		}
	}

	if out, code := run(t, "check", filepath.Join(dir, "ok.npz")); code != 0 {
		t.Errorf("heed check on the correctly masked model: exit %d, want 0\n%s", code, out)
	}
	out, exit := run(t, "check", "--json", filepath.Join(dir, "leak.npz"))
	if exit != 1 {
		t.Fatalf("heed check on triu(diagonal=2): exit %d, want 1\n%s", exit, out)
	}
	// The +1 cell of each padded item's last real query is a padding key
	// (blocked by tgt_key_padding_mask): it could not leak, so it does not
	// count against "mask shifted by +1" (11 of the 13 cells above the
	// diagonal at +1 are real keys for lengths 6/3/5).
	assertPlusOne(t, out, "decoder", true)
}

// checkJSON is the part of heed check --json the tests read.
type checkJSON struct {
	Clean    bool `json:"clean"`
	Findings []struct {
		Block   string `json:"block"`
		Rule    string `json:"rule"`
		Offsets []struct {
			Offset int   `json:"offset"`
			Count  int64 `json:"count"`
		} `json:"offsets"`
	} `json:"findings"`
	Diagnosis []struct {
		Pattern string `json:"pattern"`
		Text    string `json:"text"`
	} `json:"diagnosis"`
}

// assertPlusOne checks that heed check --json output out reports a causal
// leak in block whose every leaking cell is at k = q+1, and, with
// diagnosed, that it is diagnosed as a mask shifted by +1.
func assertPlusOne(t *testing.T, out, block string, diagnosed bool) {
	t.Helper()
	var j checkJSON
	if err := json.Unmarshal([]byte(out), &j); err != nil {
		t.Fatalf("check --json: %v\n%s", err, out)
	}
	if j.Clean || len(j.Findings) != 1 {
		t.Fatalf("want exactly one finding, got clean=%v %d findings\n%s", j.Clean, len(j.Findings), out)
	}
	f := j.Findings[0]
	if f.Block != block || f.Rule != "causal" || len(f.Offsets) != 1 || f.Offsets[0].Offset != 1 || f.Offsets[0].Count == 0 {
		t.Errorf("finding %+v, want a causal leak in %s at offset +1 only", f, block)
	}
	if len(j.Diagnosis) == 0 {
		t.Errorf("no diagnosis\n%s", out)
	} else if diagnosed && (j.Diagnosis[0].Pattern != "mask_shifted" || !strings.Contains(j.Diagnosis[0].Text, "+1")) {
		t.Errorf("diagnosis %+v, want mask_shifted by +1", j.Diagnosis)
	}
}
