package analysis

import (
	"context"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"slices"
	"testing"

	"github.com/heed-dev/heed/loader"
)

// The cases under testdata/cases are made by testdata/cases/gen_cases.py with
// torch.nn.MultiheadAttention (per-head weights, eval mode); expected.json
// records what the generator broke (layers, heads, batch items, offsets) and
// reference values from scipy, numpy and torch autograd.

const casesDir = "../testdata/cases"

type expFinding struct {
	Block   string     `json:"block"`
	Rule    string     `json:"rule"`
	Layer   []int      `json:"layer"`
	Head    []int      `json:"head"`
	Batch   []int      `json:"batch"`
	Cells   *int64     `json:"cells"`
	Rows    *int64     `json:"rows"`
	Offsets [][2]int64 `json:"offsets"`
}

type expDiag struct {
	Pattern  string   `json:"pattern"`
	Block    string   `json:"block"`
	Layer    []int    `json:"layer"`
	Head     []int    `json:"head"`
	Batch    []int    `json:"batch"`
	Value    *float64 `json:"value"`
	ValueTol float64  `json:"value_tol"`
}

type expected struct {
	Cases map[string]struct {
		Bad       string       `json:"bad"`
		Good      string       `json:"good"`
		Findings  []expFinding `json:"findings"`
		Diagnoses []expDiag    `json:"diagnoses"`
	} `json:"cases"`
	Refs struct {
		Stats      statsRefs      `json:"stats"`
		Importance importanceRefs `json:"importance"`
		EncDec     struct {
			Target    int       `json:"target"`
			Relevance []float64 `json:"relevance_source"`
			Attention []float64 `json:"attention_source"`
		} `json:"encdec"`
	} `json:"refs"`
}

type statsRefs struct {
	Heads []struct {
		Layer, Head int
		refStats
		Batch []refStats `json:"batch"`
	} `json:"heads"`
	Rollout [][]float64          `json:"rollout_batch0"`
	Flow    map[string][]float64 `json:"flow_batch0"`
}

type refStats struct {
	Entropy     float64 `json:"entropy"`
	EntropyNorm float64 `json:"entropy_norm"`
	Confidence  float64 `json:"confidence"`
	Distance    float64 `json:"distance"`
	Prev        float64 `json:"prev"`
	Self        float64 `json:"self"`
	Sink        float64 `json:"sink"`
	JS          float64 `json:"js"`
}

type importanceRefs struct {
	Examples       int         `json:"examples"`
	Importance     [][]float64 `json:"importance"`
	ImportanceNorm [][]float64 `json:"importance_norm"`
	Relevance      [][]float64 `json:"relevance_file0_batch0"`
}

func loadExpected(t *testing.T) *expected {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(casesDir, "expected.json"))
	if err != nil {
		t.Fatal(err)
	}
	var e expected
	if err := json.Unmarshal(b, &e); err != nil {
		t.Fatal(err)
	}
	return &e
}

