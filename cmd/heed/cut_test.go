package main

import (
	"encoding/json"
	"path/filepath"
	"strings"
	"testing"
)

// TestCheckCut: an under-allowing mask (testdata/cases/gen_cases.py runs
// torch.nn.MultiheadAttention with the decoder's triangular mask passed to
// cross-attention, and a prefix-LM with a plain causal mask) is a finding of
// rule cut with no forbidden mass, named in the diagnosis, and exit 1; the
// correct twins are clean.
func TestCheckCut(t *testing.T) {
	type report struct {
		Clean    bool `json:"clean"`
		Findings []struct {
			Block string  `json:"block"`
			Rule  string  `json:"rule"`
			Mass  float64 `json:"mass"`
			Cells int64   `json:"cells"`
			Rows  int64   `json:"rows"`
		} `json:"findings"`
		Diagnosis []struct {
			Pattern  string   `json:"pattern"`
			Rule     string   `json:"rule"`
			Text     string   `json:"text"`
			Evidence []string `json:"evidence"`
		} `json:"diagnosis"`
	}
	for _, c := range []struct {
		file, block, pattern string
		args                 []string
	}{
		{"cross_causal", "cross", "cross_causal", nil},
		{"cross_causal", "cross", "cross_causal", []string{"--rule", "padding", "--rule", "cut"}},
		{"prefix_causal", "decoder", "prefix_causal", nil},
	} {
		args := append(append([]string{"check", "--json"}, c.args...), filepath.Join(casesDir, c.file+"_bad.npz"))
		out, code := run(t, args...)
		if code != 1 {
			t.Fatalf("%v: exit %d, want 1\n%s", args, code, out)
		}
		var rep report
		if err := json.Unmarshal([]byte(out), &rep); err != nil {
			t.Fatal(err)
		}
		if rep.Clean || len(rep.Findings) != 1 || len(rep.Diagnosis) != 1 {
			t.Fatalf("%v: want one finding and one diagnosis\n%s", args, out)
		}
		f, d := rep.Findings[0], rep.Diagnosis[0]
		if f.Block != c.block || f.Rule != "cut" || f.Mass != 0 || f.Cells == 0 || f.Rows == 0 {
			t.Errorf("%v: finding %+v, want rule cut in %s with mass 0", args, f, c.block)
		}
		if d.Pattern != c.pattern || d.Rule != "cut" || !strings.Contains(strings.Join(d.Evidence, "\n"), "(100.0%)") {
			t.Errorf("%v: diagnosis %+v, want %s with every row cut", args, d, c.pattern)
		}
		good := filepath.Join(casesDir, c.file+"_good.npz")
		if out, code := run(t, append(append([]string{"check"}, c.args...), good)...); code != 0 {
			t.Errorf("%s: exit %d, want 0\n%s", good, code, out)
		}
	}
	// --rule cut without the prefix rule reads no prefix rows
	if out, code := run(t, "check", "--rule", "causal", "--rule", "cut", filepath.Join(casesDir, "prefix_causal_bad.npz")); code != 0 {
		t.Errorf("prefix_causal without the prefix rule: exit %d, want 0\n%s", code, out)
	}
	// the other half of a wrong prefix-LM mask: a leak named as such
	out, _ := run(t, "check", filepath.Join(casesDir, "prefix_bad.npz"))
	if !strings.Contains(out, "The prefix sees the suffix") {
		t.Errorf("prefix leak not named \"the prefix sees the suffix\":\n%s", out)
	}
}
