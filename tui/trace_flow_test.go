package tui

import (
	"fmt"
	"math"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"

	"github.com/heed-dev/heed/demo"
	"github.com/heed-dev/heed/internal/words"
)

// encDecTraceScript computes with numpy, from an encoder-decoder export's
// arrays, one target query's shares of the source tokens through
// cross-attention (batch item 0) by Chefer, Gur & Wolf (2021)'s
// encoder-decoder rules ("Generic Attention-model Explainability for
// Interpreting Bi-Modal and Encoder-Decoder Transformers", eqs. 6-10):
// R^ss = I, R^ss += Abar R^ss per encoder layer; R^tt = I, R^ts = 0, per
// decoder layer R^tt += Abar R^tt and R^ts += Abar R^ts (self-attention),
// then R^ts += (Rbar^tt)^T Abar Rbar^ss (cross-attention), Rbar = I + the
// rows of R - I scaled to sum 1. With gradients Abar = E_h[(-G * A)^+] (the
// exported G is dL/dA of a loss, the paper's is of the target's score);
// without, Abar = E_h[A] (the rollout method on a cross block). It prints the
// source tokens of batch item 0 and the row of R^ts for the query, each way.
const encDecTraceScript = `
import json, sys
import numpy as np
sys.dont_write_bytecode = True
sys.path.insert(0, "../testdata/cases")
from relevance import normbar  # Rbar = I + (R - I) with rows scaled to sum 1
z = np.load(sys.argv[1])
q = int(sys.argv[2])
meta = json.loads(str(z["meta"]))
for b in ("encoder", "decoder", "cross"):
    assert meta["blocks"][b]["axes"] == "layer batch head query key", meta["blocks"][b]
A = {b: z[b + "/attn"][:, 0].astype(np.float64) for b in ("encoder", "decoder", "cross")}
G = {b: z[b + "/grad"][:, 0].astype(np.float64) for b in ("encoder", "decoder", "cross")}


def rts(abar):
    S, T = A["encoder"].shape[-1], A["decoder"].shape[-1]
    Rss = np.eye(S)
    for l in range(A["encoder"].shape[0]):
        Rss = Rss + abar("encoder", l) @ Rss
    Rtt, Rts = np.eye(T), np.zeros((T, S))
    for l in range(A["decoder"].shape[0]):
        Ab = abar("decoder", l)
        Rtt = Rtt + Ab @ Rtt
        Rts = Rts + Ab @ Rts
        Rts = Rts + normbar(Rtt).T @ abar("cross", l) @ normbar(Rss)
    return Rts[q]

rollout = rts(lambda b, l: A[b][l].mean(0))
grad = rts(lambda b, l: np.clip(-G[b][l] * A[b][l], 0, None).mean(0))
print(json.dumps({"tokens": [str(t) for t in z["tokens/source"][0]], "rollout": rollout.tolist(), "grad": grad.tolist()}))
`

// traceRow is one table line of the Trace screen: position, token and the
// percentage (NaN for "–") of each method column.
type traceRow struct {
	pos  int
	tok  string
	pcts []float64
}

var traceRowRE = regexp.MustCompile(`^\s*(\d+) (\S+)\s`)

// traceRows reads the table of the Trace screen from a frame: the lines
// after the "# token" header that start with a position and a token.
func traceRows(frame string) []traceRow {
	var rows []traceRow
	in := false
	for _, line := range strings.Split(frame, "\n") {
		if strings.Contains(line, "# token") {
			in = true
			continue
		}
		m := traceRowRE.FindStringSubmatch(line)
		if !in || m == nil {
			continue
		}
		r := traceRow{tok: m[2]}
		r.pos, _ = strconv.Atoi(m[1])
		for _, f := range strings.Fields(line[len(m[0]):]) {
			if f == "–" {
				r.pcts = append(r.pcts, math.NaN())
			} else if p, err := strconv.ParseFloat(strings.TrimSuffix(f, "%"), 64); err == nil && strings.HasSuffix(f, "%") {
				r.pcts = append(r.pcts, p)
			}
		}
		rows = append(rows, r)
	}
	return rows
}

