package analysis

// A statistic added the way DEVELOPERS.md ("How to add a statistic") says:
// one entry with a row function, here given to Register because it lives
// in a test file (in the table of statistic.go it would be one more entry
// of the literal). Its values are checked against numpy, a sharded run
// merged against one run, both read paths against each other, its column
// in what heed rank derives, and the built-in statistics against a pass
// without it, to the bit.

import (
	"bytes"
	"context"
	"encoding/json"
	"math"
	"math/rand"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"slices"
	"sort"
	"testing"

	"github.com/heed-dev/heed/loader"
)

// keys90 is the number of allowed keys that hold 90% of a row's allowed
// mass: the fewest keys, largest values first, whose values add up to at
// least 0.9 of the sum of the allowed keys' values (summed in that order).
// The smallest set of items covering a share of a distribution's mass is
// common practice (it is the set nucleus sampling keeps, Holtzman et al.
// 2020, cited from memory).
var keys90 = Statistic{
	Name: "keys90",
	Doc:  "mean number of allowed keys, largest first, that hold 90% of the row's allowed mass (common practice; the nucleus of Holtzman et al. 2020)",
	Row: func(r *Row) (float64, bool) {
		var vals []float64
		for k, v := range r.Values {
			if r.Allowed[k] {
				vals = append(vals, v)
			}
		}
		if len(vals) == 0 {
			return 0, false
		}
		sort.Sort(sort.Reverse(sort.Float64Slice(vals)))
		var total float64
		for _, v := range vals {
			total += v
		}
		var c float64
		for i, v := range vals {
			if c += v; c >= 0.9*total {
				return float64(i + 1), true
			}
		}
		return float64(len(vals)), true
	},
}

// registerKeys90 adds keys90 to the table for the test and takes it out
// after (the table must not change while a pass runs: tests of this
// package do not run in parallel).
func registerKeys90(t *testing.T) {
	t.Helper()
	n, m := len(statistics), len(extraStats)
	if err := Register(keys90); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { statistics, extraStats = statistics[:n], extraStats[:m] })
	if err := Register(keys90); err == nil {
		t.Fatal("Register took the same name twice")
	}
}

// keys90Numpy writes a copy of the stats export (causal, right padding: a
// row is judged when its query is valid, key k is allowed when k <= q and k
// is valid) to argv[2] with mass 0.3 added on key q+1 of every row but the
// last (a leak, so that the allowed keys are not all the keys with mass),
// and computes keys90 on it per (layer, head) over every judged row and per
// batch item with numpy. np.cumsum adds in order, like the row function.
const keys90Numpy = `
import json, sys
import numpy as np
z = dict(np.load(sys.argv[1]))
a32 = z["decoder/attn"]
L, B, H, T, _ = a32.shape
for q in range(T - 1):
    a32[..., q, q + 1] += np.float32(0.3)
np.savez(sys.argv[2], **z)
a = a32.astype(np.float64)
valid = z["valid/target"].astype(bool)
out = []
for l in range(L):
    for h in range(H):
        allrows, perb = [], []
        for b in range(B):
            rows = []
            for q in range(T):
                if not valid[b, q]:
                    continue
                allowed = (np.arange(T) <= q) & valid[b]
                v = np.sort(a[l, b, h, q][allowed])[::-1]
                c = np.cumsum(v)
                rows.append(int(np.argmax(c >= 0.9 * c[-1])) + 1)
            perb.append(float(np.mean(rows)))
            allrows += rows
        out.append({"layer": l, "head": h, "all": float(np.mean(allrows)), "batch": perb})
json.dump(out, sys.stdout)
`

func python(t *testing.T) string {
	t.Helper()
	py := os.Getenv("HEED_PYTHON")
	if py == "" {
		py = "/usr/bin/python3" // Debian's, with numpy (the first python3 on PATH may lack it)
	}
	if err := exec.Command(py, "-c", "import numpy").Run(); err != nil {
		t.Skipf("%s cannot import numpy: %v", py, err)
	}
	return py
}

