package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"github.com/heed-dev/heed/analysis/trace"
	"github.com/heed-dev/heed/internal/testpy"
)

// TestTraceTextUnnormalised: the demo's gradient relevance comes from the
// dL/dA of the whole teacher-forced loss (testdata/demo/generate.py, with
// PyTorch autograd), so its shares are tiny; the text output must still tell
// them apart: each share printed to 4 significant digits (read back within
// rounding of the JSON value) and as a percentage of their total, with the
// header saying the shares are not normalised.
func TestTraceTextUnnormalised(t *testing.T) {
	dir := t.TempDir()
	if out, code := run(t, "demo", "--export", dir); code != 0 {
		t.Fatalf("demo --export: exit %d\n%s", code, out)
	}
	clean := filepath.Join(dir, "clean.npz")
	js, code := run(t, "trace", "--json", "--query", "5", "--method", "grad", clean)
	if code != 0 {
		t.Fatalf("trace --json: exit %d\n%s", code, js)
	}
	var res struct {
		Normalised bool `json:"normalised"`
		Tokens     []struct {
			Share float64 `json:"share"`
		} `json:"tokens"`
	}
	if err := json.Unmarshal([]byte(js), &res); err != nil {
		t.Fatal(err)
	}
	var total, top float64
	for _, tk := range res.Tokens {
		total += tk.Share
		top = max(top, tk.Share)
	}
	if res.Normalised || top >= 1e-3 {
		t.Fatalf("want unnormalised shares below 1e-3 (the case this test is about), got normalised=%v, largest %g", res.Normalised, top)
	}
	out, code := run(t, "trace", "--query", "5", "--method", "grad", clean)
	if code != 0 {
		t.Fatalf("trace: exit %d\n%s", code, out)
	}
	lines := strings.Split(strings.TrimSpace(out), "\n")
	if !strings.Contains(lines[0], "not normalised") {
		t.Errorf("header does not say the shares are not normalised: %s", lines[0])
	}
	var rows []string // the token lines: after the header and prediction, before the summary and caveat
	for _, l := range lines[2:] {
		if f := strings.Fields(l); len(f) > 0 {
			if _, err := strconv.Atoi(f[0]); err == nil {
				rows = append(rows, l)
			}
		}
	}
	if len(rows) != len(res.Tokens) {
		t.Fatalf("%d token lines, JSON has %d tokens\n%s", len(rows), len(res.Tokens), out)
	}
	var pctSum float64
	for i, l := range rows {
		f := strings.Fields(l)
		share, err1 := strconv.ParseFloat(f[len(f)-2], 64)
		pct, err2 := strconv.ParseFloat(strings.TrimSuffix(f[len(f)-1], "%"), 64)
		if err1 != nil || err2 != nil {
			t.Fatalf("line %q: share and percent not readable", l)
		}
		want := res.Tokens[i].Share
		if math.Abs(share-want) > 5e-4*math.Abs(want) {
			t.Errorf("line %q: share %g, JSON %g (want 4 significant digits)", l, share, want)
		}
		if math.Abs(pct-100*want/total) > 0.051 {
			t.Errorf("line %q: %g%%, want %.2f%% of the total", l, pct, 100*want/total)
		}
		pctSum += pct
	}
	if math.Abs(pctSum-100) > 0.1*float64(len(rows)) {
		t.Errorf("percentages sum to %g, want 100", pctSum)
	}
	// normalised shares keep their plain form
	out, _ = run(t, "trace", "--query", "5", filepath.Join(casesDir, "stats.npz"))
	if i := strings.Index(out, "summary:"); i > 0 {
		out = out[:i] // the summary sentence speaks in percentages
	}
	if !strings.Contains(strings.SplitN(out, "\n", 2)[0], "shares sum to 1") || strings.Contains(out, "%") {
		t.Errorf("rollout on self-attention: want \"shares sum to 1\" and no percentages\n%s", out)
	}
}

