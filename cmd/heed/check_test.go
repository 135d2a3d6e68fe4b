package main

import (
	"bytes"
	"context"
	"encoding/json"
	"io"
	"path/filepath"
	"strings"
	"testing"

	"github.com/heed-dev/heed/internal/words"
)

const casesDir = "../../testdata/cases"

// run executes the root command with args and returns stdout and the exit code.
func run(t *testing.T, args ...string) (string, int) {
	t.Helper()
	var out bytes.Buffer
	err := execRoot(&out, &out, args...)
	return out.String(), exitCode(err, false)
}

// execRoot runs heed's root command in this process with args, its output
// to stdout and its messages to stderr (one writer for both in run).
func execRoot(stdout, stderr io.Writer, args ...string) error {
	cmd := newRootCmd()
	cmd.SetOut(stdout)
	cmd.SetErr(stderr)
	cmd.SetArgs(args)
	return cmd.ExecuteContext(context.Background())
}

func TestCheckExitCodes(t *testing.T) {
	out, code := run(t, "check", filepath.Join(casesDir, "shift_bad.npz"))
	if code != 1 {
		t.Fatalf("leaking export: exit %d, want 1\n%s", code, out)
	}
	first := strings.SplitN(out, "\n", 5)
	head := strings.Join(first[:4], "\n")
	// the first lines say what is wrong, where, and what to look at
	for _, want := range []string{"likely bug", "re-evaluating the model", "shifted by +1", "look at:  decoder:L", "check:"} {
		if !strings.Contains(head, want) {
			t.Errorf("first lines lack %q:\n%s", want, head)
		}
	}
	if out, code := run(t, "check", filepath.Join(casesDir, "shift_good.npz")); code != 0 || !strings.Contains(out, "clean") {
		t.Fatalf("correct export: exit %d, want 0\n%s", code, out)
	}
	if _, code := run(t, "check", filepath.Join(casesDir, "expected.json")); code != 2 {
		t.Fatalf("not an export: exit %d, want 2", code)
	}
	if _, code := run(t, "check", "--rule", "nonsense", filepath.Join(casesDir, "shift_good.npz")); code != 2 {
		t.Fatalf("bad --rule: exit %d, want 2", code)
	}
	if _, code := run(t, "check", "--rule", "window", filepath.Join(casesDir, "shift_good.npz")); code != 2 {
		t.Fatalf("--rule window without a window: exit %d, want 2", code)
	}
	// only the row checks: the shifted mask is not looked for
	if out, code := run(t, "check", "--rule", "nan_rows", "--rule", "row_sum", filepath.Join(casesDir, "shift_bad.npz")); code != 0 {
		t.Fatalf("--rule nan_rows,row_sum on a leak-only export: exit %d, want 0\n%s", code, out)
	}
}

func TestCheckJSON(t *testing.T) {
	out, code := run(t, "check", "--json", filepath.Join(casesDir, "window_bad.npz"))
	if code != 1 {
		t.Fatalf("exit %d", code)
	}
	var rep struct {
		Clean    bool `json:"clean"`
		Findings []struct {
			Block   string  `json:"block"`
			Rule    string  `json:"rule"`
			Layer   []int   `json:"layer"`
			Head    []int   `json:"head"`
			Batch   []int   `json:"batch"`
			Mass    float64 `json:"mass"`
			Cells   int64   `json:"cells"`
			Max     float64 `json:"max"`
			Rows    int64   `json:"rows"`
			Offsets []struct {
				Offset int   `json:"offset"`
				Count  int64 `json:"count"`
			} `json:"offsets"`
			Worst struct {
				Loc   string `json:"loc"`
				Query int    `json:"query"`
				Key   int    `json:"key"`
			} `json:"worst"`
		} `json:"findings"`
		Diagnosis []struct {
			Pattern string  `json:"pattern"`
			Text    string  `json:"text"`
			Value   float64 `json:"value"`
		} `json:"diagnosis"`
	}
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatalf("%v\n%s", err, out)
	}
	if rep.Clean || len(rep.Findings) != 1 || len(rep.Diagnosis) != 1 {
		t.Fatalf("clean %v, %d findings, %d diagnoses", rep.Clean, len(rep.Findings), len(rep.Diagnosis))
	}
	f := rep.Findings[0]
	if f.Rule != "window" || len(f.Offsets) != 1 || f.Offsets[0].Offset != -4 || f.Worst.Key != f.Worst.Query-4 || !strings.HasPrefix(f.Worst.Loc, "decoder:L") {
		t.Errorf("finding %+v", f)
	}
	d := rep.Diagnosis[0]
	if d.Pattern != "window_too_wide" || d.Value != 1 || !strings.Contains(d.Text, "re-evaluating the model") {
		t.Errorf("diagnosis %+v", d)
	}
	out, code = run(t, "check", "--json", filepath.Join(casesDir, "window_good.npz"))
	if code != 0 || !strings.Contains(out, `"clean": true`) || !strings.Contains(out, `"findings": []`) {
		t.Fatalf("clean JSON: exit %d\n%s", code, out)
	}
}

