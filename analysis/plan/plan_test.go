package plan

import (
	"context"
	"math"
	"path/filepath"
	"reflect"
	"sort"
	"testing"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/loader"
)

func synthResult(layers, heads, kv int, scores [][]float64, grad bool) *analysis.Result {
	br := &analysis.BlockResult{Name: "decoder", Layers: layers, Heads: heads, KVHeads: kv, HasGrad: grad}
	for l := 0; l < layers; l++ {
		for h := 0; h < heads; h++ {
			hs := analysis.HeadStats{Layer: l, Head: h, Score: scores[l][h]}
			hs.Importance, hs.ImportanceNorm = math.NaN(), math.NaN()
			if grad {
				hs.Importance = scores[l][h]
			}
			br.Stats = append(br.Stats, hs)
		}
	}
	return &analysis.Result{Blocks: []*analysis.BlockResult{br}}
}

func TestPlanLowestFirstNeverWholeLayer(t *testing.T) {
	r := synthResult(2, 3, 0, [][]float64{{0.1, 0.2, 0.3}, {0.9, 0.8, 0.7}}, true)
	p, err := Make(r, Options{Heads: 3})
	if err != nil {
		t.Fatal(err)
	}
	// layer 0 keeps its best head; the third pruned head comes from layer 1
	want := map[int][]int{0: {0, 1}, 1: {2}}
	if !reflect.DeepEqual(p.Heads["decoder"], want) || p.Pruned != 3 || p.Metric != "importance" {
		t.Fatalf("plan = %v (%d pruned, %s), want %v", p.Heads, p.Pruned, p.Metric, want)
	}
	if n := len(p.Curve); n != 4 || p.Curve[n-1].Heads != 4 {
		t.Fatalf("curve %v: want 4 steps (6 heads less one per layer)", p.Curve)
	}
	if got := p.Curve[2].RemovedFrac; math.Abs(got-(0.1+0.2+0.7)/3.0) > 1e-12 {
		t.Errorf("removed_frac after 3 heads = %v", got)
	}
	if len(p.Warnings) < 2 {
		t.Error("plan without the compute and re-evaluation warnings")
	}
}

func TestPlanKVGroups(t *testing.T) {
	// 4 query heads over 2 KV heads: groups {0,1} and {2,3}
	r := synthResult(2, 4, 2, [][]float64{{0.1, 0.5, 0.2, 0.2}, {0.3, 0.3, 0.05, 0.9}}, false)
	p, err := Make(r, Options{Heads: -1, Frac: 0.5})
	if err != nil {
		t.Fatal(err)
	}
	if p.Metric != analysis.ScoreName {
		t.Errorf("metric without gradients = %s", p.Metric)
	}
	// group sums: L0 {0.6, 0.4}, L1 {0.6, 0.95}; 4 heads = two groups, one per layer at most
	want := map[int][]int{0: {2, 3}, 1: {0, 1}}
	if !reflect.DeepEqual(p.Heads["decoder"], want) {
		t.Fatalf("plan = %v, want %v", p.Heads, want)
	}
}

// TestPlanOnImportanceCase: the plan from autograd-checked importances
// prunes the heads with the lowest importance (Michel et al. 2019's I_h,
// compared model-wide; docs/pruning.md says why not importance_norm).
func TestPlanOnImportanceCase(t *testing.T) {
	files, _ := filepath.Glob(filepath.Join("../../testdata/cases", "importance", "*.npz"))
	set, err := loader.OpenSet(files, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	part, err := analysis.AnalyzeSet(context.Background(), set.Len(), func(i int) (*loader.Export, string, error) {
		ex, err := set.Open(i)
		return ex, set.Examples[i][0], err
	}, analysis.DefaultOptions())
	if err != nil {
		t.Fatal(err)
	}
	res := part.Result()
	p, err := Make(res, Options{Heads: -1, Frac: 0.25})
	if err != nil {
		t.Fatal(err)
	}
	type lh struct {
		l, h int
		v    float64
	}
	var all []lh
	for _, hs := range res.Block("decoder").Stats {
		all = append(all, lh{hs.Layer, hs.Head, hs.Importance})
	}
	sort.Slice(all, func(i, j int) bool { return all[i].v < all[j].v })
	want := map[int][]int{}
	for _, x := range all[:2] {
		want[x.l] = append(want[x.l], x.h)
	}
	for l := range want {
		sort.Ints(want[l])
	}
	if !reflect.DeepEqual(p.Heads["decoder"], want) {
		t.Fatalf("plan %v, want the two lowest importance heads %v", p.Heads, want)
	}
}
