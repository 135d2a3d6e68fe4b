package main

import (
	"bytes"
	"context"
	"encoding/binary"
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// runSplit executes the root command and returns stdout, stderr and the exit code.
func runSplit(t *testing.T, args ...string) (string, string, int) {
	t.Helper()
	cmd := newRootCmd()
	var out, errb bytes.Buffer
	cmd.SetOut(&out)
	cmd.SetErr(&errb)
	cmd.SetArgs(args)
	err := cmd.ExecuteContext(context.Background())
	if err != nil {
		errb.WriteString(err.Error())
	}
	return out.String(), errb.String(), exitCode(err, false)
}

// writeShardExample writes one example: a safetensors file (layout from the
// safetensors README) with decoder/attn and decoder/grad, f32, [layer 2,
// batch 2, head 3, query 6, key 6], kind causal. Rows are softmaxes over
// k <= q from a seeded generator with values that are not round in binary
// (so summation order would show in the last bits); example 2 leaks mass
// onto k = q+1 in head 1, example 4 has a NaN row, so the checks have
// findings to merge as well as statistics.
func writeShardExample(t *testing.T, dir string, ex int) {
	t.Helper()
	const L, B, H, Q, K = 2, 2, 3, 6, 6
	rng := rand.New(rand.NewPCG(uint64(ex), 99))
	attn := make([]float32, L*B*H*Q*K)
	grad := make([]float32, len(attn))
	for l := 0; l < L; l++ {
		for b := 0; b < B; b++ {
			for h := 0; h < H; h++ {
				for q := 0; q < Q; q++ {
					row := attn[(((l*B+b)*H+h)*Q+q)*K:][:K]
					var s float64
					w := make([]float64, K)
					for k := 0; k <= q; k++ {
						w[k] = math.Exp(rng.NormFloat64() * float64(h+1))
						s += w[k]
					}
					leak := ex == 2 && h == 1 && q+1 < K
					for k := 0; k <= q; k++ {
						v := w[k] / s
						if leak {
							v *= 0.9
						}
						row[k] = float32(v)
					}
					if leak {
						row[q+1] = 0.1
					}
					if ex == 4 && l == 1 && b == 1 && h == 0 && q == 3 {
						for k := 0; k <= q; k++ {
							row[k] = float32(math.NaN())
						}
					}
				}
			}
		}
	}
	for i := range grad {
		grad[i] = float32(rng.NormFloat64())
	}
	meta, _ := json.Marshal(map[string]any{"format": "heed-export/1", "blocks": map[string]any{
		"decoder": map[string]any{"kind": "causal", "query": "target", "key": "target", "axes": "layer batch head query key"}}})
	shape := []int{L, B, H, Q, K}
	n := 4 * len(attn)
	hdr, _ := json.Marshal(map[string]any{
		"__metadata__": map[string]string{"meta": string(meta)},
		"decoder/attn": map[string]any{"dtype": "F32", "shape": shape, "data_offsets": []int{0, n}},
		"decoder/grad": map[string]any{"dtype": "F32", "shape": shape, "data_offsets": []int{n, 2 * n}},
	})
	for len(hdr)%8 != 0 {
		hdr = append(hdr, ' ')
	}
	buf := binary.LittleEndian.AppendUint64(nil, uint64(len(hdr)))
	buf = append(buf, hdr...)
	for _, x := range append(attn, grad...) {
		buf = binary.LittleEndian.AppendUint32(buf, math.Float32bits(x))
	}
	if err := os.WriteFile(filepath.Join(dir, fmt.Sprintf("ex%02d.safetensors", ex)), buf, 0o644); err != nil {
		t.Fatal(err)
	}
}

func shardSet(t *testing.T, n int) string {
	t.Helper()
	dir := t.TempDir()
	data := filepath.Join(dir, "exports")
	if err := os.Mkdir(data, 0o755); err != nil {
		t.Fatal(err)
	}
	for ex := 0; ex < n; ex++ {
		writeShardExample(t, data, ex)
	}
	return data
}

// The contract of sharding (issue 7, docs/scale.md): the partials hold
// exact sums and counts, so merging any number of shards prints exactly
// what one run over the whole set prints, in text and JSON, with the same
// exit code.
func TestShardMergeEqualsSingleRun(t *testing.T) {
	data := shardSet(t, 7)
	parts := t.TempDir()
	cases := []struct {
		cmd   string
		flags []string // given to every run
		out   []string // output flags, given to the single run and to merge
	}{
		{"rank", nil, []string{"--json"}},
		{"rank", nil, nil},
		{"rank", []string{"--prune", "4"}, []string{"--csv"}},
		{"rank", []string{"--prune-frac", "0.25", "--sort", "-entropy"}, []string{"--json"}},
		{"check", nil, []string{"--json"}},
		{"check", nil, nil},
		{"check", []string{"--tol", "0.05", "--rule", "causal", "--rule", "nan_rows"}, []string{"--json"}},
		{"both", nil, []string{"--json"}},
		{"both", []string{"--prune", "4", "--sort", "-entropy"}, nil},
	}
	for ci, c := range cases {
		single := append(append([]string{c.cmd, data}, c.flags...), c.out...)
		want, _, wantCode := runSplit(t, single...)
		if wantCode == 2 {
			t.Fatalf("%v: exit 2: %s", single, want)
		}
		if c.cmd != "rank" && wantCode != 1 {
			t.Fatalf("%v: exit %d, want 1 (the set has a leak and a NaN row)", single, wantCode)
		}
		for _, n := range []int{1, 2, 3, 5, 8} { // 8 shards of 7 examples: one is empty
			var files []string
			for i := 0; i < n; i++ {
				f := filepath.Join(parts, fmt.Sprintf("c%d-n%d-%d.json", ci, n, i))
				args := append([]string{c.cmd, data, "--shard", fmt.Sprintf("%d/%d", i, n), "--partial", f}, c.flags...)
				out, errOut, code := runSplit(t, args...)
				if code != 0 || out != "" {
					t.Fatalf("%v: exit %d, stdout %q, stderr %q; want exit 0 and no report", args, code, out, errOut)
				}
				files = append(files, f)
			}
			// any order
			rand.New(rand.NewPCG(uint64(n), 1)).Shuffle(len(files), func(i, j int) { files[i], files[j] = files[j], files[i] })
			margs := append(append([]string{"merge"}, files...), c.out...)
			got, errOut, code := runSplit(t, margs...)
			if code != wantCode {
				t.Errorf("%s %v, %d shards: merge exit %d, single run %d (%s)", c.cmd, c.flags, n, code, wantCode, errOut)
			}
			if got != want {
				t.Errorf("%s %v %v, %d shards: merged output differs from the single run\nmerged:\n%s\nsingle:\n%s", c.cmd, c.flags, c.out, n, got, want)
			}
		}
	}
}

// merge may replace the plan and order flags the shards were run with.
func TestMergeOverridesPlan(t *testing.T) {
	data := shardSet(t, 3)
	parts := t.TempDir()
	var files []string
	for i := 0; i < 2; i++ {
		f := filepath.Join(parts, fmt.Sprintf("r%d.json", i))
		if _, e, code := runSplit(t, "rank", data, "--prune", "2", "--shard", fmt.Sprintf("%d/2", i), "--partial", f); code != 0 {
			t.Fatal(e)
		}
		files = append(files, f)
	}
	want, _, _ := runSplit(t, "rank", data, "--prune-frac", "0.5", "--json")
	got, e, code := runSplit(t, append(append([]string{"merge"}, files...), "--prune-frac", "0.5", "--json")...)
	if code != 0 || got != want {
		t.Fatalf("merge --prune-frac 0.5: exit %d %s\ngot:\n%s\nwant:\n%s", code, e, got, want)
	}
	if _, e, code := runSplit(t, append(append([]string{"merge"}, files...), "--rule", "causal")...); code != 2 || !strings.Contains(e, "unknown flag") {
		t.Errorf("merge --rule: exit %d (%s), want 2: not a merge flag", code, e)
	}
}

func TestMergeRefusesPartialsThatDoNotBelongTogether(t *testing.T) {
	data := shardSet(t, 4)
	other := shardSet(t, 3)
	parts := t.TempDir()
	shard := func(name, cmd, set string, i, n int, flags ...string) string {
		f := filepath.Join(parts, name)
		args := append([]string{cmd, set, "--shard", fmt.Sprintf("%d/%d", i, n), "--partial", f}, flags...)
		if _, e, code := runSplit(t, args...); code != 0 {
			t.Fatalf("%v: %s", args, e)
		}
		return f
	}
	r0, r1, r2 := shard("r0", "rank", data, 0, 3), shard("r1", "rank", data, 1, 3), shard("r2", "rank", data, 2, 3)
	c1 := shard("c1", "check", data, 1, 3)
	t1 := shard("t1", "rank", data, 1, 3, "--tol", "0.5")
	o1 := shard("o1", "rank", other, 1, 3)
	h1 := shard("h1", "rank", data, 1, 2)
	junk := filepath.Join(parts, "junk.json")
	os.WriteFile(junk, []byte(`{"format": "something else"}`), 0o644)
	for _, c := range []struct {
		files []string
		want  string
	}{
		{[]string{r0, r2}, "missing shard: 1/3"},
		{[]string{r0}, "missing shards: 1/3, 2/3"},
		{[]string{r0, r1, r1, r2}, "shard 1/3 given twice"},
		{[]string{r0, c1, r2}, "not of heed rank"},
		{[]string{r0, t1, r2}, "different flags"},
		{[]string{r0, o1, r2}, "different sets"},
		{[]string{r0, h1, r2}, "partials of different jobs"},
		{[]string{junk}, "not a heed partial"},
		{[]string{filepath.Join(parts, "absent.json")}, "absent.json"},
	} {
		out, e, code := runSplit(t, append([]string{"merge"}, c.files...)...)
		if code != 2 || !strings.Contains(e, c.want) || out != "" {
			t.Errorf("merge %v: exit %d, stderr %q, stdout %q; want exit 2 and %q", c.files, code, e, out, c.want)
		}
	}
}

func TestShardFlagErrors(t *testing.T) {
	data := shardSet(t, 2)
	for _, s := range []string{"2/2", "-1/2", "0/0", "1", "a/b", "0/2/3"} {
		if _, e, code := runSplit(t, "rank", data, "--shard", s); code != 2 || !strings.Contains(e, "--shard") {
			t.Errorf("--shard %s: exit %d (%s), want 2", s, code, e)
		}
	}
	in := filepath.Join(data, "ex00.safetensors")
	before, _ := os.ReadFile(in)
	if _, e, code := runSplit(t, "rank", data, "--partial", in); code != 2 || !strings.Contains(e, "input") {
		t.Errorf("--partial onto an input: exit %d (%s), want 2", code, e)
	}
	if after, _ := os.ReadFile(in); !bytes.Equal(before, after) {
		t.Fatal("the input file was written")
	}
	// --shard alone prints the share's report.
	out, _, code := runSplit(t, "rank", data, "--shard", "0/2", "--json")
	var rep struct {
		Examples int `json:"examples"`
	}
	if code != 0 || json.Unmarshal([]byte(out), &rep) != nil || rep.Examples != 1 {
		t.Errorf("rank --shard 0/2 --json: exit %d, examples %d, want 1 (file 0 of 2)\n%s", code, rep.Examples, out)
	}
}
