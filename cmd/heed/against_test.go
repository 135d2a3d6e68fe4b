package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"strings"
	"testing"

	"github.com/heed-dev/heed/internal/testdoc"
	"github.com/heed-dev/heed/loader"
)

const invDir = "../../testdata/invariance"

// againstJSON is the part of `heed check A --against B --json` the tests read.
type againstJSON struct {
	Clean    bool `json:"clean"`
	Findings []struct {
		Block     string  `json:"block"`
		Rule      string  `json:"rule"`
		Layers    []int   `json:"layer"`
		Heads     []int   `json:"head"`
		Batches   []int   `json:"batch"`
		From      []int   `json:"from"`
		Positions [][]int `json:"positions"`
		MaxAbs    float64 `json:"max_abs"`
		MaxRel    float64 `json:"max_rel"`
		Tol       float64 `json:"tol"`
	} `json:"findings"`
	Diagnosis []struct {
		Pattern string `json:"pattern"`
		Text    string `json:"text"`
	} `json:"diagnosis"`
	Invariance struct {
		Side  string `json:"side"`
		From  []int  `json:"from"`
		Parts []struct {
			Block      string    `json:"block"`
			FirstLayer []int     `json:"first_layer"`
			MaxRel     []float64 `json:"max_rel"`
		} `json:"parts"`
	} `json:"invariance"`
	Caveat string `json:"caveat"`
}

// against runs the invariance check as the check command does and returns
// its output and exit code.
func against(t *testing.T, asJSON bool, a string, b string, from int) (string, int) {
	t.Helper()
	var out bytes.Buffer
	af := &againstFlags{against: []string{b}, from: from}
	err := runAgainst(context.Background(), &out, []string{a}, af, loader.NewOptions(), 0, asJSON)
	return out.String(), exitCodeQuiet(err)
}

// exitCodeQuiet is exitCode without printing.
func exitCodeQuiet(err error) int {
	var f *findingsError
	switch {
	case err == nil:
		return 0
	case errors.As(err, &f):
		return 1
	}
	return 2
}

func decode(t *testing.T, s string) againstJSON {
	t.Helper()
	var j againstJSON
	if err := json.Unmarshal([]byte(s), &j); err != nil {
		t.Fatalf("output is not JSON: %v\n%s", err, s)
	}
	return j
}

