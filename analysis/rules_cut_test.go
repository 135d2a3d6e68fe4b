package analysis

import (
	"encoding/json"
	"path/filepath"
	"reflect"
	"testing"
)

// TestCutMergeExact: the cut check's counts (rows, cells, stop offsets, the
// reach of the rows that could stop) add up over examples exactly as one run
// does, through JSON as shards would be, and a cut finding over two copies
// of the torch case (testdata/cases/gen_cases.py, cross_causal) has twice
// the rows of one with the same diagnosis.
func TestCutMergeExact(t *testing.T) {
	bad := filepath.Join(casesDir, "cross_causal_bad.npz")
	opt := DefaultOptions()
	one := analyzePaths(t, opt, bad)
	whole := analyzePaths(t, opt, bad, bad)
	var a, b Partial
	js, err := json.Marshal(one)
	if err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(js, &a); err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(js, &b); err != nil {
		t.Fatal(err)
	}
	if err := a.Merge(&b); err != nil {
		t.Fatal(err)
	}
	w, _ := json.Marshal(whole)
	m, _ := json.Marshal(&a)
	if string(w) != string(m) {
		t.Fatal("merged partial differs from the single run over both examples")
	}
	r1, r2 := one.Result(), whole.Result()
	if len(r1.Findings) != 1 || len(r2.Findings) != 1 || r1.Findings[0].Rule != RuleCut {
		t.Fatalf("findings %v / %v, want one cut finding each", r1.Findings, r2.Findings)
	}
	f1, f2 := r1.Findings[0], r2.Findings[0]
	if f2.Rows != 2*f1.Rows || f2.Cells != 2*f1.Cells || !reflect.DeepEqual(f2.Layers, f1.Layers) || !reflect.DeepEqual(f2.Batches, f1.Batches) {
		t.Errorf("two examples: rows %d cells %d, one: rows %d cells %d", f2.Rows, f2.Cells, f1.Rows, f1.Cells)
	}
	// every row that could stop at k = q does, in both examples
	// (internal/prose words it "N of N rows (100.0%)": TestCutWords)
	if len(r2.Diagnoses) != 1 || r2.Diagnoses[0].Pattern != "cross_causal" || r2.Diagnoses[0].Facts.Stopped != 2*f1.Rows || r2.Diagnoses[0].Facts.Could != 2*f1.Rows {
		t.Errorf("diagnoses %+v, want cross_causal with %d of %d rows stopping", r2.Diagnoses, 2*f1.Rows, 2*f1.Rows)
	}
}

// TestCutRuleSelection: --rule without cut leaves the check out; the cut
// check alone (no mask rule) still reads a cross block, every key allowed.
func TestCutRuleSelection(t *testing.T) {
	bad := filepath.Join(casesDir, "cross_causal_bad.npz")
	opt := DefaultOptions()
	opt.Rules = []Rule{RulePadding, RuleNaNRows}
	if res := analyzePaths(t, opt, bad).Result(); !res.Clean() {
		t.Errorf("without cut: %d findings, want none", len(res.Findings))
	}
	opt.Rules = []Rule{RuleCut}
	res := analyzePaths(t, opt, bad).Result()
	if len(res.Findings) != 1 || res.Findings[0].Rule != RuleCut || res.Findings[0].Block != "cross" {
		t.Fatalf("cut alone: %d findings, want one cut finding in cross", len(res.Findings))
	}
}
