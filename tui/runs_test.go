package tui

import (
	"path/filepath"
	"testing"

	"github.com/heed-dev/heed/loader"
)

// The Map's rule runs (rowRunsFunc, read by views.Downsample) say, key by
// key, what ruleFunc (the readout's cell-by-cell rule) says, on the PyTorch
// cases with an explicit mask (runs per head) and with padding and
// documents (runs kept per batch item), for every head and batch item, the
// kept runs included (each head asked twice).
func TestRowRunsMatchRuleFunc(t *testing.T) {
	for _, name := range []string{"explicit_bad.npz", "shift_padded_bad.npz", "documents_bad.npz", "cross_padding_bad.npz"} {
		ex, err := loader.Open([]string{filepath.Join("..", "testdata", "cases", name)}, loader.NewOptions())
		if err != nil {
			t.Fatal(err)
		}
		for _, blk := range ex.Blocks {
			bi := newBlockInfo(ex, blk)
			for pass := 0; pass < 2; pass++ {
				for b := 0; b < blk.Batch; b++ {
					for h := 0; h < blk.Heads; h++ {
						cell, runs := bi.ruleFunc(b, h), bi.rowRunsFunc(b, h)
						if (cell == nil) != (runs == nil) {
							t.Fatalf("%s %s: ruleFunc nil %v, rowRunsFunc nil %v", name, blk.Name, cell == nil, runs == nil)
						}
						if cell == nil {
							continue
						}
						for q := 0; q < blk.Queries; q++ {
							ends, rules := runs(q)
							a := 0
							for i, e := range ends {
								for k := a; k < int(e); k++ {
									if want := cell(q, k); rules[i] != want {
										t.Fatalf("%s %s B%d H%d (q %d, k %d): run says %q, ruleFunc %q", name, blk.Name, b, h, q, k, rules[i], want)
									}
								}
								a = int(e)
							}
							if a != blk.Keys {
								t.Fatalf("%s %s row %d: runs end at %d of %d keys", name, blk.Name, q, a, blk.Keys)
							}
						}
					}
				}
			}
		}
		ex.Close()
	}
}
