package analysis

import (
	"context"
	"encoding/json"
	"math"
	"path/filepath"
	"testing"

	"github.com/heed-dev/heed/loader"
)

// NoRedundancy (what heed check uses) leaves out only the redundancy: the
// findings, diagnoses and every other statistic are the same, to the bit,
// as with it, and the redundancy (and the score built on it) is NaN.
func TestNoRedundancyChangesNothingElse(t *testing.T) {
	for _, name := range []string{"shift_bad.npz", "documents_bad.npz", "nan_spread_bad.npz", "stats.npz"} {
		ex, err := loader.Open([]string{filepath.Join(casesDir, name)}, loader.NewOptions())
		if err != nil {
			t.Fatal(err)
		}
		with, err := Analyze(context.Background(), ex, DefaultOptions())
		if err != nil {
			t.Fatal(err)
		}
		opt := DefaultOptions()
		opt.NoRedundancy = true
		without, err := Analyze(context.Background(), ex, opt)
		ex.Close()
		if err != nil {
			t.Fatal(err)
		}
		rw, ro := with.Result(), without.Result()
		jf := func(v any) string { b, _ := json.Marshal(v); return string(b) }
		if jf(rw.Findings) != jf(ro.Findings) || jf(rw.Diagnoses) != jf(ro.Diagnoses) || jf(rw.Notes) != jf(ro.Notes) {
			t.Errorf("%s: findings, diagnoses or notes differ without redundancy", name)
		}
		for bi, b := range rw.Blocks {
			for i, hs := range b.Stats {
				ho := ro.Blocks[bi].Stats[i]
				if !math.IsNaN(ho.Redundancy) {
					t.Errorf("%s: %s L%d H%d: redundancy %v without the pass, want NaN", name, b.Name, hs.Layer, hs.Head, ho.Redundancy)
				}
				a, o := hs.Stats, ho.Stats
				a.Redundancy, o.Redundancy = 0, 0
				if jf(a) != jf(o) {
					t.Errorf("%s: %s L%d H%d: statistics differ without redundancy:\n%+v\n%+v", name, b.Name, hs.Layer, hs.Head, a, o)
				}
			}
		}
	}
}
