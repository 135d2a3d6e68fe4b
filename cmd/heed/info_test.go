package main

import (
	"bytes"
	"encoding/json"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"strings"
	"testing"

	"github.com/heed-dev/heed/internal/testpy"
	"github.com/heed-dev/heed/loader"
)

const fixturesDir = "../../testdata/fixtures"

// infoRun executes "heed info" with args; it returns stdout, the exit code and the error.
func infoRun(t *testing.T, args ...string) (string, int, error) {
	t.Helper()
	var out, errb bytes.Buffer
	err := execRoot(&out, &errb, append([]string{"info"}, args...)...)
	return out.String(), exitCode(err, false), err
}

// TestInfoJSONFixtures compares "heed info --json" with what the fixture
// generator (testdata/gen_fixtures.py) wrote each export with: numpy savez,
// h5py, hand-written safetensors, a directory of NPY files.
func TestInfoJSONFixtures(t *testing.T) {
	var expect map[string]struct {
		Blocks []map[string]any `json:"blocks"`
		Sides  []map[string]any `json:"sides"`
	}
	b, err := os.ReadFile(filepath.Join(fixturesDir, "exports", "expect.json"))
	if err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(b, &expect); err != nil {
		t.Fatal(err)
	}
	if len(expect) < 7 {
		t.Fatalf("%d exports in expect.json", len(expect))
	}
	for file, want := range expect {
		t.Run(file, func(t *testing.T) {
			if strings.HasSuffix(file, ".h5") && !loader.HDF5Supported {
				t.Skip("built without HDF5")
			}
			out, code, err := infoRun(t, "--json", filepath.Join(fixturesDir, "exports", file))
			if code != 0 {
				t.Fatalf("exit %d: %v", code, err)
			}
			var got struct {
				Format string           `json:"format"`
				Blocks []map[string]any `json:"blocks"`
				Sides  []map[string]any `json:"sides"`
			}
			if err := json.Unmarshal([]byte(out), &got); err != nil {
				t.Fatalf("%v\n%s", err, out)
			}
			if len(got.Blocks) != len(want.Blocks) || len(got.Sides) != len(want.Sides) {
				t.Fatalf("%d blocks %d sides, want %d and %d\n%s", len(got.Blocks), len(got.Sides), len(want.Blocks), len(want.Sides), out)
			}
			for i, wb := range want.Blocks {
				for k, v := range wb {
					if !reflect.DeepEqual(got.Blocks[i][k], v) {
						t.Errorf("block %v: %s = %v, want %v", wb["name"], k, got.Blocks[i][k], v)
					}
				}
			}
			for i, ws := range want.Sides {
				for k, v := range ws {
					if !reflect.DeepEqual(got.Sides[i][k], v) {
						t.Errorf("side %v: %s = %v, want %v", ws["name"], k, got.Sides[i][k], v)
					}
				}
			}
		})
	}
}

func TestInfoText(t *testing.T) {
	out, code, err := infoRun(t, filepath.Join(fixturesDir, "exports", "causal.npz"))
	if code != 0 {
		t.Fatal(err)
	}
	for _, want := range []string{"block decoder  (causal, f16)", "2 layers x batch 2 x 2 heads x 5 queries x 5 keys",
		"rules       causal, padding\n", "row checks  nan_rows, row_sum, negative\n", `"The" " cat" " sat" " on" "<pad>"`, "2 padding positions", "not verdicts"} {
		if !strings.Contains(out, want) {
			t.Errorf("text output lacks %q:\n%s", want, out)
		}
	}
}

// TestInfoFlags: --kind and --tokens turn a metadata-less array into a causal block with tokens.
func TestInfoFlags(t *testing.T) {
	tok := filepath.Join(t.TempDir(), "tokens.json")
	os.WriteFile(tok, []byte(`["w","x","y","z"]`), 0o644)
	out, code, err := infoRun(t, "--json", "--kind", "causal", "--tokens", tok, filepath.Join(fixturesDir, "exports", "lone.npy"))
	if code != 0 {
		t.Fatal(err)
	}
	var got infoReport
	if err := json.Unmarshal([]byte(out), &got); err != nil {
		t.Fatal(err)
	}
	b := got.Blocks[0]
	if b.Kind != "causal" || b.QuerySide != "target" || !reflect.DeepEqual(b.Rules, []string{"causal"}) ||
		!reflect.DeepEqual(b.RowChecks, []string{"nan_rows", "row_sum", "negative"}) ||
		len(got.Sides) != 1 || !reflect.DeepEqual(got.Sides[0].FirstTokens, []string{"w", "x", "y", "z"}) {
		t.Errorf("info = %+v", got)
	}
	_, code, err = infoRun(t, "--kind", "sideways", filepath.Join(fixturesDir, "exports", "lone.npy"))
	if code != 2 || !strings.Contains(err.Error(), "--kind") {
		t.Errorf("bad --kind: exit %d, %v", code, err)
	}
}

