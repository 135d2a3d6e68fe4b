package main

import (
	"bytes"
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	pycapture "github.com/heed-dev/heed/python"
)

// captureHarness records three runs with python/heed_capture.py (argv[1] is
// the directory holding it, argv[2] where to write):
//   - ok.npz: a torch.nn.Transformer (2 + 2 layers, 4 heads, float64) on a
//     padded batch with PyTorch's own causal mask
//     (Transformer.generate_square_subsequent_mask), with the backward of the
//     summed cross-entropy of the real target positions inside the block;
//   - leak.npz: the same with triu(diagonal=2), which lets query q see key q+1;
//   - padded.npz: a decoder-only model of nn.TransformerEncoderLayer with a
//     causal mask and right padding, in eval under no_grad (PyTorch's
//     fused path, which heed_capture turns off for the block).
//
// As the reference for importance it computes Michel et al. (2019)'s
// |dL/dxi_h| with autograd through PyTorch's own nn.MultiheadAttention: a
// gate xi per head multiplies that head's columns of out_proj.weight
// (torch.nn.utils.parametrize), one batch item at a time (per example), and
// writes the mean over examples to gates.json.
const captureHarness = `
import json, sys
sys.path.insert(0, sys.argv[1])
out = sys.argv[2]
import torch
import torch.nn.functional as F
from torch import nn
from torch.nn.utils import parametrize
import heed_capture

torch.manual_seed(3)
V, D, H, S, T = 19, 16, 4, 7, 6


class Model(nn.Module):
    def __init__(self):
        super().__init__()
        self.emb = nn.Embedding(V, D)
        self.transformer = nn.Transformer(D, H, 2, 2, 32, dropout=0.0, batch_first=True)
        self.out = nn.Linear(D, V)

    def forward(self, src, tgt, mask, sp, tp):
        return self.out(self.transformer(self.emb(src), self.emb(tgt), tgt_mask=mask, src_key_padding_mask=sp,
                                         tgt_key_padding_mask=tp, memory_key_padding_mask=sp))


model = Model().double().eval()
src, tgt, gold = torch.randint(1, V, (3, S)), torch.randint(1, V, (3, T)), torch.randint(0, V, (3, T))
sp = torch.arange(S)[None] >= torch.tensor([7, 4, 5])[:, None]
tp = torch.arange(T)[None] >= torch.tensor([6, 3, 5])[:, None]
ok = nn.Transformer.generate_square_subsequent_mask(T).double()
leak = torch.triu(torch.full((T, T), float("-inf")), diagonal=2).double()
words = {"source": [["s%d" % i for i in r] for r in src.tolist()], "target": [["t%d" % i for i in r] for r in tgt.tolist()]}


def loss_of(logits, tp, gold):
    real = ~tp
    return F.cross_entropy(logits[real], gold[real], reduction="sum")


for name, mask in (("ok", ok), ("leak", leak)):
    with heed_capture.record(model, f"{out}/{name}.npz", tokens=words):
        loss_of(model(src, tgt, mask, sp, tp), tp, gold).backward()
    model.zero_grad()


class Gate(nn.Module):
    def __init__(self, g):
        super().__init__()
        self.g = g

    def forward(self, w):
        return w * self.g.repeat_interleave(w.shape[1] // self.g.numel())[None, :]


sites = heed_capture.layout(model)
gates = {p: torch.ones(H, dtype=torch.float64, requires_grad=True) for p in sites}
for p, s in sites.items():
    parametrize.register_parametrization(s.module.out_proj, "weight", Gate(gates[p]))
imp = {}
for b in range(3):
    for g in gates.values():
        g.grad = None
    loss_of(model(src[b:b + 1], tgt[b:b + 1], ok, sp[b:b + 1], tp[b:b + 1]), tp[b:b + 1], gold[b:b + 1]).backward()
    for p, s in sites.items():
        row = imp.setdefault(s.block, {}).setdefault(str(s.layer), [0.0] * H)
        for h in range(H):
            row[h] += abs(gates[p].grad[h].item()) / 3
for s in sites.values():
    parametrize.remove_parametrizations(s.module.out_proj, "weight")

# decoder-only, padded, eval + no_grad
layers = nn.ModuleList(nn.TransformerEncoderLayer(D, H, 32, dropout=0.0, batch_first=True) for _ in range(2))
dec = nn.Sequential()
dec.layers = layers
dec.eval()
x = torch.randn(3, 8, D)
pad = torch.arange(8)[None] >= torch.tensor([8, 5, 6])[:, None]
causal = torch.triu(torch.ones(8, 8, dtype=torch.bool), diagonal=1)
with torch.no_grad(), heed_capture.record(dec, f"{out}/padded.npz"):
    h = x
    for layer in layers:
        h = layer(h, src_mask=causal, src_key_padding_mask=pad)
json.dump(imp, open(f"{out}/gates.json", "w"))
`