// The fixtures are PyTorch runs (testdata/invariance/gen.py); cases.json
// says what the generator broke: layer 2, head 1 sees 2 keys ahead, tokens
// change from 6 (item 0) and 7 (item 1).
func TestAgainstFixtures(t *testing.T) {
	out, code := against(t, true, filepath.Join(invDir, "causal_a.npz"), filepath.Join(invDir, "causal_b.npz"), -1)
	if j := decode(t, out); code != 0 || !j.Clean || len(j.Findings) != 0 || j.Invariance.Side != "target" || !reflect.DeepEqual(j.Invariance.From, []int{6, 7}) {
		t.Errorf("correct model: exit %d, %s", code, out)
	}
	out, code = against(t, true, filepath.Join(invDir, "leak_attn_a.npz"), filepath.Join(invDir, "leak_attn_b.npz"), -1)
	j := decode(t, out)
	if code != 1 || j.Clean || len(j.Findings) != 2 {
		t.Fatalf("leak: exit %d, %s", code, out)
	}
	f := j.Findings[0]
	if f.Block != "decoder" || f.Rule != "invariance" || !reflect.DeepEqual(f.Layers, []int{2, 3}) || !reflect.DeepEqual(f.Heads, []int{1}) ||
		!reflect.DeepEqual(f.Positions, [][]int{{4, 5}, {5, 6}}) || !reflect.DeepEqual(f.From, []int{6, 7}) || f.Tol != 1e-5 {
		t.Errorf("leak finding %+v", f)
	}
	if j.Findings[1].Block != "logits" {
		t.Errorf("second finding %+v, want logits", j.Findings[1])
	}
	if len(j.Diagnosis) < 2 || j.Diagnosis[0].Pattern != "reads_future" || j.Diagnosis[1].Pattern != "future_heads" ||
		!strings.Contains(j.Diagnosis[0].Text, "position 4 of layer 2 changed when only tokens from 6 on were changed: something at layer 2 reads the future") {
		t.Errorf("leak diagnosis %+v", j.Diagnosis)
	}
	if p := j.Invariance.Parts[0]; !reflect.DeepEqual(p.FirstLayer, []int{2, 2}) || p.MaxRel[0] != 0 || p.MaxRel[1] != 0 || p.MaxRel[2] <= 1e-5 {
		t.Errorf("leak part %+v", p)
	}
	if !strings.Contains(j.Caveat, "not a verdict") {
		t.Errorf("caveat %q", j.Caveat)
	}

	text, code := against(t, false, filepath.Join(invDir, "leak_a.npz"), filepath.Join(invDir, "leak_b.npz"), -1)
	for _, want := range []string{"P = 6 for item 0, 7 for item 1", "CHANGED before P", "item 0: 4-5; item 1: 5-6", "1. position 4 of layer 2", "look at:  decoder layer 2 output, batch item 0, position 4", "not verdicts"} {
		if code != 1 || !strings.Contains(text, want) {
			t.Errorf("leak text (exit %d) lacks %q:\n%s", code, want, text)
		}
	}
	t.Logf("text output:\n%s", text)

	out, code = against(t, true, filepath.Join(invDir, "encoder_a.npz"), filepath.Join(invDir, "encoder_b.npz"), -1)
	if j := decode(t, out); code != 1 || len(j.Diagnosis) == 0 || j.Diagnosis[0].Pattern != "not_causal" {
		t.Errorf("encoder: exit %d, %s", code, out)
	}

	out, code = against(t, true, filepath.Join(invDir, "causal_a.npz"), filepath.Join(invDir, "mismatch_b.npz"), -1)
	if code != 2 || out != "" {
		t.Errorf("mismatch: exit %d, output %q; want 2 and nothing on stdout", code, out)
	}
	if _, code = against(t, true, filepath.Join(invDir, "causal_a.npz"), filepath.Join(invDir, "no-such.npz"), -1); code != 2 {
		t.Errorf("missing B: exit %d, want 2", code)
	}
	var buf bytes.Buffer
	err := runAgainst(context.Background(), &buf, []string{filepath.Join(invDir, "causal_a.npz")}, &againstFlags{from: 3}, loader.NewOptions(), 0, false)
	if err == nil || !strings.Contains(err.Error(), "--from needs --against") {
		t.Errorf("--from without --against: %v", err)
	}
}

// snippet returns the README's PyTorch snippet (between the markers).
func snippet(t *testing.T) (code, from string) {
	t.Helper()
	const readme = "../../README.md"
	return testdoc.Code(t, readme, "invariance-snippet"), readme
}

// harness is a small causal model built from torch.nn.TransformerEncoderLayer
// (a different code path from the fixtures' MultiheadAttention stack), run
// through the snippet: once with a correct causal mask and once with one
// layer's mask built with triu(diagonal=2), so that in that layer query q
// also sees key q+1. Analytically only position P-1 of that layer and the
// later ones can change.
const harness = `
import sys
import torch
from torch import nn

class TinyLM(nn.Module):
    def __init__(self, vocab, d, heads, layers, n, leak_layer=-1):
        super().__init__()
        self.emb = nn.Embedding(vocab, d)
        self.pos = nn.Embedding(n, d)
        self.layers = nn.ModuleList(nn.TransformerEncoderLayer(d, heads, 2 * d, dropout=0.0, batch_first=True)
                                    for _ in range(layers))
        self.out = nn.Linear(d, vocab)
        self.leak_layer = leak_layer

    def forward(self, ids):
        n = ids.shape[1]
        x = self.emb(ids) + self.pos(torch.arange(n))[None]
        for i, layer in enumerate(self.layers):
            diag = 2 if i == self.leak_layer else 1
            x = layer(x, src_mask=torch.triu(torch.full((n, n), float("-inf")), diagonal=diag))
        return self.out(x)

out, P = sys.argv[1], int(sys.argv[2])
torch.manual_seed(3)
vocab, n = 30, 9
ids = torch.randint(0, vocab, (2, n))
for name, leak in (("ok", -1), ("leak", 1)):
    torch.manual_seed(4)
    model = TinyLM(vocab, 16, 2, 3, n, leak_layer=leak).eval()
    heed_invariance_pair(model, model.layers, ids, P, f"{out}/{name}_a.npz", f"{out}/{name}_b.npz", vocab,
                         decode=lambda t: f"tok{t}")
`