// TestInfoBadInputs: every bad input is exit 2 with one line naming the file.
func TestInfoBadInputs(t *testing.T) {
	files, _ := filepath.Glob(filepath.Join(fixturesDir, "bad", "*"))
	if len(files) < 20 {
		t.Fatalf("%d bad inputs", len(files))
	}
	for _, f := range files {
		_, code, err := infoRun(t, f)
		if code != 2 || err == nil {
			t.Errorf("%s: exit %d, want 2", f, code)
			continue
		}
		if msg := err.Error(); strings.Contains(msg, "\n") || !strings.Contains(msg, f) {
			t.Errorf("%s: error %q, want one line naming the file", f, msg)
		}
	}
	if _, code, err := infoRun(t, filepath.Join(fixturesDir, "no-such-file.npz")); code != 2 || !strings.Contains(err.Error(), "no such file") {
		t.Errorf("missing file: exit %d, %v", code, err)
	}
}

// infoBlockRules runs "heed info --json" and returns each block's mask
// rules and row checks.
func infoBlockRules(t *testing.T, args ...string) (rules, rows map[string][]string) {
	t.Helper()
	out, code, err := infoRun(t, append([]string{"--json"}, args...)...)
	if code != 0 {
		t.Fatalf("info %v: exit %d: %v", args, code, err)
	}
	var rep infoReport
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatalf("%v\n%s", err, out)
	}
	rules, rows = map[string][]string{}, map[string][]string{}
	for _, b := range rep.Blocks {
		rules[b.Name], rows[b.Name] = b.Rules, b.RowChecks
	}
	return rules, rows
}

func hasRule(rules []string, r string) bool {
	for _, x := range rules {
		if x == r {
			return true
		}
	}
	return false
}

// TestInfoCutRule: info lists row check cut where heed check reads rows for it
// (docs/json.md, "Under-allowing masks"): every block of kind cross, and a
// causal block with a prefix; not a causal block without one, nor a
// bidirectional one, whose prefix check does not apply either. The torch
// cases of testdata/cases/gen_cases.py (a decoder's causal mask passed to
// cross-attention; a prefix-LM given a plain causal mask) are where check
// reports its cut finding (TestCheckCut): info must list cut on that block,
// in the JSON and in the text. The fixture generator's expectations for a
// cross block (encdec.h5) and a causal block with prefix 2 (attrs.h5) are
// checked by TestInfoJSONFixtures.
func TestInfoCutRule(t *testing.T) {
	for _, c := range []struct {
		file, cutBlock string
		others         []string
	}{
		{"cross_causal_bad.npz", "cross", []string{"decoder", "encoder"}},
		{"cross_causal_good.npz", "cross", []string{"decoder", "encoder"}},
		{"prefix_causal_bad.npz", "decoder", nil},
	} {
		path := filepath.Join(casesDir, c.file)
		_, rows := infoBlockRules(t, path)
		if !hasRule(rows[c.cutBlock], "cut") {
			t.Errorf("%s: block %s row checks %v, want cut", c.file, c.cutBlock, rows[c.cutBlock])
		}
		for _, o := range c.others {
			if r, ok := rows[o]; !ok || hasRule(r, "cut") {
				t.Errorf("%s: block %s row checks %v (present %v), want no cut", c.file, o, r, ok)
			}
		}
		if len(rows) != 1+len(c.others) {
			t.Errorf("%s: blocks %v", c.file, rows)
		}
		out, _, _ := infoRun(t, path)
		sec := out[strings.Index(out, "block "+c.cutBlock+" "):]
		if line := sec[strings.Index(sec, "  row checks"):]; !strings.HasSuffix(strings.SplitN(line, "\n", 2)[0], ", cut") {
			t.Errorf("%s: text row checks of block %s: %q, want cut last", c.file, c.cutBlock, strings.SplitN(line, "\n", 2)[0])
		}
		if strings.HasSuffix(c.file, "_bad.npz") {
			// check's finding of rule cut is on the block info names
			js, code := run(t, "check", "--json", path)
			var rep struct {
				Findings []struct{ Block, Rule string } `json:"findings"`
			}
			if err := json.Unmarshal([]byte(js), &rep); err != nil || code != 1 || len(rep.Findings) == 0 {
				t.Fatalf("check %s: exit %d, %v\n%s", c.file, code, err, js)
			}
			for _, f := range rep.Findings {
				if f.Rule == "cut" && f.Block != c.cutBlock {
					t.Errorf("%s: check found rule cut in %s, info lists it for %s", c.file, f.Block, c.cutBlock)
				}
			}
		}
	}
	// flags on a metadata-less square array: the kind and prefix decide
	lone := filepath.Join(fixturesDir, "exports", "lone.npy")
	for _, c := range []struct {
		args []string
		cut  bool
	}{
		{[]string{"--kind", "causal", "--prefix", "2"}, true},
		{[]string{"--kind", "causal"}, false},
		{[]string{"--kind", "bidirectional", "--prefix", "2"}, false},
		{nil, false},
	} {
		_, rows := infoBlockRules(t, append(c.args, lone)...)
		if got := hasRule(rows["lone"], "cut"); got != c.cut {
			t.Errorf("lone.npy %v: row checks %v, cut %v, want %v", c.args, rows["lone"], got, c.cut)
		}
	}
}