// TestCaptureTorch records PyTorch models with heed_capture and judges the
// files with heed check and heed rank in-process.
func TestCaptureTorch(t *testing.T) {
	py := os.Getenv("HEED_PYTHON")
	if py == "" {
		t.Skip("HEED_PYTHON not set (make test sets it)")
	}
	dir := t.TempDir()
	script := filepath.Join(dir, "harness.py")
	if err := os.WriteFile(script, []byte(captureHarness), 0o644); err != nil {
		t.Fatal(err)
	}
	pydir, err := filepath.Abs("../../python")
	if err != nil {
		t.Fatal(err)
	}
	if out, err := exec.Command(py, script, pydir, dir).CombinedOutput(); err != nil {
		t.Fatalf("harness: %v\n%s", err, out)
	}

	// (a) the correct model: clean, with the causal and padding rules judged
	out, code := run(t, "check", "--json", filepath.Join(dir, "ok.npz"))
	if code != 0 {
		t.Fatalf("heed check on the correct nn.Transformer: exit %d, want 0\n%s", code, out)
	}
	var ok struct {
		Verdict string              `json:"verdict"`
		Rules   map[string][]string `json:"rules"`
	}
	if err := json.Unmarshal([]byte(out), &ok); err != nil {
		t.Fatal(err)
	}
	want := map[string][]string{"decoder": {"causal", "padding"}, "encoder": {"padding"}, "cross": {"padding"}}
	for b, rules := range want {
		if strings.Join(ok.Rules[b], ",") != strings.Join(rules, ",") {
			t.Errorf("block %s judged with rules %v, want %v", b, ok.Rules[b], rules)
		}
	}
	if ok.Verdict != "clean" {
		t.Errorf("verdict %q, want clean", ok.Verdict)
	}

	// (b) triu(diagonal=2): a causal leak at offset +1 in every layer and head
	out, code = run(t, "check", "--json", filepath.Join(dir, "leak.npz"))
	if code != 1 {
		t.Fatalf("heed check on the off-by-one decoder: exit %d, want 1\n%s", code, out)
	}
	assertPlusOne(t, out, "decoder", true)
	var leak struct {
		Findings []struct {
			Layer []int `json:"layer"`
			Head  []int `json:"head"`
		} `json:"findings"`
	}
	if err := json.Unmarshal([]byte(out), &leak); err != nil {
		t.Fatal(err)
	}
	if f := leak.Findings; len(f) != 1 || len(f[0].Layer) != 2 || len(f[0].Head) != 4 {
		t.Errorf("finding %+v, want every layer (2) and head (4)", f)
	}

	// (c) the padded decoder-only model recorded on PyTorch's fused path
	out, code = run(t, "check", "--json", filepath.Join(dir, "padded.npz"))
	if code != 0 {
		t.Fatalf("heed check on the padded decoder-only model: exit %d, want 0\n%s", code, out)
	}
	if err := json.Unmarshal([]byte(out), &ok); err != nil {
		t.Fatal(err)
	}
	if strings.Join(ok.Rules["layers"], ",") != "causal,padding" {
		t.Errorf("decoder-only block judged with %v, want causal and padding", ok.Rules)
	}

	// importance: heed rank's mean |sum A*G| equals Michel et al.'s |dL/dxi|
	// computed by autograd through PyTorch's own attention (gates.json)
	var gates map[string]map[string][]float64
	raw, err := os.ReadFile(filepath.Join(dir, "gates.json"))
	if err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(raw, &gates); err != nil {
		t.Fatal(err)
	}
	out, code = run(t, "rank", "--json", filepath.Join(dir, "ok.npz"))
	if code != 0 {
		t.Fatalf("heed rank: exit %d\n%s", code, out)
	}
	var rank struct {
		Heads []struct {
			Block      string   `json:"block"`
			Layer      int      `json:"layer"`
			Head       int      `json:"head"`
			Importance *float64 `json:"importance"`
		} `json:"heads"`
	}
	if err := json.Unmarshal([]byte(out), &rank); err != nil {
		t.Fatal(err)
	}
	if len(rank.Heads) != 24 {
		t.Fatalf("%d heads ranked, want 24", len(rank.Heads))
	}
	for _, h := range rank.Heads {
		ref := gates[h.Block][strings.TrimSpace(itoa(h.Layer))][h.Head]
		if h.Importance == nil {
			t.Errorf("%s L%d H%d: no importance", h.Block, h.Layer, h.Head)
			continue
		}
		if d := math.Abs(*h.Importance - ref); d > 1e-6*math.Abs(ref) {
			t.Errorf("%s L%d H%d: importance %.10g, autograd gate %.10g (rel %.2g)", h.Block, h.Layer, h.Head, *h.Importance, ref, d/math.Abs(ref))
		}
	}
}

func itoa(n int) string {
	b, _ := json.Marshal(n)
	return string(b)
}

// TestCapturePy checks that heed capture-py writes the module byte for byte,
// leaves an identical file alone and refuses a different one without --force.
func TestCapturePy(t *testing.T) {
	src, err := os.ReadFile("../../python/heed_capture.py")
	if err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	out, code := run(t, "capture-py", dir)
	if code != 0 || !strings.Contains(out, filepath.Join(dir, "heed_capture.py")) {
		t.Fatalf("capture-py: exit %d\n%s", code, out)
	}
	got, err := os.ReadFile(filepath.Join(dir, "heed_capture.py"))
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(got, src) || !bytes.Equal(pycapture.Source, src) {
		t.Fatalf("written file (%d bytes) differs from python/heed_capture.py (%d bytes)", len(got), len(src))
	}
	if _, code := run(t, "capture-py", dir); code != 0 {
		t.Errorf("capture-py over an identical file: exit %d, want 0", code)
	}
	p := filepath.Join(dir, "heed_capture.py")
	if err := os.WriteFile(p, []byte("# mine\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	if out, code := run(t, "capture-py", dir); code != 2 {
		t.Errorf("capture-py over a different file: exit %d, want 2\n%s", code, out)
	}
	if mine, _ := os.ReadFile(p); string(mine) != "# mine\n" {
		t.Errorf("a different file was replaced without --force")
	}
	if _, code := run(t, "capture-py", "--force", dir); code != 0 {
		t.Errorf("capture-py --force: exit %d", code)
	}
	if got, _ := os.ReadFile(p); !bytes.Equal(got, src) {
		t.Errorf("--force did not write the module")
	}
	entries, _ := os.ReadDir(dir)
	if len(entries) != 1 {
		t.Errorf("capture-py left %d files in %s, want 1", len(entries), dir)
	}
}