func analyzePaths(t *testing.T, opt Options, paths ...string) *Partial {
	t.Helper()
	set, err := loader.OpenSet(paths, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	p, err := AnalyzeSet(context.Background(), set.Len(), func(i int) (*loader.Export, string, error) {
		ex, err := set.Open(i)
		return ex, set.Examples[i][0], err
	}, opt)
	if err != nil {
		t.Fatal(err)
	}
	return p
}

func describe(f Finding) string {
	return fmt.Sprintf("%s/%s L%v H%v B%v cells=%d rows=%d mass=%.3g offsets=%v", f.Block, f.Rule, f.Layers, f.Heads, f.Batches, f.Cells, f.Rows, f.Mass, f.Offsets)
}

func TestCases(t *testing.T) {
	exp := loadExpected(t)
	if len(exp.Cases) == 0 {
		t.Fatal("no cases in expected.json")
	}
	for name, c := range exp.Cases {
		t.Run(name, func(t *testing.T) {
			res := analyzePaths(t, DefaultOptions(), filepath.Join(casesDir, c.Bad)).Result()
			if len(res.Findings) != len(c.Findings) {
				for _, f := range res.Findings {
					t.Log(describe(f))
				}
				t.Fatalf("%d findings, want %d", len(res.Findings), len(c.Findings))
			}
			for _, want := range c.Findings {
				var got *Finding
				for i := range res.Findings {
					f := &res.Findings[i]
					if f.Block == want.Block && f.Rule.String() == want.Rule && reflect.DeepEqual(f.Layers, want.Layer) &&
						reflect.DeepEqual(f.Heads, want.Head) && reflect.DeepEqual(f.Batches, want.Batch) {
						got = f
					}
				}
				if got == nil {
					for _, f := range res.Findings {
						t.Log(describe(f))
					}
					t.Fatalf("no finding %s/%s layers %v heads %v batch %v", want.Block, want.Rule, want.Layer, want.Head, want.Batch)
				}
				if want.Cells != nil && got.Cells != *want.Cells {
					t.Errorf("%s: cells = %d, want %d", describe(*got), got.Cells, *want.Cells)
				}
				if want.Rows != nil && got.Rows != *want.Rows {
					t.Errorf("%s: rows = %d, want %d", describe(*got), got.Rows, *want.Rows)
				}
				if want.Offsets != nil {
					var g [][2]int64
					for _, o := range got.Offsets {
						g = append(g, [2]int64{int64(o.Offset), o.Count})
					}
					if !reflect.DeepEqual(g, want.Offsets) {
						t.Errorf("%s: offsets = %v, want %v", describe(*got), g, want.Offsets)
					}
				}
			}
			if len(res.Diagnoses) != len(c.Diagnoses) {
				for _, d := range res.Diagnoses {
					t.Logf("%s %s L%v H%v B%v value %v: %+v", d.Pattern, d.Block, d.Layers, d.Heads, d.Batches, d.Value, d.Facts)
				}
				t.Fatalf("%d diagnoses, want %d", len(res.Diagnoses), len(c.Diagnoses))
			}
			for _, want := range c.Diagnoses {
				found := false
				for _, d := range res.Diagnoses {
					if d.Pattern == want.Pattern && d.Block == want.Block && reflect.DeepEqual(d.Layers, want.Layer) &&
						reflect.DeepEqual(d.Heads, want.Head) && reflect.DeepEqual(d.Batches, want.Batch) {
						found = true
						if want.Value != nil && math.Abs(d.Value-*want.Value) > want.ValueTol {
							t.Errorf("%s: value = %v, want %v", d.Pattern, d.Value, *want.Value)
						}
					}
				}
				if !found {
					for _, d := range res.Diagnoses {
						t.Logf("got %s %s L%v H%v B%v: %+v", d.Pattern, d.Block, d.Layers, d.Heads, d.Batches, d.Facts)
					}
					t.Errorf("no diagnosis %s %s L%v H%v B%v", want.Pattern, want.Block, want.Layer, want.Head, want.Batch)
				}
			}
			good := analyzePaths(t, DefaultOptions(), filepath.Join(casesDir, c.Good)).Result()
			if !good.Clean() || len(good.Diagnoses) != 0 {
				for _, f := range good.Findings {
					t.Log(describe(f))
				}
				t.Errorf("correct twin %s: %d findings, %d diagnoses, want none", c.Good, len(good.Findings), len(good.Diagnoses))
			}
		})
	}
}

// A clean example beside a buggy one changes no diagnosis: every case's
// bad export (testdata/cases, written by numpy from the patterns' published
// or common-practice forms, gen_cases.py) diagnosed in a set with its good
// export names the same patterns with the same values as alone, and each
// finding counts 1 problem example of 2. Before, the clean example's cells
// counted among those that could leak, and a shifted mask became a
// generic leak; its rows hid a cut (cross_causal, prefix_causal) entirely.
func TestCleanExampleDoesNotDilute(t *testing.T) {
	exp := loadExpected(t)
	for name, c := range exp.Cases {
		t.Run(name, func(t *testing.T) {
			alone := analyzePaths(t, DefaultOptions(), filepath.Join(casesDir, c.Bad)).Result()
			pair := analyzePaths(t, DefaultOptions(), filepath.Join(casesDir, c.Bad), filepath.Join(casesDir, c.Good)).Result()
			key := func(ds []Diagnosis) []string {
				var out []string
				for _, d := range ds {
					out = append(out, fmt.Sprintf("%s %s %v", d.Block, d.Pattern, d.Value))
				}
				return out
			}
			if a, p := key(alone.Diagnoses), key(pair.Diagnoses); !slices.Equal(a, p) {
				t.Errorf("alone: %v\nwith the good export: %v", a, p)
			}
			for _, f := range pair.Findings {
				if f.InExamples != 1 {
					t.Errorf("%s: problems in %d examples, want 1 (of 2)", describe(f), f.InExamples)
				}
			}
			for _, d := range pair.Diagnoses {
				if d.Facts.Examples != 2 || d.Facts.InExamples != 1 {
					t.Errorf("%s %s: facts say %d of %d examples, want 1 of 2", d.Block, d.Pattern, d.Facts.InExamples, d.Facts.Examples)
				}
			}
		})
	}
}
