package main

import (
	"bytes"
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	pycapture "github.com/heed-dev/heed/python"
)

// captureScript records two nn.Transformer models with python/heed_capture.py
// (a correct causal mask and an off-by-one one, padded batches, loss.backward
// inside the with block), and computes the reference importance with
// autograd: for each example alone, with the loss summed over its tokens
// (so that the batched loss's dL/dA of an example is its own), the head
// gate's derivative dL/dxi_h = sum over head h's columns of W * dL/dW of the
// output projection (the gate scales those columns; Michel et al. 2019,
// eq. 2), then |.| averaged over examples.
const captureScript = `
import json, sys
sys.path.insert(0, sys.argv[2])
import torch, heed_capture
out = sys.argv[1]
torch.manual_seed(0)
D, V, S, T, H = 32, 20, 7, 6, 4

class M(torch.nn.Module):
    def __init__(self):
        super().__init__()
        self.emb = torch.nn.Embedding(V, D)
        self.tr = torch.nn.Transformer(D, H, 2, 2, 64, dropout=0.0, batch_first=True)
        self.out = torch.nn.Linear(D, V)
    def forward(self, src, tgt, sp, tp, tm):
        return self.out(self.tr(self.emb(src), self.emb(tgt), tgt_mask=tm, src_key_padding_mask=sp,
                                tgt_key_padding_mask=tp, memory_key_padding_mask=sp))

m = M().eval()
src, tgt = torch.randint(1, V, (3, S)), torch.randint(1, V, (3, T))
sp = torch.arange(S)[None] >= torch.tensor([7, 5, 4])[:, None]
tp = torch.arange(T)[None] >= torch.tensor([6, 6, 3])[:, None]
def loss_of(o, t, pad):
    l = torch.nn.functional.cross_entropy(o[:, :-1].reshape(-1, V), t[:, 1:].reshape(-1), reduction="none")
    return (l * (~pad[:, 1:]).reshape(-1)).sum()
toks = {"source": [["s%d" % i for i in r] for r in src.tolist()], "target": [["t%d" % i for i in r] for r in tgt.tolist()]}
masks = {"ok": torch.nn.Transformer.generate_square_subsequent_mask(T),
         "leak": torch.triu(torch.full((T, T), float("-inf")), diagonal=2)}
for name, tm in masks.items():
    m.zero_grad()
    with heed_capture.record(m, f"{out}/{name}.npz", tokens=toks):
        loss_of(m(src, tgt, sp, tp, tm), tgt, tp).backward()
ref = {}
hd = D // H
tm = masks["ok"]
for b in range(3):
    m.zero_grad()
    loss_of(m(src[b:b+1], tgt[b:b+1], sp[b:b+1], tp[b:b+1], tm), tgt[b:b+1], tp[b:b+1]).backward()
    for block, mods in (("encoder", [l.self_attn for l in m.tr.encoder.layers]),
                        ("decoder", [l.self_attn for l in m.tr.decoder.layers]),
                        ("cross", [l.multihead_attn for l in m.tr.decoder.layers])):
        for li, mod in enumerate(mods):
            W, G = mod.out_proj.weight, mod.out_proj.weight.grad
            for h in range(H):
                g = float((W[:, h*hd:(h+1)*hd] * G[:, h*hd:(h+1)*hd]).sum())
                k = f"{block}/{li}/{h}"
                ref[k] = ref.get(k, 0.0) + abs(g) / 3
json.dump(ref, open(f"{out}/ref.json", "w"))
`

