package prose

import (
	"context"
	"fmt"
	"path/filepath"
	"strings"
	"testing"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/analysis/invariance"
	"github.com/heed-dev/heed/internal/words"
	"github.com/heed-dev/heed/loader"
)

// The fixtures are analysis's: testdata/invariance (two exports per model,
// written by gen.py with PyTorch; cases.json says what each model got wrong)
// and testdata/cases (gen_cases.py, torch.nn.MultiheadAttention). Their
// facts are checked against PyTorch in analysis's tests; here the words.

const (
	invDir   = "../../testdata/invariance"
	casesDir = "../../testdata/cases"
)

func checkPair(t *testing.T, name string) *invariance.Result {
	t.Helper()
	open := func(f string) *loader.Export {
		ex, err := loader.Open([]string{filepath.Join(invDir, f)}, loader.NewOptions())
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { ex.Close() })
		return ex
	}
	res, err := invariance.Check(context.Background(), open(name+"_a.npz"), open(name+"_b.npz"), invariance.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	return res
}

func TestInvarianceWords(t *testing.T) {
	for _, name := range []string{"leak", "leak_attn"} {
		ds := Diagnoses(checkPair(t, name).Diagnoses)
		if len(ds) == 0 {
			t.Fatalf("%s: no diagnosis", name)
		}
		d := ds[0]
		wantText := "position 4 of layer 2 changed when only tokens from 6 on were changed: something at layer 2 reads the future"
		if d.Pattern != analysis.PatReadsFuture || !strings.HasPrefix(d.Text, wantText) || !strings.HasSuffix(d.Text, Caveat) {
			t.Errorf("%s: diagnosis %q %q, want %q ... %q", name, d.Pattern, d.Text, wantText, Caveat)
		}
		reach := "lets query q see keys up to q+2"
		if !strings.Contains(strings.Join(d.Evidence, "\n"), reach) {
			t.Errorf("%s: evidence %q lacks %q (the generator's mask is off by 2)", name, d.Evidence, reach)
		}
		if name == "leak_attn" {
			var hd *Diagnosis
			for i := range ds {
				if ds[i].Pattern == analysis.PatFutureHeads {
					hd = &ds[i]
				}
			}
			if hd == nil || !strings.HasPrefix(hd.Text, "at layer 2 only head 1 of 4 changed their rows before P") {
				t.Errorf("heads diagnosis %+v", hd)
			}
		}
	}
	ds := Diagnoses(checkPair(t, "encoder").Diagnoses)
	if len(ds) == 0 {
		t.Fatal("encoder: no diagnosis")
	}
	if d := ds[0]; d.Pattern != analysis.PatNotCausal || !strings.Contains(d.Text, "not causal") || !strings.Contains(d.Text, "declares it bidirectional") {
		t.Errorf("encoder diagnosis %q: %q", d.Pattern, d.Text)
	}
}

// TestRoundingWords: the rounding hint names the command-line option and
// bfloat16's tolerance (analysis.TestInvarianceRoundingHint checks when it
// is given).
func TestRoundingWords(t *testing.T) {
	d := analysis.Diagnosis{Pattern: analysis.PatRoundingLevel, Block: "decoder", Rule: analysis.RuleInvariance, Layers: []int{0},
		Value: 2e-3, Facts: analysis.Facts{Inv: &analysis.InvFacts{MaxRel: 2e-3, Tol: 1e-5, DType: "float32", Suggest: invariance.Tol(loader.BFloat16)}}}
	w := Diagnose(&d)
	if !strings.Contains(w.Text, "--tol 0.06") || !strings.Contains(w.Text, "exported as float32") || !strings.HasSuffix(w.Text, " "+Caveat) {
		t.Errorf("rounding text %q", w.Text)
	}
}

