package main

import (
	"flag"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/heed-dev/heed/analysis"
)

// TestRankNoGradientsWarnsOnce: without gradients heed rank says so once,
// with or without a pruning plan (whose own warning says the same); with
// gradients it does not say it at all.
func TestRankNoGradientsWarnsOnce(t *testing.T) {
	noGrad := filepath.Join(casesDir, "shift_good.npz")
	withGrad := filepath.Join(casesDir, "importance", "ex0.npz")
	for _, c := range []struct {
		args []string
		want int
	}{
		{[]string{"rank", noGrad}, 1},
		{[]string{"rank", "--prune", "2", noGrad}, 1},
		{[]string{"rank", "--prune-frac", "0.25", noGrad}, 1},
		{[]string{"rank", "--prune", "2", withGrad}, 0},
	} {
		out, code := run(t, c.args...)
		if code != 0 {
			t.Fatalf("%v: exit %d\n%s", c.args, code, out)
		}
		if n := strings.Count(out, noGradients); n != c.want {
			t.Errorf("%v: %q said %d times, want %d\n%s", c.args, noGradients, n, c.want, out)
		}
	}
}

var update = flag.Bool("update", false, "rewrite docs/json.md's field list of heed rank")

// TestRankFieldsDoc: docs/json.md lists every per-head field of heed rank
// as the table of statistics declares it (rankFieldsDoc); -update rewrites
// the list.
func TestRankFieldsDoc(t *testing.T) {
	const path = "../../docs/json.md"
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	doc := string(b)
	open := strings.Index(doc, "<!-- rank-fields")
	end := strings.Index(doc, "<!-- /rank-fields -->")
	if open < 0 || end < open {
		t.Fatalf("%s: no <!-- rank-fields --> ... <!-- /rank-fields --> markers", path)
	}
	open += strings.Index(doc[open:], "-->\n") + len("-->\n")
	want := rankFieldsDoc(analysis.Statistics())
	if doc[open:end] == want {
		return
	}
	if !*update {
		t.Fatalf("%s: the field list of heed rank is not the table of statistics'; run go test ./cmd/heed -run TestRankFieldsDoc -update and review the diff. Want:\n%s", path, want)
	}
	if err := os.WriteFile(path, []byte(doc[:open]+want+doc[end:]), 0o644); err != nil {
		t.Fatal(err)
	}
}

// rankFieldsDoc is the per-head field list of docs/json.md (between its
// rank-fields markers), derived from the table of statistics: one row per
// statistic, then one per former name.
func rankFieldsDoc(stats []analysis.Statistic) string {
	esc := strings.NewReplacer("|", `\|`)
	var b strings.Builder
	b.WriteString("| field | meaning |\n|---|---|\n")
	for _, st := range stats {
		fmt.Fprintf(&b, "| `%s` | %s |\n", st.Name, esc.Replace(st.Doc))
	}
	for _, st := range stats {
		for _, a := range st.Aliases {
			fmt.Fprintf(&b, "| `%s` | the former name of `%s`, still written with the same value (and taken by `--sort`) until the next release |\n", a, st.Name)
		}
	}
	return b.String()
}