// TestFlowTraceEncoderDecoder: on the demo (an encoder-decoder export:
// blocks encoder, decoder and cross), the Trace screen of the cross block
// explains a target position by the source tokens through cross-attention
// with every method: rollout and grad as percentages of their totals that
// match numpy's Chefer et al. (2021) relevance (encDecTraceScript), flow
// refused (Abnar & Zuidema 2020 define it over self-attention stacks) with a
// note that points to the screen's other columns, not to heed trace's
// --method flag. The source tokens are
// those of the generator's record (results.json) and of the export as numpy
// reads it.
func TestFlowTraceEncoderDecoder(t *testing.T) {
	python(t)
	dir := t.TempDir()
	if _, err := demo.Export(dir, false); err != nil {
		t.Fatal(err)
	}
	res, err := demo.LoadResults()
	if err != nil {
		t.Fatal(err)
	}
	file := filepath.Join(dir, res.Demo.Open) // the export heed demo opens
	const q = 5                               // "-" of "<bos>2070-11-19", which predicts the month (heed demo's trace hint)
	var ref struct {
		Tokens        []string
		Rollout, Grad []float64
	}
	numpyRef(t, encDecTraceScript, &ref, file, strconv.Itoa(q))
	if words := strings.Fields(res.Batch[0].Source); strings.Join(words, " ") != strings.Join(ref.Tokens, " ") {
		t.Fatalf("source tokens: numpy reads %q, the generator recorded %q", ref.Tokens, words)
	}
	loc, err := words.ParseLoc(res.Demo.At)
	if err != nil {
		t.Fatal(err)
	}
	loc.Query = q
	f := start(t, 80, 24, Options{At: loc.String()}, file)
	f.see("[2 Map]")
	f.key("4")
	f.see("Trace · decoder · q 5", "shares of the target tokens")
	f.key("(") // the previous block: cross (blocks are in name order)
	f.see("Trace · cross · q 5", "shares of the source tokens", "# token")
	var frame string
	f.until("the cross trace with every method", func(s string) bool {
		frame = s
		return !strings.Contains(s, "tracing…") && strings.Contains(s, "grad: shares are not normalised")
	})
	for _, want := range []string{"rollout: shares are not normalised: they sum to " + strconv.FormatFloat(sum(ref.Rollout), 'g', 4, 64),
		"grad: shares are not normalised: they sum to " + strconv.FormatFloat(sum(ref.Grad), 'g', 4, 64),
		"flow: defined for self-attention stacks only; see the rollout and grad columns"} {
		if !strings.Contains(frame, want) {
			t.Errorf("no line %q (totals by numpy):\n%s", want, frame)
		}
	}
	if strings.Contains(frame, "--method") {
		t.Errorf("the Trace screen gives heed trace's flag as advice:\n%s", frame)
	}
	rows := traceRows(frame)
	if len(rows) != len(ref.Tokens) {
		t.Fatalf("%d token rows, numpy has %d source tokens:\n%s", len(rows), len(ref.Tokens), frame)
	}
	var rolloutSum float64
	for i, r := range rows {
		if r.pos != i || r.tok != ref.Tokens[i] || len(r.pcts) != 3 {
			t.Fatalf("row %d: %+v, want position %d, token %q and 3 method columns (rollout, flow, grad)\n%s", i, r, i, ref.Tokens[i], frame)
		}
		// the screen rounds to 0.1%; numpy and heed sum in different orders
		for mi, want := range []float64{100 * ref.Rollout[i] / sum(ref.Rollout), math.NaN(), 100 * ref.Grad[i] / sum(ref.Grad)} {
			got := r.pcts[mi]
			if math.IsNaN(want) != math.IsNaN(got) || math.Abs(got-want) > 0.05+1e-6 {
				t.Errorf("%s, method %d: %.1f%%, numpy %.3f%%", ref.Tokens[i], mi, got, want)
			}
		}
		rolloutSum += r.pcts[0]
	}
	if math.Abs(rolloutSum-100) > 0.05*float64(len(rows)) {
		t.Errorf("rollout shares shown sum to %.1f%%, want 100%% within rounding", rolloutSum)
	}
	// The readout of the selected token gives its shares to 4 significant
	// digits (the grad relevance here is ~1e-5: too small for a percentage
	// of 1 to show).
	f.key("down")
	f.key("down")
	want := fmt.Sprintf("2 %q: rollout %s · flow – · grad %s", ref.Tokens[2],
		strconv.FormatFloat(ref.Rollout[2], 'g', 4, 64), strconv.FormatFloat(ref.Grad[2], 'g', 4, 64))
	f.see(want)
	f.quit()
}

func sum(v []float64) float64 {
	var s float64
	for _, x := range v {
		s += x
	}
	return s
}