func TestAgainstReadmeSnippet(t *testing.T) {
	py := torchPython(t)
	code, from := snippet(t)
	dir := t.TempDir()
	script := filepath.Join(dir, "pair.py")
	if err := os.WriteFile(script, []byte(code+"\n"+harness), 0o644); err != nil {
		t.Fatal(err)
	}
	const P = 5
	if out, err := exec.Command(py, script, dir, "5").CombinedOutput(); err != nil {
		t.Fatalf("snippet from %s: %v\n%s", from, err, out)
	}
	out, exit := against(t, true, filepath.Join(dir, "ok_a.npz"), filepath.Join(dir, "ok_b.npz"), -1)
	if j := decode(t, out); exit != 0 || !j.Clean || !reflect.DeepEqual(j.Invariance.From, []int{P, P}) {
		t.Errorf("snippet, correct model: exit %d\n%s", exit, out)
	}
	out, exit = against(t, true, filepath.Join(dir, "leak_a.npz"), filepath.Join(dir, "leak_b.npz"), -1)
	j := decode(t, out)
	if exit != 1 || len(j.Findings) == 0 {
		t.Fatalf("snippet, leaky model: exit %d\n%s", exit, out)
	}
	f := j.Findings[0]
	if f.Block != "decoder" || !reflect.DeepEqual(f.Layers, []int{1, 2}) || !reflect.DeepEqual(f.Positions, [][]int{{P - 1}, {P - 1}}) {
		t.Errorf("snippet, leaky model: finding %+v, want layers [1 2], position %d in both items", f, P-1)
	}
}

// TestAgainstThroughCheck runs the real command line: heed check A --against B.
func TestAgainstThroughCheck(t *testing.T) {
	for _, c := range []struct {
		args []string
		exit int
		want string
	}{
		{[]string{"causal_a.npz", "--against", "causal_b.npz", "--json"}, 0, `"clean": true`},
		{[]string{"leak_a.npz", "--against", "leak_b.npz", "--json"}, 1, `"rule": "invariance"`},
		{[]string{"leak_a.npz", "--against", "leak_b.npz", "--tol", "0.5"}, 0, "causal invariance clean"},
		{[]string{"leak_a.npz", "--against", "leak_b.npz", "--from", "3"}, 0, "P = 3, given by --from"},
		{[]string{"causal_a.npz", "--against", "mismatch_b.npz"}, 2, ""},
		{[]string{"causal_a.npz", "--from", "3"}, 2, ""},
	} {
		var out bytes.Buffer
		root := newRootCmd()
		args := []string{"check"}
		for _, a := range c.args {
			if strings.HasSuffix(a, ".npz") {
				a = filepath.Join(invDir, a)
			}
			args = append(args, a)
		}
		root.SetArgs(args)
		root.SetOut(&out)
		root.SetErr(&bytes.Buffer{})
		err := root.ExecuteContext(context.Background())
		if got := exitCodeQuiet(err); got != c.exit || !strings.Contains(out.String(), c.want) {
			t.Errorf("heed %v: exit %d (%v), want %d with %q in\n%s", c.args, got, err, c.exit, c.want, out.String())
		}
	}
}
