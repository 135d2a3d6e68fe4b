package analysis

import (
	"context"
	"os"
	"os/exec"
	"path/filepath"
	"testing"

	"github.com/heed-dev/heed/loader"
)

// TestRulesGeometry checks the mask rules of the README's export convention (heed-export/1) on small
// cases written out by hand: causal k <= p; window W: p-W < k <= p; prefix P:
// the first P positions see each other both ways; KV-cache offset K-Q.
func TestRulesGeometry(t *testing.T) {
	C, W, P, N := RuleCausal, RuleWindow, RulePrefix, RuleNone
	cases := []struct {
		name string
		blk  loader.Block
		want [][]Rule
	}{
		{"causal", loader.Block{Kind: loader.KindCausal, Queries: 3, Keys: 3, Batch: 1},
			[][]Rule{{N, C, C}, {N, N, C}, {N, N, N}}},
		{"window 2", loader.Block{Kind: loader.KindCausal, Queries: 4, Keys: 4, Batch: 1, Window: 2},
			[][]Rule{{N, C, C, C}, {N, N, C, C}, {W, N, N, C}, {W, W, N, N}}},
		{"prefix 2", loader.Block{Kind: loader.KindCausal, Queries: 4, Keys: 4, Batch: 1, Prefix: 2},
			[][]Rule{{N, N, P, P}, {N, N, P, P}, {N, N, N, C}, {N, N, N, N}}},
		{"decode step: last 2 of 4", loader.Block{Kind: loader.KindCausal, Queries: 2, Keys: 4, Batch: 1, QueryOffset: 2},
			[][]Rule{{N, N, N, C}, {N, N, N, N}}},
		{"bidirectional", loader.Block{Kind: loader.KindBidirectional, Queries: 2, Keys: 2, Batch: 1},
			[][]Rule{{N, N}, {N, N}}},
	}
	for _, c := range cases {
		r, err := NewRules(&c.blk, nil, nil, nil)
		if err != nil {
			t.Fatal(err)
		}
		row, cr := make([]Rule, c.blk.Keys), make([]Rule, c.blk.Keys)
		for q, want := range c.want {
			r.Row(0, q, nil, row)
			if err := r.CellRow(0, 0, q, cr); err != nil {
				t.Fatal(err)
			}
			for k := range want {
				cell, err := r.Cell(0, 0, q, k)
				if err != nil {
					t.Fatal(err)
				}
				if row[k] != want[k] || cell != want[k] || cr[k] != want[k] {
					t.Errorf("%s: (q %d, k %d): Row %s, Cell %s, CellRow %s, want %s", c.name, q, k, row[k], cell, cr[k], want[k])
				}
			}
		}
	}
}

// TestRulesSides: padding keys and document segments from the sides;
// padding query rows are not judged; --rule restricts and refuses rules the
// block cannot support.
func TestRulesSides(t *testing.T) {
	blk := &loader.Block{Name: "d", Kind: loader.KindCausal, QuerySide: "t", KeySide: "t", Queries: 4, Keys: 4, Batch: 2}
	side := &loader.Side{Name: "t", Len: 4,
		Valid:    [][]bool{{true, true, true, true}, {false, true, true, true}},
		Segments: [][]int64{{0, 0, 1, 1}, {0, 0, 0, 0}}}
	r, err := NewRules(blk, side, side, nil)
	if err != nil {
		t.Fatal(err)
	}
	if got := r.Active(); len(got) != 3 || got[0] != RuleCausal || got[1] != RuleSegments || got[2] != RulePadding {
		t.Fatalf("active rules %v", got)
	}
	if r.Judged(1, 0) || !r.Judged(1, 1) {
		t.Error("padding query row judged")
	}
	row := make([]Rule, 4)
	r.Row(0, 3, nil, row)
	if row[0] != RuleSegments || row[1] != RuleSegments || row[2] != RuleNone || row[3] != RuleNone {
		t.Errorf("batch 0 row 3: %v", row)
	}
	r.Row(1, 2, nil, row)
	if row[0] != RulePadding || row[1] != RuleNone || row[3] != RuleCausal {
		t.Errorf("batch 1 row 2: %v", row)
	}
	if r.DocStart(0, 3) != 2 || r.DocStart(1, 3) != 0 {
		t.Errorf("doc starts %d %d", r.DocStart(0, 3), r.DocStart(1, 3))
	}
	if _, err := NewRules(blk, side, side, []Rule{RuleWindow}); err == nil {
		t.Error("--rule window accepted without a window")
	}
	only, err := NewRules(blk, side, side, []Rule{RulePadding})
	if err != nil || len(only.Active()) != 1 {
		t.Errorf("--rule padding: %v %v", only.Active(), err)
	}
	cross := &loader.Block{Name: "c", Kind: loader.KindCross, QuerySide: "t", KeySide: "s", Queries: 4, Keys: 4, Batch: 2}
	rc, _ := NewRules(cross, side, side, nil)
	if rc.SelfAttention() || rc.Has(RuleSegments) || rc.Has(RuleCausal) || !rc.Has(RulePadding) {
		t.Errorf("cross rules %v", rc.Active())
	}
}

