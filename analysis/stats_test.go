package analysis

import (
	"context"
	"encoding/json"
	"math"
	"path/filepath"
	"reflect"
	"testing"

	"github.com/heed-dev/heed/loader"
)

// tolRef is the tolerance against references computed in float64 from the
// float32 export (scipy normalises rows that sum to 1 within float32 rounding).
const tolRef = 1e-6

func near(a, b, tol float64) bool {
	if math.IsNaN(a) || math.IsNaN(b) {
		return math.IsNaN(a) && math.IsNaN(b)
	}
	return math.Abs(a-b) <= tol*math.Max(1, math.Abs(b))
}

// TestStatsAgainstScipy compares per-head statistics, aggregated and per
// batch item, with scipy.stats.entropy, scipy.spatial.distance.jensenshannon
// (squared: scipy returns the square root of the divergence) and numpy means
// computed by gen_cases.py over the same export.
func TestStatsAgainstScipy(t *testing.T) {
	exp := loadExpected(t)
	res := analyzePaths(t, DefaultOptions(), filepath.Join(casesDir, "stats.npz")).Result()
	if !res.Clean() {
		t.Fatalf("stats export is correctly masked, got %d findings", len(res.Findings))
	}
	br := res.Block("decoder")
	if len(exp.Refs.Stats.Heads) != br.Layers*br.Heads {
		t.Fatalf("%d reference heads for %d x %d", len(exp.Refs.Stats.Heads), br.Layers, br.Heads)
	}
	check := func(where string, got Stats, want refStats) {
		pairs := []struct {
			name      string
			got, want float64
		}{
			{"entropy", got.Entropy, want.Entropy}, {"entropy_norm", got.EntropyNorm, want.EntropyNorm},
			{"confidence", got.Confidence, want.Confidence}, {"distance", got.Distance, want.Distance},
			{"prev_share", got.PrevShare, want.Prev}, {"self_share", got.SelfShare, want.Self},
			{"sink", got.Sink, want.Sink}, {"redundancy", got.Distinctness, want.JS},
		}
		for _, p := range pairs {
			if !near(p.got, p.want, tolRef) {
				t.Errorf("%s %s = %v, want %v (scipy/numpy)", where, p.name, p.got, p.want)
			}
		}
	}
	for _, ref := range exp.Refs.Stats.Heads {
		hs := br.Head(ref.Layer, ref.Head)
		check("aggregate L"+itoa(ref.Layer)+"H"+itoa(ref.Head), hs.Stats, ref.refStats)
		for b, rb := range ref.Batch {
			check("batch "+itoa(b)+" L"+itoa(ref.Layer)+"H"+itoa(ref.Head), hs.Batch[b], rb)
		}
		if !math.IsNaN(hs.Importance) || !math.IsNaN(hs.ImportanceNorm) {
			t.Errorf("importance without gradients = %v, want NaN", hs.Importance)
		}
	}
}

func itoa(i int) string { b, _ := json.Marshal(i); return string(b) }

// TestImportanceAgainstAutograd: dL/dxi_h of a head mask xi, from torch
// autograd, averaged in absolute value over the 6 examples (3 files x 2
// batch items), must equal heed's importance from the exported A and G
// (Michel et al. 2019, eq. 2; the derivation is in docs/methods.md).
func TestImportanceAgainstAutograd(t *testing.T) {
	exp := loadExpected(t).Refs.Importance
	files, _ := filepath.Glob(filepath.Join(casesDir, "importance", "*.npz"))
	if len(files) != 3 {
		t.Fatalf("importance files: %v", files)
	}
	p := analyzePaths(t, DefaultOptions(), files...)
	if p.Examples != 3 {
		t.Fatalf("examples = %d, want 3 (one per file)", p.Examples)
	}
	br := p.Result().Block("decoder")
	for l := range exp.Importance {
		for h, want := range exp.Importance[l] {
			hs := br.Head(l, h)
			if !near(hs.Importance, want, 1e-5) {
				t.Errorf("importance L%dH%d = %v, want %v (torch autograd dL/dxi)", l, h, hs.Importance, want)
			}
			if !near(hs.ImportanceNorm, exp.ImportanceNorm[l][h], 1e-5) {
				t.Errorf("importance_norm L%dH%d = %v, want %v", l, h, hs.ImportanceNorm, exp.ImportanceNorm[l][h])
			}
		}
	}
}

// TestMergeExact: a single run over every example equals, bit for bit, the
// merge of runs over any split of them, including through JSON.
func TestMergeExact(t *testing.T) {
	files, _ := filepath.Glob(filepath.Join(casesDir, "importance", "*.npz"))
	files = append(files, filepath.Join(casesDir, "stats.npz"))
	imp := files[:3]
	opt := DefaultOptions()
	whole := analyzePaths(t, opt, imp...)
	for cut := 1; cut < len(imp); cut++ {
		a := analyzePaths(t, opt, imp[:cut]...)
		b := analyzePaths(t, opt, imp[cut:]...)
		// through JSON, as shards would be
		var a2, b2 Partial
		for _, x := range []struct {
			src *Partial
			dst *Partial
		}{{a, &a2}, {b, &b2}} {
			js, err := json.Marshal(x.src)
			if err != nil {
				t.Fatal(err)
			}
			if err := json.Unmarshal(js, x.dst); err != nil {
				t.Fatal(err)
			}
		}
		// merge in the other order too
		if err := b2.Merge(&a2); err != nil {
			t.Fatal(err)
		}
		w, _ := json.Marshal(whole)
		m, _ := json.Marshal(&b2)
		if string(w) != string(m) {
			t.Fatalf("split at %d: merged partial differs from the single run", cut)
		}
		if !reflect.DeepEqual(whole.Result().Block("decoder").Stats, b2.Result().Block("decoder").Stats) {
			t.Fatalf("split at %d: merged statistics differ", cut)
		}
	}
	// one worker or many: the same state
	opt1 := opt
	opt1.Workers = 1
	one := analyzePaths(t, opt1, imp...)
	w, _ := json.Marshal(whole)
	o, _ := json.Marshal(one)
	if string(w) != string(o) {
		t.Fatal("1 worker and GOMAXPROCS workers give different partials")
	}
	// partials of another layout are refused
	other := analyzePaths(t, opt, files[3])
	if err := other.Merge(whole); err == nil {
		t.Fatal("merging a 3-head block into a 4-head one succeeded")
	}
}