func TestCaptureModule(t *testing.T) {
	py := torchPython(t)
	dir := t.TempDir()
	script := filepath.Join(dir, "cap.py")
	if err := os.WriteFile(script, []byte(captureScript), 0o644); err != nil {
		t.Fatal(err)
	}
	pydir, _ := filepath.Abs("../../python")
	if out, err := exec.Command(py, script, dir, pydir).CombinedOutput(); err != nil {
		t.Fatalf("capture: %v\n%s", err, out)
	}
	// (a) the correct model: clean, with causal and padding judged
	out, code := run(t, "check", "--json", filepath.Join(dir, "ok.npz"))
	if code != 0 {
		t.Fatalf("correct model: exit %d\n%s", code, out)
	}
	var rep struct {
		Verdict  string `json:"verdict"`
		Coverage []struct {
			Block     string   `json:"block"`
			KindFrom  string   `json:"kind_from"`
			MaskRules []string `json:"mask_rules"`
		} `json:"coverage"`
		Findings []struct {
			Rule    string                 `json:"rule"`
			Layer   []int                  `json:"layer"`
			Head    []int                  `json:"head"`
			Offsets []struct{ Offset int } `json:"offsets"`
		} `json:"findings"`
	}
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatal(err)
	}
	rules := map[string]string{}
	for _, c := range rep.Coverage {
		rules[c.Block] = strings.Join(c.MaskRules, ",")
		if c.KindFrom != "metadata" {
			t.Errorf("%s: kind from %q, want metadata written by heed_capture", c.Block, c.KindFrom)
		}
	}
	if rules["decoder"] != "causal,padding" || rules["encoder"] != "padding" || rules["cross"] != "padding" {
		t.Errorf("rules judged %v", rules)
	}
	// (b) the off-by-one mask: a causal leak at +1 in every layer and head
	out, code = run(t, "check", "--json", filepath.Join(dir, "leak.npz"))
	if code != 1 {
		t.Fatalf("off-by-one: exit %d\n%s", code, out)
	}
	rep.Findings = nil
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatal(err)
	}
	if len(rep.Findings) != 1 || rep.Findings[0].Rule != "causal" || len(rep.Findings[0].Layer) != 2 || len(rep.Findings[0].Head) != 4 ||
		len(rep.Findings[0].Offsets) != 1 || rep.Findings[0].Offsets[0].Offset != 1 {
		t.Errorf("off-by-one findings: %+v", rep.Findings)
	}
	// importance from the recorded dL/dA equals autograd's head gates
	raw, err := os.ReadFile(filepath.Join(dir, "ref.json"))
	if err != nil {
		t.Fatal(err)
	}
	var ref map[string]float64
	if err := json.Unmarshal(raw, &ref); err != nil {
		t.Fatal(err)
	}
	out, code = run(t, "rank", "--json", filepath.Join(dir, "ok.npz"))
	if code != 0 {
		t.Fatalf("rank: exit %d\n%s", code, out)
	}
	var rk struct {
		Heads []struct {
			Block      string   `json:"block"`
			Layer      int      `json:"layer"`
			Head       int      `json:"head"`
			Importance *float64 `json:"importance"`
		} `json:"heads"`
	}
	if err := json.Unmarshal([]byte(out), &rk); err != nil {
		t.Fatal(err)
	}
	if len(rk.Heads) != 24 {
		t.Fatalf("%d heads", len(rk.Heads))
	}
	for _, h := range rk.Heads {
		want := ref[h.Block+"/"+strconv.Itoa(h.Layer)+"/"+strconv.Itoa(h.Head)]
		if h.Importance == nil {
			t.Fatalf("%s L%d H%d: no importance", h.Block, h.Layer, h.Head)
		}
		// float32 sums in different orders: relative 1e-4 (a float32
		// backward pass over a few hundred terms)
		if d := math.Abs(*h.Importance - want); d > 1e-4*math.Abs(want)+1e-9 {
			t.Errorf("%s L%d H%d: importance %.8g, autograd head gate %.8g", h.Block, h.Layer, h.Head, *h.Importance, want)
		}
	}
}