// TestGeneratorReproducible runs testdata/cases/gen_cases.py --check (a
// fresh PyTorch run compared with the committed cases) when HEED_PYTHON names
// an interpreter with numpy, scipy and torch, as `make test` sets it.
func TestGeneratorReproducible(t *testing.T) {
	py := os.Getenv("HEED_PYTHON")
	if py == "" {
		t.Skip("HEED_PYTHON not set (make test sets it)")
	}
	cmd := exec.Command(py, filepath.Join(casesDir, "gen_cases.py"), "--check")
	out, err := cmd.CombinedOutput()
	if err != nil {
		t.Fatalf("gen_cases.py --check: %v\n%s", err, out)
	}
}

// TestRowChecks: the row checks of issue 3 on rows written out by hand
// (definitions: the README's export convention (heed-export/1), rows of probabilities summing to 1):
// a negative value, a row summing to 0.9, and --sum-below accepting it.
func TestRowChecks(t *testing.T) {
	meta := `{"format":"heed-export/1","blocks":{"enc":{"kind":"bidirectional","query":"s","key":"s"}}}`
	rows := []float64{
		0.5, 0.5, 0, // fine
		0.9, 0, 0, // sums to 0.9
		1.2, -0.2, 0, // negative value, sums to 1
	}
	ex := memExport(t, meta, loader.NewMemArray("enc/attn", loader.Float32, []int{1, 3, 3}, rows))
	res := mustAnalyze(t, ex, DefaultOptions())
	got := map[Rule]Finding{}
	for _, f := range res.Findings {
		got[f.Rule] = f
	}
	if len(got) != 2 || got[RuleRowSum].Rows != 1 || got[RuleRowSum].Worst.Query != 1 || got[RuleNegative].Cells != 1 {
		t.Fatalf("findings %+v", res.Findings)
	}
	pats := map[string]bool{}
	for _, d := range res.Diagnoses {
		pats[d.Pattern] = true
	}
	if !pats["rows_not_normalised"] || !pats["negative_values"] {
		t.Errorf("diagnoses %v", pats)
	}
	opt := DefaultOptions()
	opt.SumBelow = true
	for _, f := range mustAnalyze(t, ex, opt).Findings {
		if f.Rule == RuleRowSum {
			t.Errorf("--sum-below still flags %s", describe(f))
		}
	}
	opt = DefaultOptions()
	opt.Rules = []Rule{RuleNegative}
	if fs := mustAnalyze(t, ex, opt).Findings; len(fs) != 1 || fs[0].Rule != RuleNegative {
		t.Errorf("--rule negative: %v", fs)
	}
}

func mustAnalyze(t *testing.T, ex *loader.Export, opt Options) *Result {
	t.Helper()
	p, err := Analyze(context.Background(), ex, opt)
	if err != nil {
		t.Fatal(err)
	}
	return p.Result()
}

func TestLocationString(t *testing.T) {
	l := Location{Block: "decoder", Layer: 3, Head: 7, Batch: 1, Query: 12, Key: -1}
	if got := l.String(); got != "decoder:L3:H7:B1:q12" {
		t.Errorf("Location.String() = %q, want decoder:L3:H7:B1:q12 (the README's LOC form)", got)
	}
	l.Key = 13
	if got := l.String(); got != "decoder:L3:H7:B1:q12:k13" {
		t.Errorf("Location.String() = %q, want decoder:L3:H7:B1:q12:k13 (a cell: the key too)", got)
	}
}

// TestCellRowMatchesCell: CellRow gives, row by row, what Cell gives cell by
// cell, on the PyTorch cases with an explicit mask, padding and documents.
func TestCellRowMatchesCell(t *testing.T) {
	for _, name := range []string{"explicit_bad.npz", "documents_bad.npz", "cross_padding_bad.npz", "shift_padded_bad.npz"} {
		ex, err := loader.Open([]string{filepath.Join(casesDir, name)}, loader.NewOptions())
		if err != nil {
			t.Fatal(err)
		}
		for _, blk := range ex.Blocks {
			r, err := BlockRules(ex, blk, nil)
			if err != nil {
				t.Fatal(err)
			}
			row := make([]Rule, blk.Keys)
			for b := 0; b < blk.Batch; b++ {
				for h := 0; h < blk.Heads; h++ {
					for q := 0; q < blk.Queries; q++ {
						if err := r.CellRow(b, h, q, row); err != nil {
							t.Fatal(err)
						}
						for k := range row {
							if c, err := r.Cell(b, h, q, k); err != nil || c != row[k] {
								t.Fatalf("%s %s B%d H%d (q %d, k %d): CellRow %s, Cell %s (%v)", name, blk.Name, b, h, q, k, row[k], c, err)
							}
						}
					}
				}
			}
		}
		ex.Close()
	}
}