// TestUniformRows: invariants stated in docs/methods.md: uniform rows over n keys
// have entropy ln n (ln 64 = 4.158883, ln 128 = 4.852030) and normalised 1.
func TestUniformRows(t *testing.T) {
	for _, n := range []int{64, 128} {
		data := make([]float64, n*n)
		for i := range data {
			data[i] = 1 / float64(n)
		}
		ex := memExport(t, `{"format":"heed-export/1","blocks":{"enc":{"kind":"bidirectional","query":"s","key":"s"}}}`,
			loader.NewMemArray("enc/attn", loader.Float32, []int{1, n, n}, data))
		p, err := Analyze(context.Background(), ex, DefaultOptions())
		if err != nil {
			t.Fatal(err)
		}
		hs := p.Result().Block("enc").Head(0, 0)
		want := map[int]float64{64: 4.158883, 128: 4.852030}[n]
		if !near(hs.Entropy, want, 1e-6) || !near(hs.EntropyNorm, 1, 1e-6) {
			t.Errorf("uniform n=%d: entropy %v norm %v, want %v and 1", n, hs.Entropy, hs.EntropyNorm, want)
		}
	}
	// [.5,.25,.25] -> 1.039721 nats, normalised 0.946395 (docs/methods.md, derived)
	ex := memExport(t, `{"format":"heed-export/1","blocks":{"enc":{"kind":"bidirectional","query":"s","key":"s"}}}`,
		loader.NewMemArray("enc/attn", loader.Float64, []int{1, 1, 3}, []float64{.5, .25, .25}))
	p, err := Analyze(context.Background(), ex, DefaultOptions())
	if err != nil {
		t.Fatal(err)
	}
	hs := p.Result().Block("enc").Head(0, 0)
	if !near(hs.Entropy, 1.039721, 1e-6) || !near(hs.EntropyNorm, 0.946395, 1e-6) {
		t.Errorf("[.5 .25 .25]: entropy %v norm %v, want 1.039721 0.946395", hs.Entropy, hs.EntropyNorm)
	}
}

// TestJSDocExamples: scipy.spatial.distance.jensenshannon's doc examples,
// squared (it returns the distance): jensenshannon([1,0],[.5,.5]) =
// 0.46450140402245893 in nats; ([1,0,0],[0,1,0], base 2) = 1 -> ln 2 nats.
func TestJSDocExamples(t *testing.T) {
	cases := []struct {
		p, q []float32
		want float64
	}{
		{[]float32{1, 0}, []float32{.5, .5}, 0.46450140402245893 * 0.46450140402245893},
		{[]float32{1, 0, 0}, []float32{0, 1, 0}, math.Ln2},
	}
	for _, c := range cases {
		K := len(c.p)
		st := &layerStore{stride: 1, rows: 1, keys: K, vals: append(append([]float32{}, c.p...), c.q...),
			ent: []float64{entropy32(c.p), entropy32(c.q)}, ok: []bool{true, true}, neg: []bool{false, false},
			lo: []int32{0, 0}, hi: []int32{int32(K - 1), int32(K - 1)}}
		got, ok := st.js(0, 1, 0)
		if !ok || !near(got, c.want, 1e-12) {
			t.Errorf("JS(%v, %v) = %v, want %v", c.p, c.q, got, c.want)
		}
	}
}

func entropy32(p []float32) float64 {
	var e float64
	for _, x := range p {
		if x > 0 {
			e -= float64(x) * math.Log(float64(x))
		}
	}
	return e
}

func memExport(t *testing.T, meta string, arrays ...loader.Array) *loader.Export {
	t.Helper()
	ex, err := loader.Assemble(arrays, meta, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	return ex
}

// TestCancel: a canceled context stops the pass with ErrCanceled.
func TestCancel(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	ex, err := loader.Open([]string{filepath.Join(casesDir, "stats.npz")}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	defer ex.Close()
	calls := 0
	opt := DefaultOptions()
	opt.Progress = func(done, total int64) { calls++ }
	if _, err := Analyze(ctx, ex, opt); err == nil || !errorsIs(err, ErrCanceled) {
		t.Fatalf("canceled pass: err = %v, want ErrCanceled", err)
	}
	var last, total int64
	opt.Progress = func(d, tt int64) { last, total = d, tt }
	if _, err := Analyze(context.Background(), ex, opt); err != nil {
		t.Fatal(err)
	}
	if last != total || total != int64(2*2*3) {
		t.Fatalf("progress ended at %d of %d, want 12 of 12", last, total)
	}
}