// TestAddedStatisticAgainstNumpy: the added statistic's mean per head and
// per batch item on testdata/cases/stats.npz with a leak added is numpy's (the counts are
// integers, so the means agree to rounding), and it shows in the columns
// heed rank derives (HeadColumns), after every built-in, not in the text
// table.
func TestAddedStatisticAgainstNumpy(t *testing.T) {
	py := python(t)
	path := filepath.Join(t.TempDir(), "leak.npz")
	out, err := exec.Command(py, "-c", keys90Numpy, filepath.Join(casesDir, "stats.npz"), path).Output()
	if err != nil {
		t.Fatalf("numpy: %v", err)
	}
	var want []struct {
		Layer, Head int
		All         float64
		Batch       []float64
	}
	if err := json.Unmarshal(out, &want); err != nil {
		t.Fatal(err)
	}
	registerKeys90(t)
	cols := HeadColumns()
	if cols[len(cols)-1] != "keys90" || slices.Contains(TextColumns(true), "keys90") || slices.Contains(TextColumns(false), "keys90") {
		t.Fatalf("columns %v, text %v: want keys90 last in the columns and not in the text table", cols, TextColumns(false))
	}
	stats := Statistics()
	st := stats[len(stats)-1]
	br := analyzePaths(t, DefaultOptions(), path).Result().Block("decoder")
	if len(want) != br.Layers*br.Heads {
		t.Fatalf("numpy gave %d heads, heed %d", len(want), br.Layers*br.Heads)
	}
	for _, w := range want {
		hs := br.Head(w.Layer, w.Head)
		if got := st.Value(&hs.Stats, hs); !near(got, w.All, 1e-12) {
			t.Errorf("L%d H%d keys90 = %v, numpy %v", w.Layer, w.Head, got, w.All)
		}
		for b, x := range w.Batch {
			if got := st.Value(&hs.Batch[b], nil); !near(got, x, 1e-12) {
				t.Errorf("L%d H%d batch %d keys90 = %v, numpy %v", w.Layer, w.Head, b, got, x)
			}
		}
	}
	// without the row statistics (heed check) it is not computed
	br = analyzePaths(t, Options{Tol: DefaultTol, NoStats: true}, path).Result().Block("decoder")
	if v := st.Value(&br.Stats[0].Stats, &br.Stats[0]); !math.IsNaN(v) {
		t.Errorf("keys90 with NoStats = %v, want NaN", v)
	}
}

// TestAddedStatisticShardsAndPaths: on two float16 exports with NaN rows,
// negative values, zeros and leaks (randomHead16Mix), one run over both
// equals the merge of one run over each, written as partial files and read
// back (the statistic travels by name); the pattern path equals the
// float32 path; and every built-in statistic is what a pass without the
// added one gives, to the bit.
func TestAddedStatisticShardsAndPaths(t *testing.T) {
	L, H, S := 2, 3, 37
	var exs []*loader.Export
	for i := range 2 {
		rng := rand.New(rand.NewSource(int64(40 + i)))
		data := make([]uint16, L*H*S*S)
		for j := 0; j < L*H; j++ {
			randomHead16Mix(rng, S, false, data[j*S*S:(j+1)*S*S], 0.1)
		}
		path := filepath.Join(t.TempDir(), "x.safetensors")
		writeST16(t, path, "F16", []int{L, H, S, S}, data)
		ex, err := loader.Open([]string{path}, loader.NewOptions())
		if err != nil {
			t.Fatal(err)
		}
		defer ex.Close()
		exs = append(exs, ex)
	}
	opt := DefaultOptions()
	run := func(which ...int) *Partial {
		t.Helper()
		p := NewPartial(opt)
		for _, i := range which {
			if err := p.Add(context.Background(), exs[i], []string{"a", "b"}[i], opt); err != nil {
				t.Fatal(err)
			}
		}
		return p
	}
	marshal := func(p *Partial) []byte {
		t.Helper()
		b, err := json.Marshal(p)
		if err != nil {
			t.Fatal(err)
		}
		return b
	}
	without := marshal(run(0, 1))

	registerKeys90(t)
	single := run(0, 1)
	if !bytes.Contains(marshal(single), []byte(`"keys90"`)) {
		t.Fatal("the partial does not carry keys90 by name")
	}
	var shards []*Partial
	for i := range 2 {
		p, err := DecodePartial(marshal(run(i)))
		if err != nil {
			t.Fatal(err)
		}
		shards = append(shards, p)
	}
	if err := shards[0].Merge(shards[1]); err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(marshal(shards[0]), marshal(single)) {
		t.Error("merged shards differ from one run")
	}
	opt.read = readFloat32
	if f32 := run(0, 1); !reflect.DeepEqual(f32, single) {
		t.Error("float32 path differs from the pattern path")
	}
	opt.read = 0
	if v := single.Result().Blocks[0].Stats[0].Extra; len(v) != 1 || math.IsNaN(v[0]) || v[0] < 1 {
		t.Errorf("keys90 of L0 H0 = %v, want a count >= 1", v)
	}

	// the built-ins, with keys90 taken out again, are the pass's without it
	for _, bp := range single.Blocks {
		for i := range bp.Units {
			for j := range bp.Units[i] {
				bp.Units[i][j].Extra = nil
			}
		}
	}
	single.Options.Extra = nil
	if !bytes.Equal(marshal(single), without) {
		t.Error("built-in statistics changed when a statistic was added")
	}

	// a partial made without the statistic does not merge with one made
	// with it, and a unit naming a statistic its options do not list is refused
	if err := shards[1].Merge(run(0)); err != nil {
		t.Fatalf("same statistics: %v", err)
	}
	old, err := DecodePartial(without)
	if err != nil {
		t.Fatal(err)
	}
	if err := shards[1].Merge(old); err == nil {
		t.Error("a partial without keys90 merged into one with it")
	}
	bad := marshal(run(0))
	bad = bytes.Replace(bad, []byte(`"extra":["keys90"]`), []byte(`"extra":["other"]`), 1)
	if _, err := DecodePartial(bad); err == nil {
		t.Error("DecodePartial took a unit whose statistic the options do not list")
	}
}