// TestCutWords: a cut finding over two copies of the torch case
// (gen_cases.py, cross_causal) stops at k = q in every row that could.
func TestCutWords(t *testing.T) {
	bad := filepath.Join(casesDir, "cross_causal_bad.npz")
	set, err := loader.OpenSet([]string{bad, bad}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	p, err := analysis.AnalyzeSet(context.Background(), set.Len(), func(i int) (*loader.Export, string, error) {
		ex, err := set.Open(i)
		return ex, set.Examples[i][0], err
	}, analysis.DefaultOptions())
	if err != nil {
		t.Fatal(err)
	}
	res := p.Result()
	if len(res.Findings) != 1 || len(res.Diagnoses) != 1 {
		t.Fatalf("findings %v, diagnoses %v", res.Findings, res.Diagnoses)
	}
	rows := res.Findings[0].Rows
	want := fmt.Sprintf("%d of %d rows (100.0%%)", rows, rows)
	d := Diagnose(&res.Diagnoses[0])
	if d.Pattern != analysis.PatCrossCausal || !strings.HasPrefix(d.Evidence[0], want) || !strings.Contains(d.Text, "up to k = q,") {
		t.Errorf("diagnosis %+v, want cross_causal with evidence %q", d, want)
	}
}

func TestInvarianceSpan(t *testing.T) {
	for _, c := range []struct {
		in   []int
		want string
	}{{nil, ""}, {[]int{4}, "4"}, {[]int{4, 5}, "4, 5"}, {[]int{0, 1, 2, 7}, "0-2, 7"}, {[]int{1, 3, 4, 5, 9, 10}, "1, 3-5, 9, 10"}} {
		if got := words.Span(c.in, 3); got != c.want {
			t.Errorf("words.Span(%v, 3) = %q, want %q", c.in, got, c.want)
		}
	}
}

// TestEveryPatternWorded: every pattern the engine can give has its own
// words (not the fallback that only repeats the code) and every text ends
// with the caveat.
func TestEveryPatternWorded(t *testing.T) {
	pats := []string{analysis.PatMaskShifted, analysis.PatNoCausalMask, analysis.PatInvertedMask, analysis.PatCausalLeak,
		analysis.PatOnlySomeLayers, analysis.PatOnlySomeHeads, analysis.PatOnlySomeBatch, analysis.PatCrossesDocuments,
		analysis.PatWindowTooWide, analysis.PatNoWindow, analysis.PatWindowLeak, analysis.PatPrefixSeesSuffix,
		analysis.PatPrefixCausal, analysis.PatCrossCausal, analysis.PatCrossReadsPadding, analysis.PatPaddingKeys,
		analysis.PatExplicitMaskIgnored, analysis.PatNaNRows, analysis.PatTrainMode, analysis.PatRowsNotNormalised,
		analysis.PatNegativeValues}
	inv := []string{analysis.PatReadsFuture, analysis.PatNotCausal, analysis.PatFutureHeads, analysis.PatOutputReadsFuture, analysis.PatRoundingLevel}
	at := analysis.Location{Block: "decoder", Layer: 1, Head: 0, Batch: 0, Query: 3, Key: 5}
	for _, p := range append(pats, inv...) {
		d := analysis.Diagnosis{Pattern: p, Block: "decoder", Rule: analysis.RuleCausal, Layers: []int{1}, Heads: []int{0}, Batches: []int{0}, At: at,
			Value: 1, Facts: analysis.Facts{BlockLayers: 2, BlockHeads: 4, BlockBatch: 1, Rows: 1, Cells: 2, PadNaNLayer: -1, Leak: analysis.PatCausalLeak}}
		for _, q := range inv {
			if p == q {
				d.Rule = analysis.RuleInvariance
				d.Facts.Inv = &analysis.InvFacts{HeadTotal: 4, HeadChanges: []analysis.HeadChange{{Block: "decoder", Layer: 1, Rows: []int{3}}}}
			}
		}
		w := Diagnose(&d)
		if w.Text == "" || strings.HasPrefix(w.Text, p+" in ") || w.Check == "" || !strings.HasSuffix(w.Text, " "+Caveat) {
			t.Errorf("%s: text %q check %q", p, w.Text, w.Check)
		}
	}
}

// TestNoteWords: the note on rows explained by a lower compute precision
// names the setting's option; every code has its own words.
func TestNoteWords(t *testing.T) {
	n := Note(analysis.Note{Code: analysis.NoteSumLow, Block: "dec", Rows: 3, Max: 4e-3, DType: "float32", SumTol: 1e-5, SumLoose: 1.6e-2})
	want := "dec: 3 rows sum to 1 only within 0.004 (float32 rounding allows 1e-05)"
	if !strings.HasPrefix(n, want) || !strings.HasSuffix(n, "say the compute dtype (meta compute_dtype or --compute-dtype)") {
		t.Errorf("sum_low note %q", n)
	}
	for _, c := range []string{analysis.NotePadNaN, analysis.NoteSumLow, analysis.NoteHeadsAveraged} {
		if got := Note(analysis.Note{Code: c, Block: "dec"}); got == "dec: "+c {
			t.Errorf("note %s has no words", c)
		}
	}
}
