package main

import (
	"archive/zip"
	"encoding/json"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"
)

const verdictDir = "../../testdata/verdict"

// verdictCase is one entry of testdata/verdict/cases.json: what
// testdata/verdict/gen.py did with PyTorch and what heed must conclude from
// the export alone (see gen.py's docstring).
type verdictCase struct {
	Verdict      string `json:"verdict"`
	Kind         string `json:"kind"`
	KindFrom     string `json:"kind_from"`
	Window       int    `json:"window"`
	Prefix       int    `json:"prefix"`
	Positions    string `json:"positions"`
	Rule         string `json:"rule"`
	Layers       []int  `json:"layers"`
	Heads        []int  `json:"heads"`
	Offsets      []int  `json:"offsets"`
	Batch        []int  `json:"batch"`
	Note         string `json:"note"`
	ComputeDType string `json:"compute_dtype"`
	AxesFrom     string `json:"axes_from"`
	Axes         string `json:"axes"`
	AxesOther    string `json:"axes_other"`
	BatchAxes    int    `json:"batch_with_axes"`
	ZerosAfter   *int   `json:"rows_ending_in_zeros"`
}

// TestVerdicts judges exports made with torch.nn.MultiheadAttention that
// tell heed little (no metadata, guessed axes, a static-cache decode step, a
// bfloat16 model saved as float32, sharp float16 cross-attention): no
// export is called clean that was not judged, every leak is found with the
// layers, heads and offsets gen.py let through, and nothing else is called
// a likely bug.
func TestVerdicts(t *testing.T) {
	raw, err := os.ReadFile(filepath.Join(verdictDir, "cases.json"))
	if err != nil {
		t.Fatal(err)
	}
	var cases map[string]verdictCase
	if err := json.Unmarshal(raw, &cases); err != nil {
		t.Fatal(err)
	}
	wantCode := map[string]int{"clean": 0, "findings": 1, "not_judged": 3}
	for name, c := range cases {
		t.Run(name, func(t *testing.T) {
			file := filepath.Join(verdictDir, name+".npz")
			if _, err := os.Stat(file); err != nil {
				file = filepath.Join(verdictDir, name+".npy")
			}
			out, code := run(t, "check", "--json", file)
			if code != wantCode[c.Verdict] {
				t.Fatalf("exit %d, want %d (%s)\n%s", code, wantCode[c.Verdict], c.Verdict, out)
			}
			var rep struct {
				Verdict  string `json:"verdict"`
				Clean    bool   `json:"clean"`
				Findings []struct {
					Rule    string `json:"rule"`
					Layer   []int  `json:"layer"`
					Head    []int  `json:"head"`
					Batch   []int  `json:"batch"`
					Offsets []struct {
						Offset int `json:"offset"`
					} `json:"offsets"`
				} `json:"findings"`
				Diagnosis []struct{ Pattern string } `json:"diagnosis"`
				Notes     []string                   `json:"notes"`
			}
			if err := json.Unmarshal([]byte(out), &rep); err != nil {
				t.Fatalf("%v\n%s", err, out)
			}
			if rep.Verdict != c.Verdict || rep.Clean != (c.Verdict == "clean") {
				t.Fatalf("verdict %q clean %v, want %q", rep.Verdict, rep.Clean, c.Verdict)
			}
			var cov struct {
				Coverage []map[string]any `json:"coverage"`
			}
			if err := json.Unmarshal([]byte(out), &cov); err != nil {
				t.Fatal(err)
			}
			for i, cv := range cov.Coverage {
				str := func(k string) string { s, _ := cv[k].(string); return s }
				num := func(k string) int { f, _ := cv[k].(float64); return int(f) }
				if str("kind") != c.Kind || str("kind_from") != c.KindFrom {
					t.Errorf("block %d: kind %q from %q, want %q from %q (evidence: %v)", i, str("kind"), str("kind_from"), c.Kind, c.KindFrom, cv["evidence"])
				}
				if num("window") != c.Window || num("prefix") != c.Prefix {
					t.Errorf("block %d: window %d prefix %d, want %d and %d", i, num("window"), num("prefix"), c.Window, c.Prefix)
				}
				if c.Positions != "" && str("positions") != c.Positions {
					t.Errorf("block %d: positions %q, want %q", i, str("positions"), c.Positions)
				}
				if c.ComputeDType != "" && str("compute_dtype") != c.ComputeDType {
					t.Errorf("block %d: compute dtype %q, want %q", i, str("compute_dtype"), c.ComputeDType)
				}
				if c.AxesFrom != "" && (str("axes_from") != c.AxesFrom || str("axes") != c.Axes || str("axes_other") != c.AxesOther) {
					t.Errorf("block %d: axes %q from %q (other %q), want %q from %q (other %q)", i, str("axes"), str("axes_from"), str("axes_other"), c.Axes, c.AxesFrom, c.AxesOther)
				}
				judged, _ := cv["judged"].(bool)
				gaps, _ := cv["not_judged"].([]any)
				if judged == (len(gaps) > 0) {
					t.Errorf("block %d: judged %v with %d gaps", i, judged, len(gaps))
				}
				for _, g := range gaps {
					gm := g.(map[string]any)
					if fix, _ := gm["fix"].(string); !strings.Contains(fix, "--") || !strings.Contains(fix, "meta") {
						t.Errorf("block %d: a gap must name the flag and the metadata key that let heed judge: %v", i, gm)
					}
				}
			}
			if c.Verdict == "findings" {
				if len(rep.Findings) == 0 {
					t.Fatal("no findings")
				}
				for _, f := range rep.Findings {
					if f.Rule != c.Rule || !slices.Equal(f.Layer, c.Layers) || !slices.Equal(f.Head, c.Heads) {
						t.Errorf("finding %s layers %v heads %v, want %s layers %v heads %v", f.Rule, f.Layer, f.Head, c.Rule, c.Layers, c.Heads)
					}
					if c.Batch != nil && !slices.Equal(f.Batch, c.Batch) {
						t.Errorf("batch items %v, want %v", f.Batch, c.Batch)
					}
					if c.Offsets != nil {
						var offs []int
						for _, o := range f.Offsets {
							offs = append(offs, o.Offset)
						}
						if !slices.Equal(offs, c.Offsets) {
							t.Errorf("offsets %v, want %v (what gen.py let through)", offs, c.Offsets)
						}
					}
				}
			} else if len(rep.Diagnosis) > 0 {
				t.Errorf("no likely bug expected, got %v", rep.Diagnosis)
			}
			if c.Note != "" && !slices.ContainsFunc(rep.Notes, func(n string) bool { return strings.Contains(n, c.Note) }) {
				t.Errorf("notes %q lack %q", rep.Notes, c.Note)
			}
			if c.ZerosAfter != nil && *c.ZerosAfter < 3 {
				// gen.py counts the float16 rows that end in exact zeros: the
				// case must test what it says it tests
				t.Errorf("only %d rows end in exact zeros: the case does not reproduce underflow", *c.ZerosAfter)
			}
			if c.BatchAxes > 0 {
				out, code := run(t, "info", "--json", "--axes", c.AxesOther, file)
				if code != 0 || !strings.Contains(out, `"batch": 3`) {
					t.Errorf("with --axes %q: exit %d, want batch %d\n%s", c.AxesOther, code, c.BatchAxes, out)
				}
				out, _ = run(t, "check", file)
				if !strings.Contains(out, "axes guessed") || !strings.Contains(out, "--axes \""+c.AxesOther+"\"") {
					t.Errorf("text output does not say the axes were guessed and how to say otherwise:\n%s", out)
				}
			}
		})
	}
}