// TestInfoRulesAreChecks: what info says heed check will run is what check
// runs. On every fixture export and torch case, and on a metadata-less
// array given settings by flags, info's mask rules per block are check's
// "rules" of that block (its "rules checked:" line); in particular a prefix
// P on a bidirectional block, where every query sees every key anyway,
// brings no prefix rule (analysis applies it to causal blocks only) and no
// cut. Every block lists the row checks nan_rows, row_sum and negative, and
// check does report a negative cell on an export where numpy wrote one.
func TestInfoRulesAreChecks(t *testing.T) {
	files, _ := filepath.Glob(filepath.Join(casesDir, "*.npz"))
	exports, _ := filepath.Glob(filepath.Join(fixturesDir, "exports", "*"))
	var runs [][]string
	for _, f := range append(files, exports...) {
		if strings.HasSuffix(f, ".json") || strings.HasSuffix(f, ".h5") && !loader.HDF5Supported {
			continue
		}
		runs = append(runs, []string{f})
	}
	if len(runs) < 30 {
		t.Fatalf("%d inputs", len(runs))
	}
	lone := filepath.Join(fixturesDir, "exports", "lone.npy")
	for _, flags := range [][]string{{"--kind", "bidirectional", "--prefix", "2"}, {"--kind", "causal", "--prefix", "2"},
		{"--kind", "causal", "--window", "2"}, {"--kind", "bidirectional", "--window", "2"}} {
		runs = append(runs, append(flags, lone))
	}
	for _, args := range runs {
		rules, rows := infoBlockRules(t, args...)
		js, code := run(t, append([]string{"check", "--json"}, args...)...)
		var rep struct {
			Rules map[string][]string `json:"rules"`
		}
		if err := json.Unmarshal([]byte(js), &rep); err != nil || code > 1 {
			t.Fatalf("check %v: exit %d, %v\n%s", args, code, err, js)
		}
		if len(rep.Rules) == 0 {
			t.Fatalf("check %v: no rules per block\n%s", args, js)
		}
		for b, want := range rep.Rules {
			got, ok := rules[b]
			if !ok || strings.Join(got, ",") != strings.Join(want, ",") {
				t.Errorf("%v: block %s: info lists rules %v, check checked %v", args, b, got, want)
			}
			if r := rows[b]; len(r) < 3 || strings.Join(r[:3], ",") != "nan_rows,row_sum,negative" {
				t.Errorf("%v: block %s: row checks %v, want nan_rows, row_sum, negative first", args, b, r)
			}
		}
	}
	rules, rows := infoBlockRules(t, "--kind", "bidirectional", "--prefix", "2", lone)
	if hasRule(rules["lone"], "prefix") || hasRule(rows["lone"], "cut") {
		t.Errorf("bidirectional block with prefix 2: rules %v, row checks %v; want neither prefix nor cut", rules["lone"], rows["lone"])
	}
	out, _, _ := infoRun(t, "--kind", "bidirectional", "--prefix", "2", lone)
	if !strings.Contains(out, "  rules       none\n") {
		t.Errorf("bidirectional block with prefix 2: text lacks \"rules       none\":\n%s", out)
	}

	// numpy writes rows that sum to 1 with one negative weight (-0.25 at
	// query 1, key 0 of head 0); check must report rule negative, which info
	// lists for the block
	py := testpy.Require(t, "numpy")
	neg := filepath.Join(t.TempDir(), "neg.npy")
	if b, err := exec.Command(py, "-c", `
import sys, numpy as np
a = np.full((2, 4, 4), 0.25)
a[0, 1] = [-0.25, 0.75, 0.25, 0.25]
np.save(sys.argv[1], a)
`, neg).CombinedOutput(); err != nil {
		t.Fatalf("numpy: %v: %s", err, b)
	}
	_, rows = infoBlockRules(t, "--kind", "bidirectional", neg)
	if !hasRule(rows["neg"], "negative") {
		t.Errorf("neg.npy: row checks %v, want negative", rows["neg"])
	}
	js, code := run(t, "check", "--json", "--kind", "bidirectional", neg)
	var rep struct {
		Findings []struct {
			Block, Rule string
			Cells       int
		} `json:"findings"`
	}
	if err := json.Unmarshal([]byte(js), &rep); err != nil || code != 1 {
		t.Fatalf("check neg.npy: exit %d, %v\n%s", code, err, js)
	}
	found := false
	for _, f := range rep.Findings {
		found = found || f.Block == "neg" && f.Rule == "negative" && f.Cells == 1
	}
	if !found {
		t.Errorf("check neg.npy: no finding of rule negative with 1 cell on block neg\n%s", js)
	}
}
