package main

import (
	"bytes"
	"encoding/binary"
	"encoding/json"
	"fmt"
	"github.com/heed-dev/heed/analysis"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
	"testing"

	"github.com/heed-dev/heed/internal/testpy"
)

// runSplit executes the root command and returns stdout, stderr and the exit code.
func runSplit(t *testing.T, args ...string) (string, string, int) {
	t.Helper()
	var out, errb bytes.Buffer
	err := execRoot(&out, &errb, args...)
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

// numberedSet has numpy write n per-example files dir/ex0000.npy ... each
// [2 layers, 4 heads, 16, 16] float32 without metadata (causal softmax rows
// of seeded normal scores), as a user's export loop would, and returns the
// directory and numpy's mean row entropy per layer and head over all files
// (-sum p ln p with 0 ln 0 = 0, in float64 of the stored float32 values; the
// definition heed documents, Clark et al. 2019).
func numberedSet(t *testing.T, n int) (string, [][]float64) {
	t.Helper()
	py := testpy.Require(t, "numpy")
	dir := filepath.Join(t.TempDir(), "exports")
	b, err := exec.Command(py, "-c", `
import json, os, sys, numpy as np
d, n = sys.argv[1], int(sys.argv[2])
os.makedirs(d)
rng = np.random.default_rng(20)
ent = np.zeros((2, 4))
rows = 0
for i in range(n):
    x = rng.standard_normal((2, 4, 16, 16)) * 2
    x[..., np.triu(np.ones((16, 16), bool), 1)] = -np.inf
    p = np.exp(x - x.max(-1, keepdims=True))
    p = (p / p.sum(-1, keepdims=True)).astype(np.float32)
    np.save(os.path.join(d, "ex%04d.npy" % i), p)
    q = p.astype(np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(q > 0, -q * np.log(q), 0.0)
    ent += t.sum(-1).sum(-1)
    rows += 16
print(json.dumps((ent / rows).tolist()))
`, dir, strconv.Itoa(n)).Output()
	if err != nil {
		t.Fatalf("numpy: %v", err)
	}
	var ent [][]float64
	if err := json.Unmarshal(b, &ent); err != nil {
		t.Fatal(err)
	}
	return dir, ent
}

// A directory of numbered per-example files (issue 20): as many examples
// as files, statistics over all of them as numpy computes them, shards
// that share the files, and a merge equal to the single run byte for byte.
func TestShardNumberedSet(t *testing.T) {
	const n = 64
	dir, ent := numberedSet(t, n)
	single, _, code := runSplit(t, "rank", dir, "--json")
	var rep struct {
		Examples int
		Heads    []struct {
			Layer, Head int
			Entropy     *float64
			Rows        int64
		}
		Warnings []string
	}
	if err := json.Unmarshal([]byte(single), &rep); err != nil || code != 0 {
		t.Fatalf("rank: exit %d %v\n%s", code, err, single)
	}
	if rep.Examples != n || len(rep.Heads) != 8 || len(rep.Warnings) == 0 || !strings.Contains(rep.Warnings[0], "--group layers") {
		t.Fatalf("rank: %d examples, %d heads, warnings %q; want %d examples of 2 layers x 4 heads and the guess said first", rep.Examples, len(rep.Heads), rep.Warnings, n)
	}
	for _, h := range rep.Heads {
		want := ent[h.Layer][h.Head]
		if h.Entropy == nil || math.Abs(*h.Entropy-want) > 1e-9*want || h.Rows != n*16 {
			t.Errorf("L%d H%d: entropy %v over %d rows, numpy %v over %d", h.Layer, h.Head, h.Entropy, h.Rows, want, n*16)
		}
	}
	parts := t.TempDir()
	for _, out := range [][]string{{"--json"}, nil} {
		want, _, _ := runSplit(t, append([]string{"rank", dir}, out...)...)
		var files []string
		seen := map[int]int{}
		for i := 0; i < 4; i++ {
			f := filepath.Join(parts, fmt.Sprintf("r%d.json", i))
			if _, e, code := runSplit(t, "rank", dir, "--shard", fmt.Sprintf("%d/4", i), "--partial", f); code != 0 || !strings.Contains(e, fmt.Sprintf("%d of %d examples", n/4, n)) {
				t.Fatalf("shard %d/4: exit %d, %q; want %d of %d examples", i, code, e, n/4, n)
			}
			pf, err := readPartial(f)
			if err != nil {
				t.Fatal(err)
			}
			for _, x := range pf.Shard.Examples {
				seen[x]++
			}
			files = append(files, f)
		}
		for i := 0; i < n; i++ {
			if seen[i] != 1 {
				t.Errorf("example %d is in %d shards, want 1", i, seen[i])
			}
		}
		got, e, code := runSplit(t, append(append([]string{"merge"}, files...), out...)...)
		if code != 0 || got != want {
			t.Errorf("merge %v: exit %d %s, same as the single run: %v", out, code, e, got == want)
		}
	}
	// --group layers: the old reading, one export whose layers are the files
	if out, _, code := runSplit(t, "rank", dir, "--group", "layers", "--json"); code != 0 || !strings.Contains(out, `"examples": 1,`) || !strings.Contains(out, `"layer": 63,`) {
		t.Errorf("--group layers: exit %d, want 1 example of 64 layers\n%.400s", code, out)
	}
	if _, e, code := runSplit(t, "rank", dir, "--group", "pairs"); code != 2 || !strings.Contains(e, "--group") {
		t.Errorf("--group pairs: exit %d %q, want 2", code, e)
	}
}

// heed info sums the set up in a line, never one name per file, and says
// how it grouped them.
func TestInfoSetSummary(t *testing.T) {
	dir, _ := numberedSet(t, 40)
	out, _, code := runSplit(t, "info", dir)
	first := strings.SplitN(out, "\n", 2)[0]
	want := fmt.Sprintf("examples  40 from %s … %s, one file each (grouped by: numbered files are examples, guessed: see warnings)",
		filepath.Join(dir, "ex0000.npy"), filepath.Join(dir, "ex0039.npy"))
	if code != 0 || first != want {
		t.Errorf("info: exit %d, first line\n%s\nwant\n%s", code, first, want)
	}
	if strings.Count(out, "ex0017") != 0 {
		t.Errorf("info names every file:\n%s", out)
	}
	js, _, _ := runSplit(t, "info", "--json", "--group", "layers", dir)
	var rep struct {
		Examples int
		Grouping infoGroup
		Files    []string
	}
	if err := json.Unmarshal([]byte(js), &rep); err != nil || rep.Examples != 1 || rep.Grouping.Rule != "--group layers" || rep.Grouping.Guessed ||
		len(rep.Files) != 40 || rep.Grouping.Files[0] != 40 {
		t.Errorf("info --json --group layers: %v %+v", err, rep)
	}
	out, _, _ = runSplit(t, "info", "--group", "layers", dir)
	if first := strings.SplitN(out, "\n", 2)[0]; !strings.Contains(first, "… "+filepath.Join(dir, "ex0039.npy")+" (40 files) (grouped by: --group layers)") {
		t.Errorf("info --group layers: %s", first)
	}
}

// A partial is created as any output redirected by a shell is: mode 0666
// less the umask (POSIX, sh "Redirecting Output"), so a colleague can merge
// partials on shared storage (issue 20: they were 0600). The shell's own
// file under the same umask is the reference.
func TestPartialFollowsUmask(t *testing.T) {
	data := shardSet(t, 2)
	dir := t.TempDir()
	old := syscall.Umask(0o022)
	defer syscall.Umask(old)
	for _, mask := range []int{0o022, 0o002, 0o027} {
		syscall.Umask(mask)
		f := filepath.Join(dir, fmt.Sprintf("r-%03o.json", mask))
		if _, e, code := runSplit(t, "rank", data, "--shard", "0/2", "--partial", f); code != 0 {
			t.Fatalf("umask %03o: exit %d %s", mask, code, e)
		}
		ref := filepath.Join(dir, fmt.Sprintf("sh-%03o", mask))
		if b, err := exec.Command("/bin/sh", "-c", `: > "$1"`, "sh", ref).CombinedOutput(); err != nil {
			t.Fatalf("sh: %v %s", err, b)
		}
		got, err1 := os.Stat(f)
		want, err2 := os.Stat(ref)
		if err1 != nil || err2 != nil {
			t.Fatal(err1, err2)
		}
		if got.Mode().Perm() != want.Mode().Perm() || got.Mode().Perm() != os.FileMode(0o666&^mask) {
			t.Errorf("umask %03o: partial has mode %v, the shell's file %v, want %v", mask, got.Mode().Perm(), want.Mode().Perm(), os.FileMode(0o666&^mask))
		}
	}
	ents, _ := os.ReadDir(dir)
	for _, e := range ents {
		if strings.HasPrefix(e.Name(), ".") {
			t.Errorf("temporary file left behind: %s", e.Name())
		}
	}
}

// A damaged partial (its accumulators not matching its shape), and a
// partial of another heed version, are refused with one line naming the
// file and saying which, exit 2, not merged or panicked on.
func TestMergeRefusesBadPartial(t *testing.T) {
	for _, c := range []struct {
		name, from, to, want string
	}{
		// the block says 3 layers while its units are those of 2
		{"damaged", `"layers":2,`, `"layers":3,`, ": a damaged partial: partial block decoder: 8 units for 3 layers x 4 heads"},
		{"other version", `"version":"` + analysis.PartialVersion + `"`, `"version":"heed-partial/3"`,
			`: written by another version of heed (partial "heed-partial/3"; this heed merges "` + analysis.PartialVersion + `"): run its shard again with this heed`},
	} {
		t.Run(c.name, func(t *testing.T) {
			p := filepath.Join(t.TempDir(), "p0.json")
			if out, code := run(t, "check", "--shard", "0/1", "--partial", p, filepath.Join(casesDir, "shift_bad.npz")); code != 0 {
				t.Fatalf("partial: exit %d\n%s", code, out)
			}
			b, err := os.ReadFile(p)
			if err != nil {
				t.Fatal(err)
			}
			bad := bytes.Replace(b, []byte(c.from), []byte(c.to), 1)
			if bytes.Equal(bad, b) {
				t.Fatalf("the partial has no %s to change", c.from)
			}
			if err := os.WriteFile(p, bad, 0o644); err != nil {
				t.Fatal(err)
			}
			if out, code := run(t, "merge", p); code != 2 {
				t.Errorf("merge: exit %d, want 2\n%s", code, out)
			}
			if _, err = readPartial(p); err == nil || err.Error() != p+c.want {
				t.Errorf("error %v: want %q", err, p+c.want)
			}
		})
	}
}