func TestCapturePyWritesTheModule(t *testing.T) {
	dir := t.TempDir()
	out, code := run(t, "capture-py", dir)
	if code != 0 {
		t.Fatalf("exit %d\n%s", code, out)
	}
	got, err := os.ReadFile(filepath.Join(dir, "heed_capture.py"))
	if err != nil {
		t.Fatal(err)
	}
	want, err := os.ReadFile("../../python/heed_capture.py")
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(got, want) || !bytes.Equal(got, pycapture.Source) {
		t.Fatal("heed capture-py wrote another file than python/heed_capture.py")
	}
	// a different file is not replaced without --force
	if err := os.WriteFile(filepath.Join(dir, "heed_capture.py"), []byte("# mine\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	if _, code := run(t, "capture-py", dir); code != 2 {
		t.Errorf("overwrote a different file: exit %d", code)
	}
	if _, code := run(t, "capture-py", "--force", dir); code != 0 {
		t.Errorf("--force: exit %d", code)
	}
}

// captureHarness defines what the README's capture snippet uses: an
// nn.Transformer with embeddings and an output layer, a padded batch, words
// and the causal mask; heed_capture is importable from the repository.
const captureHarness = `
import sys, os
sys.path.insert(0, sys.argv[2])
os.chdir(sys.argv[1])
import torch
torch.manual_seed(0)
D, V, S, T = 32, 20, 7, 6

class Model(torch.nn.Module):
    def __init__(self):
        super().__init__()
        self.emb = torch.nn.Embedding(V, D)
        self.tr = torch.nn.Transformer(D, 4, 2, 2, 64, dropout=0.1, batch_first=True)
        self.out = torch.nn.Linear(D, V)
    def forward(self, src, tgt, **masks):
        return self.out(self.tr(self.emb(src), self.emb(tgt), **masks))

model = Model()
src_ids, tgt_ids = torch.randint(1, V, (2, S)), torch.randint(1, V, (2, T))
src_pad = torch.arange(S)[None] >= torch.tensor([7, 4])[:, None]
tgt_pad = torch.arange(T)[None] >= torch.tensor([6, 5])[:, None]
tgt_mask = torch.nn.Transformer.generate_square_subsequent_mask(T)
src_words = [["w%d" % i for i in r] for r in src_ids.tolist()]
tgt_words = [["c%d" % i for i in r] for r in tgt_ids.tolist()]
`

// TestCaptureReadmeSnippet runs the README's heed_capture snippet and
// judges what it wrote: every block judged, clean, with gradients, tokens
// and logits.
func TestCaptureReadmeSnippet(t *testing.T) {
	py := torchPython(t)
	raw, err := os.ReadFile("../../README.md")
	if err != nil {
		t.Fatal(err)
	}
	const open, end = "<!-- capture-snippet -->", "<!-- /capture-snippet -->"
	s := string(raw)
	i, j := strings.Index(s, open), strings.Index(s, end)
	if i < 0 || j < i {
		t.Fatal("no " + open + " markers in README.md")
	}
	var lines []string
	for _, l := range strings.Split(s[i+len(open):j], "\n") {
		if !strings.HasPrefix(strings.TrimSpace(l), "```") {
			lines = append(lines, l)
		}
	}
	dir := t.TempDir()
	script := filepath.Join(dir, "snippet.py")
	if err := os.WriteFile(script, []byte(captureHarness+strings.Join(lines, "\n")), 0o644); err != nil {
		t.Fatal(err)
	}
	pydir, _ := filepath.Abs("../../python")
	if out, err := exec.Command(py, script, dir, pydir).CombinedOutput(); err != nil {
		t.Fatalf("README snippet: %v\n%s", err, out)
	}
	out, code := run(t, "check", filepath.Join(dir, "run.npz"))
	if code != 0 || !strings.Contains(out, "clean") {
		t.Fatalf("README snippet's export: exit %d\n%s", code, out)
	}
	out, code = run(t, "info", "--json", filepath.Join(dir, "run.npz"))
	if code != 0 {
		t.Fatalf("info: exit %d", code)
	}
	for _, want := range []string{`"grad": true`, `"tokens": true`, `"compute_dtype": "f32"`} {
		if !strings.Contains(out, want) {
			t.Errorf("info lacks %s\n%s", want, out)
		}
	}
}