// TestVerdictFixturesMatchTorch regenerates testdata/verdict with PyTorch
// and compares it with what is committed.
func TestVerdictFixturesMatchTorch(t *testing.T) {
	py := os.Getenv("HEED_PYTHON")
	if py == "" {
		t.Skip("HEED_PYTHON not set (make test sets it)")
	}
	cmd := exec.Command(py, filepath.Join(verdictDir, "gen.py"), "--check")
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("gen.py --check: %v\n%s", err, out)
	}
}

// TestNotJudgedText: the text of a not-judged check says so in its first
// line, and names the flag and the metadata key that would let heed judge.
func TestNotJudgedText(t *testing.T) {
	out, code := run(t, "check", filepath.Join(verdictDir, "nometa_undecided.npz"))
	if code != 3 {
		t.Fatalf("exit %d, want 3\n%s", code, out)
	}
	first := strings.SplitN(out, "\n", 2)[0]
	if !strings.Contains(first, "NOT JUDGED") || strings.Contains(first, "clean:") {
		t.Errorf("first line: %q", first)
	}
	if !strings.Contains(out, "--kind causal|bidirectional|cross") || !strings.Contains(out, "meta blocks.decoder.kind") {
		t.Errorf("no way to judge named:\n%s", out)
	}
	// --no-infer: a block whose kind nobody gave is not judged, even where
	// the data shows a mask
	if out, code := run(t, "check", "--no-infer", filepath.Join(verdictDir, "nometa_clean.npz")); code != 3 || !strings.Contains(out, "NOT JUDGED") {
		t.Errorf("--no-infer on an export without metadata: exit %d, want 3\n%s", code, out)
	}
	// --kind given: judged
	if out, code := run(t, "check", "--kind", "bidirectional", filepath.Join(verdictDir, "nometa_undecided.npz")); code != 0 {
		t.Errorf("--kind bidirectional: exit %d, want 0\n%s", code, out)
	}
	// the static-cache step with --query-start: judged
	if out, code := run(t, "check", "--block", "step.00", "--query-start", "6", filepath.Join(verdictDir, "static_cache.npz")); code != 0 {
		t.Errorf("--query-start 6: exit %d, want 0\n%s", code, out)
	}
	// a bf16 model said to have computed in float32: the rows are a bug
	if out, code := run(t, "check", "--compute-dtype", "float32", filepath.Join(verdictDir, "bf16_upcast.npz")); code != 1 || !strings.Contains(out, "row_sum") {
		t.Errorf("--compute-dtype float32: exit %d, want 1 with row_sum\n%s", code, out)
	}
}