// TestTraceFlowAdvice: heed trace words analysis's refusals of attention
// flow (defined by Abnar & Zuidema 2020 over a stack of self-attention
// layers, so not through cross-attention; bounded by trace.FlowLimit) with
// the --method to use instead; analysis's own error names no flag (the Trace
// screen words it for its columns).
func TestTraceFlowAdvice(t *testing.T) {
	cmd := newRootCmd()
	var out bytes.Buffer
	cmd.SetOut(&out)
	cmd.SetErr(&out)
	cmd.SetArgs([]string{"trace", "--query", "4", "--method", "flow", filepath.Join(casesDir, "encdec_grad.npz")})
	err := cmd.ExecuteContext(context.Background())
	const want = "analysis: attention flow is defined for self-attention stacks; through cross-attention use --method rollout or grad"
	if !errors.Is(err, trace.ErrFlowCross) || err.Error() != want || exitCode(err, false) != 2 {
		t.Errorf("flow on a cross block: err %v (exit %d), want %q (exit 2)", err, exitCode(err, false), want)
	}
	if strings.Contains(trace.ErrFlowCross.Error(), "--method") {
		t.Errorf("analysis's error names a flag: %v", trace.ErrFlowCross)
	}
	// 1 layer x 600 positions: 600^3 > FlowLimit = 2^27
	n := 600
	_, err = trace.Flow(context.Background(), [][]float64{make([]float64, n*n)}, n, 0)
	var big *trace.FlowTooLargeError
	if !errors.As(err, &big) || big.Layers != 1 || big.Positions != n || big.Work != int64(n*n*n) {
		t.Fatalf("flow beyond the limit: err %v, want a *FlowTooLargeError of 1 layer x %d positions", err, n)
	}
	if strings.Contains(err.Error(), "--method") {
		t.Errorf("analysis's error names a flag: %v", err)
	}
	if got := traceAdvice(err).Error(); got != err.Error()+": use --method rollout" {
		t.Errorf("heed trace beyond the flow limit: %q", got)
	}
}

// predictScript writes a causal export with logits and a vocabulary and
// prints numpy's argmax and softmax probability at position 5, and the
// input token after it.
const predictScript = `
import json, sys
import numpy as np
rng = np.random.default_rng(11)
L, H, T, V = 2, 2, 8, 12
s = rng.normal(size=(L, H, T, T))
s[..., np.triu(np.ones((T, T), dtype=bool), k=1)] = -np.inf
a = np.exp(s - s.max(-1, keepdims=True)); a /= a.sum(-1, keepdims=True)
logits = rng.normal(size=(1, T, V)).astype(np.float32) * 3
vocab = np.array(["v%d" % i for i in range(V)])
toks = np.array([["t%d" % i for i in range(T)]])
meta = {"format": "heed-export/1", "blocks": {"decoder": {"kind": "causal", "query": "target", "key": "target"}}}
np.savez(sys.argv[1], **{"decoder/attn": a.astype(np.float32), "logits": logits, "vocab": vocab, "tokens/target": toks,
                         "meta": np.array(json.dumps(meta))})
z = logits[0, 5].astype(np.float64)
p = np.exp(z - z.max()); p /= p.sum()
print(json.dumps({"id": int(np.argmax(z)), "prob": float(p.max())}))
`

// heed trace names what the explained position predicted: the logits'
// argmax with its probability (numpy's softmax) and its vocabulary text,
// or without logits the next input token; keys after the query are marked
// future, not given a share of 0.
func TestTracePrediction(t *testing.T) {
	file := filepath.Join(t.TempDir(), "pred.npz")
	out, err := exec.Command(testpy.Path(), "-c", predictScript, file).Output()
	if err != nil {
		t.Fatalf("numpy: %v", err)
	}
	var want struct {
		ID   int
		Prob float64
	}
	if err := json.Unmarshal(out, &want); err != nil {
		t.Fatal(err)
	}
	js, code := run(t, "trace", "--json", "--query", "5", file)
	if code != 0 {
		t.Fatalf("exit %d\n%s", code, js)
	}
	var res struct {
		QueryToken string `json:"query_token"`
		Predicted  struct {
			From  string   `json:"from"`
			ID    int      `json:"id"`
			Token string   `json:"token"`
			Prob  *float64 `json:"prob"`
		} `json:"predicted"`
		Tokens []struct {
			Index  int    `json:"index"`
			Status string `json:"status"`
		} `json:"tokens"`
	}
	if err := json.Unmarshal([]byte(js), &res); err != nil {
		t.Fatal(err)
	}
	p := res.Predicted
	if p.From != "logits" || p.ID != want.ID || p.Token != fmt.Sprintf("v%d", want.ID) || p.Prob == nil || math.Abs(*p.Prob-want.Prob) > 1e-6 || res.QueryToken != "t5" {
		t.Errorf("predicted %+v (query token %q), numpy says id %d p %v", p, res.QueryToken, want.ID, want.Prob)
	}
	for _, tk := range res.Tokens {
		if future := tk.Index > 5; future != (tk.Status == "future") {
			t.Errorf("token %d status %q", tk.Index, tk.Status)
		}
	}
	// without logits: the next input token, no probability
	js, _ = run(t, "trace", "--json", "--query", "4", filepath.Join(casesDir, "shift_good.npz"))
	if !strings.Contains(js, `"from": "next token"`) || strings.Contains(js, `"prob"`) {
		t.Errorf("without logits, want the next token and no probability:\n%s", js[:min(len(js), 800)])
	}
}
