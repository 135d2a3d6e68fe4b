package loader

import (
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"testing"
)

// Opening the same file gives the same answer every time: no choice
// between arrays or blocks follows Go's map order (50 opens of files where
// it used to).
func TestOpenIsDeterministic(t *testing.T) {
	if err := exec.Command("/usr/bin/python3", "-c", "import numpy").Run(); err != nil {
		t.Skipf("needs /usr/bin/python3 with numpy to write the files: %v", err)
	}
	dir := t.TempDir()
	gradOnly, metaMany := filepath.Join(dir, "grad_only.npz"), filepath.Join(dir, "meta_many.npz")
	script := `
import json, sys
import numpy as np
a = np.full((2, 4, 4), 0.25, dtype=np.float32)
np.savez(sys.argv[1], **{"decoder/grad/%d" % l: a for l in range(6)})
meta = {"format": "heed-export/1", "blocks": {n: {"kind": "causal"} for n in ["zeta", "alpha", "mu", "decoder"]}}
np.savez(sys.argv[2], **{"decoder/attn": np.full((2, 2, 4, 4), 0.25, dtype=np.float32), "meta": np.array(json.dumps(meta))})
`
	if out, err := exec.Command("/usr/bin/python3", "-c", script, gradOnly, metaMany).CombinedOutput(); err != nil {
		t.Fatalf("numpy: %v\n%s", err, out)
	}
	var firstErr string
	for i := 0; i < 50; i++ {
		_, err := Open([]string{gradOnly}, NewOptions())
		if err == nil {
			t.Fatal("gradients without attention opened")
		}
		if i == 0 {
			firstErr = err.Error()
			if !strings.Contains(firstErr, "decoder/grad/0") {
				t.Errorf("the error names %q, want the lowest layer's array decoder/grad/0", firstErr)
			}
		} else if err.Error() != firstErr {
			t.Fatalf("open %d: %q, open 0: %q", i, err, firstErr)
		}
	}
	var firstWarn []string
	for i := 0; i < 50; i++ {
		ex, err := Open([]string{metaMany}, NewOptions())
		if err != nil {
			t.Fatal(err)
		}
		w := ex.Warnings
		ex.Close()
		if i == 0 {
			firstWarn = w
			var named []string
			for _, s := range w {
				if strings.Contains(s, "which has no arrays") {
					named = append(named, s)
				}
			}
			if len(named) != 3 || !slices.IsSorted(named) {
				t.Errorf("warnings %q: want the three blocks without arrays, in name order", named)
			}
		} else if !slices.Equal(w, firstWarn) {
			t.Fatalf("open %d warnings %q, open 0 %q", i, w, firstWarn)
		}
	}
}