// stripMeta copies an NPZ without its meta member (archive/zip; NPZ members
// are NAME.npy, numpy's savez).
func stripMeta(t *testing.T, src, dst string) {
	t.Helper()
	r, err := zip.OpenReader(src)
	if err != nil {
		t.Fatal(err)
	}
	defer r.Close()
	f, err := os.Create(dst)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	w := zip.NewWriter(f)
	for _, m := range r.File {
		if m.Name == "meta.npy" {
			continue
		}
		if err := w.Copy(m); err != nil {
			t.Fatal(err)
		}
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
}

// TestInferenceOnCasesWithoutMeta judges the PyTorch-made cases of
// testdata/cases with their metadata removed: a correct model is never
// said to have a likely bug, and every bug whose pattern the zeros can
// show is found with the rule the metadata run finds. (Bugs the zeros
// cannot show without metadata: a decoder with no mask at all looks like
// an encoder, a window one key too wide in every head looks like that
// window, and padding or cross-attention sides need the metadata.)
func TestInferenceOnCasesWithoutMeta(t *testing.T) {
	dir := t.TempDir()
	found := map[string]string{
		"shift_bad": "causal", "shift_padded_bad": "causal", "some_batch_bad": "causal", "some_heads_bad": "causal",
		"some_layers_bad": "causal", "documents_bad": "segments", "explicit_bad": "explicit", "nan_spread_bad": "nan_rows",
		"train_mode_bad": "row_sum", "inverted_bad": "causal",
	}
	files, _ := filepath.Glob(filepath.Join(casesDir, "*.npz"))
	for _, src := range files {
		name := strings.TrimSuffix(filepath.Base(src), ".npz")
		dst := filepath.Join(dir, name+".npz")
		stripMeta(t, src, dst)
		out, code := run(t, "check", "--json", dst)
		var rep struct {
			Verdict  string
			Findings []struct{ Rule string }
		}
		if err := json.Unmarshal([]byte(out), &rep); err != nil {
			t.Fatalf("%s: %v\n%s", name, err, out)
		}
		if strings.HasSuffix(name, "_good") && code == 1 {
			t.Errorf("%s (correct model) without metadata: findings %v", name, rep.Findings)
		}
		if want, ok := found[name]; ok {
			if !slices.ContainsFunc(rep.Findings, func(f struct{ Rule string }) bool { return f.Rule == want }) {
				t.Errorf("%s without metadata: findings %v, want rule %s (exit %d)", name, rep.Findings, want, code)
			}
		}
		if name == "decode_bad" && rep.Verdict == "clean" {
			t.Errorf("decode_bad without metadata called clean: a KV-cache step with mass on later keys cannot be told from cross-attention")
		}
	}
}

// TestInferredVerdictMerges: shards of a set whose kind is inferred from
// the data merge to the single run's report, byte for byte, verdict and
// coverage included; and a set whose blocks are not judged exits 3 from
// merge as from check.
func TestInferredVerdictMerges(t *testing.T) {
	for _, tc := range []struct {
		files []string
		code  int
	}{
		{[]string{"nometa_cell.npz", "nometa_cell.npz", "nometa_clean.npz", "nometa_cell.npz"}, 1},
		{[]string{"nometa_undecided.npz", "nometa_undecided.npz", "nometa_undecided.npz"}, 3},
	} {
		dir := t.TempDir()
		var args []string
		for i, f := range tc.files {
			raw, err := os.ReadFile(filepath.Join(verdictDir, f))
			if err != nil {
				t.Fatal(err)
			}
			p := filepath.Join(dir, "ex"+strconv.Itoa(i)+".npz")
			if err := os.WriteFile(p, raw, 0o644); err != nil {
				t.Fatal(err)
			}
			args = append(args, p)
		}
		one, code := run(t, append([]string{"check", "--json"}, args...)...)
		if code != tc.code {
			t.Fatalf("%v: single run exit %d, want %d\n%s", tc.files, code, tc.code, one)
		}
		var parts []string
		for i := 0; i < 2; i++ {
			p := filepath.Join(dir, "p"+strconv.Itoa(i)+".json")
			if out, code := run(t, append([]string{"check", "--shard", strconv.Itoa(i) + "/2", "--partial", p}, args...)...); code != 0 {
				t.Fatalf("shard %d: exit %d\n%s", i, code, out)
			}
			parts = append(parts, p)
		}
		merged, code := run(t, append([]string{"merge", "--json"}, parts...)...)
		if code != tc.code || merged != one {
			t.Errorf("%v: merge exit %d (want %d), same report %v", tc.files, code, tc.code, merged == one)
		}
	}
}

// TestTorchSaveExport: a torch.save file (a dict of heed-export/1 names,
// written by torch in testdata/gen_fixtures.py) is judged like the same
// arrays in an NPZ, and a hostile pickle is refused with exit 2, naming the
// class, without running it.
func TestTorchSaveExport(t *testing.T) {
	out, code := run(t, "check", "--json", "../../testdata/fixtures/torch/dict.pt")
	if code != 0 || !strings.Contains(out, `"verdict": "clean"`) || !strings.Contains(out, `"kind_from": "metadata"`) {
		t.Fatalf("dict.pt: exit %d\n%s", code, out)
	}
	out, code = run(t, "check", "../../testdata/fixtures/torch/layers.pt")
	if code != 0 || !strings.Contains(out, "inferred: layers: causal mask") {
		t.Fatalf("layers.pt (a list of per-layer tensors): exit %d\n%s", code, out)
	}
	out, code = run(t, "check", "--json", "../../testdata/fixtures/torch/leak.pt")
	if code != 1 || !strings.Contains(out, `"rule": "causal"`) || !strings.Contains(out, `"offset": 2`) {
		t.Fatalf("leak.pt: exit %d\n%s", code, out)
	}
	// the loader's message (TestBadInputs checks its words) with exit 2
	if _, code = run(t, "info", "../../testdata/fixtures/bad/torch_system.pt"); code != 2 {
		t.Fatalf("hostile pickle: exit %d, want 2", code)
	}
}
