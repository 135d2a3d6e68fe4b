package analysis

import (
	"os"
	"path/filepath"
	"testing"
)

// FuzzPartial reads partial results as heed merge does (a colleague's file
// on shared storage, or a damaged one) and merges and reports them: bad
// input gives an error, never a panic. Seeds: testdata/partials, written
// by heed check and heed rank with --partial on a tiny export (1 layer, 2
// heads, 4 tokens, one leaking cell): small seeds keep the fuzzer fast.
//
//	go test ./analysis -run '^$' -fuzz FuzzPartial -fuzztime 20s
func FuzzPartial(f *testing.F) {
	paths, _ := filepath.Glob("../testdata/partials/*.json")
	for _, p := range paths {
		if b, err := os.ReadFile(p); err == nil {
			f.Add(b)
		}
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		if len(b) > 1<<20 {
			return
		}
		p, err := DecodePartial(b)
		if err != nil {
			return
		}
		q, err := DecodePartial(b)
		if err != nil {
			t.Fatalf("decoded once, not twice: %v", err)
		}
		if err := p.Merge(q); err != nil {
			return
		}
		// the report of what was merged: statistics, findings, diagnoses
		res := p.Result()
		_ = res.Verdict()
		for _, c := range res.Coverage {
			_ = c.NotJudged
		}
	})
}