func TestRankPlanAndFormats(t *testing.T) {
	dir := filepath.Join(casesDir, "importance")
	out, code := run(t, "rank", "--json", "--prune-frac", "0.25", dir)
	if code != 0 {
		t.Fatalf("exit %d\n%s", code, out)
	}
	var rep struct {
		Metric string           `json:"metric"`
		Heads  []map[string]any `json:"heads"`
		Plan   struct {
			Heads    map[string]map[string][]int `json:"heads"`
			Pruned   int                         `json:"pruned"`
			Curve    []map[string]any            `json:"curve"`
			Warnings []string                    `json:"warnings"`
		} `json:"plan"`
	}
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatal(err)
	}
	if rep.Metric != "importance" || len(rep.Heads) != 8 || rep.Plan.Pruned != 2 || len(rep.Plan.Curve) == 0 {
		t.Fatalf("metric %s, %d heads, %d pruned", rep.Metric, len(rep.Heads), rep.Plan.Pruned)
	}
	for _, k := range []string{"block", "layer", "head", "entropy", "entropy_norm", "confidence", "distance", "sink", "distinctness", "importance", "keep_score",
		"redundancy", "confidence_x_js"} { // the old names stay for one version (docs/json.md)
		if _, ok := rep.Heads[0][k]; !ok {
			t.Errorf("heads[0] lacks %q", k)
		}
	}
	all := strings.Join(rep.Plan.Warnings, " ")
	if !strings.Contains(all, "saves no compute") || !strings.Contains(all, "re-evaluating the model") {
		t.Errorf("plan warnings: %v", rep.Plan.Warnings)
	}
	// without gradients: importance is null and the heuristic is named
	out, _ = run(t, "rank", "--json", filepath.Join(casesDir, "stats.npz"))
	if !strings.Contains(out, `"importance": null`) || !strings.Contains(out, `"metric": "keep_score"`) {
		t.Errorf("rank without gradients:\n%s", out[:min(len(out), 600)])
	}
	out, _ = run(t, "rank", "--csv", "--sort", "-entropy", filepath.Join(casesDir, "stats.npz"))
	lines := strings.Split(strings.TrimSpace(out), "\n")
	if len(lines) != 7 || !strings.HasPrefix(lines[0], "block,layer,head,entropy") {
		t.Fatalf("csv:\n%s", out)
	}
	// --sort takes the old names for one version
	old, _ := run(t, "rank", "--csv", "--sort", "-redundancy", filepath.Join(casesDir, "stats.npz"))
	if neu, _ := run(t, "rank", "--csv", "--sort", "-distinctness", filepath.Join(casesDir, "stats.npz")); old != neu {
		t.Errorf("--sort -redundancy differs from --sort -distinctness:\n%s\n%s", old, neu)
	}
	if _, code := run(t, "rank", "--sort", "bogus", dir); code != 2 {
		t.Errorf("bad --sort: exit %d", code)
	}
}

func TestTraceJSON(t *testing.T) {
	out, code := run(t, "trace", "--json", "--query", "4", filepath.Join(casesDir, "encdec_grad.npz"))
	if code != 0 {
		t.Fatalf("exit %d\n%s", code, out)
	}
	var rep struct {
		Block  string `json:"block"`
		Query  int    `json:"query"`
		Method string `json:"method"`
		Tokens []struct {
			Index int     `json:"index"`
			Token string  `json:"token"`
			Share float64 `json:"share"`
		} `json:"tokens"`
	}
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatal(err)
	}
	if rep.Block != "cross" || rep.Query != 4 || rep.Method != "rollout" || len(rep.Tokens) != 7 || rep.Tokens[0].Token == "" {
		t.Fatalf("%+v", rep)
	}
	if _, code := run(t, "trace", filepath.Join(casesDir, "stats.npz")); code != 2 {
		t.Errorf("trace without --query: exit %d", code)
	}
	if _, code := run(t, "trace", "--query", "1", "--method", "grad", filepath.Join(casesDir, "stats.npz")); code != 2 {
		t.Errorf("grad without gradients: exit %d", code)
	}
}

// A float64 export of a softmax computed in float32 (the fixture lone.npy:
// numpy softmax rows in float32 saved with astype("<f8"), gen_fixtures.py)
// has rows off by about 1e-8: clean under the default tolerance for f64,
// flagged when --sum-tol asks for float64 rounding.
func TestCheckFloat64FromFloat32(t *testing.T) {
	lone := filepath.Join("..", "..", "testdata", "fixtures", "exports", "lone.npy")
	if out, code := run(t, "check", "--kind", "bidirectional", lone); code != 0 {
		t.Errorf("f64 export of f32 softmax rows: exit %d, want 0\n%s", code, out)
	}
	if out, code := run(t, "check", "--kind", "bidirectional", "--sum-tol", "1e-9", lone); code != 1 || !strings.Contains(out, "row_sum") {
		t.Errorf("--sum-tol 1e-9: exit %d, want 1 with a row_sum finding\n%s", code, out)
	}
}

// TestCheckOptionsOfSettings: every option the words of a diagnosis, note
// or gap name for a setting, and the loader's messages (words.Option, through internal/prose,
// words.WithOption and loader.Options.SettingName) is a flag of heed check.
func TestCheckOptionsOfSettings(t *testing.T) {
	cmd := newCheckCmd()
	for _, s := range []string{"kind", "query_start", "compute_dtype", "sum_below", "tol", "axes", "group"} {
		opt := words.Option(s)
		if opt == "" || cmd.Flags().Lookup(strings.TrimPrefix(opt, "--")) == nil {
			t.Errorf("setting %s: option %q is not a flag of heed check", s, opt)
		}
	}
}
