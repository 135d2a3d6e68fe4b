package analysis

import (
	"context"
	"encoding/json"
	"math"
	"path/filepath"
	"testing"

	"github.com/heed-dev/heed/loader"
)

// NoRedundancy leaves out only the redundancy, and NoStats with it (what
// heed check uses) the row statistics too: the findings, diagnoses and every
// other statistic are the same, to the bit, as with them, and what was left
// out (and the score built on it) is NaN.
func TestNoRedundancyChangesNothingElse(t *testing.T) {
	for _, noStats := range []bool{false, true} {
		testNoRedundancy(t, noStats)
	}
}

func testNoRedundancy(t *testing.T, noStats bool) {
	for _, name := range []string{"shift_bad.npz", "documents_bad.npz", "nan_spread_bad.npz", "stats.npz",
		"cross_causal_bad.npz", "cross_padding_bad.npz", "shift_padded_bad.npz", "prefix_causal_bad.npz", "inverted_bad.npz"} {
		ex, err := loader.Open([]string{filepath.Join(casesDir, name)}, loader.NewOptions())
		if err != nil {
			t.Fatal(err)
		}
		with, err := Analyze(context.Background(), ex, DefaultOptions())
		if err != nil {
			t.Fatal(err)
		}
		opt := DefaultOptions()
		opt.NoRedundancy, opt.NoStats = true, noStats
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
				if !math.IsNaN(ho.Distinctness) {
					t.Errorf("%s: %s L%d H%d: redundancy %v without the pass, want NaN", name, b.Name, hs.Layer, hs.Head, ho.Distinctness)
				}
				a, o := hs.Stats, ho.Stats
				a.Distinctness, o.Distinctness = 0, 0
				if noStats {
					for _, v := range []*[2]float64{{o.Entropy, a.Entropy}, {o.EntropyNorm, a.EntropyNorm}, {o.Confidence, a.Confidence}, {o.Distance, a.Distance}} {
						if !math.IsNaN(v[0]) {
							t.Errorf("%s: %s L%d H%d: a row statistic is %v without stats, want NaN", name, b.Name, hs.Layer, hs.Head, v[0])
						}
					}
					a.Entropy, a.EntropyNorm, a.Confidence, a.Distance = 0, 0, 0, 0
					o.Entropy, o.EntropyNorm, o.Confidence, o.Distance = 0, 0, 0, 0
				}
				if jf(a) != jf(o) {
					t.Errorf("%s: %s L%d H%d: statistics differ without redundancy:\n%+v\n%+v", name, b.Name, hs.Layer, hs.Head, a, o)
				}
			}
		}
	}
}

// NoStats alone leaves the redundancy out too: it is built on the row
// entropies NoStats does not compute.
func TestNoStatsImpliesNoRedundancy(t *testing.T) {
	ex, err := loader.Open([]string{filepath.Join(casesDir, "stats.npz")}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	defer ex.Close()
	opt := DefaultOptions()
	opt.NoStats = true
	p, err := Analyze(context.Background(), ex, opt)
	if err != nil {
		t.Fatal(err)
	}
	for _, b := range p.Result().Blocks {
		for _, hs := range b.Stats {
			if !math.IsNaN(hs.Distinctness) || !math.IsNaN(hs.Entropy) {
				t.Fatalf("%s L%d H%d: redundancy %v, entropy %v with NoStats, want NaN", b.Name, hs.Layer, hs.Head, hs.Distinctness, hs.Entropy)
			}
		}
	}
}
