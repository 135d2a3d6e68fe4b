package main

import (
	"path/filepath"
	"strings"
	"testing"
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
