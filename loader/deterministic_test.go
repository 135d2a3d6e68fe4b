package loader

import (
	"archive/zip"
	"encoding/binary"
	"errors"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"github.com/heed-dev/heed/internal/testpy"
)

// Opening the same file gives the same answer every time: no choice
// between arrays or blocks follows Go's map order (50 opens of files where
// it used to).
func TestOpenIsDeterministic(t *testing.T) {
	py := testpy.Require(t, "numpy")
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
	if out, err := exec.Command(py, "-c", script, gradOnly, metaMany).CombinedOutput(); err != nil {
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

// writeZip writes a zip archive of the given members (name, bytes), stored.
func writeZip(t *testing.T, path string, members ...[2]string) {
	t.Helper()
	f, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	zw := zip.NewWriter(f)
	for _, m := range members {
		w, err := zw.CreateHeader(&zip.FileHeader{Name: m[0], Method: zip.Store})
		if err != nil {
			t.Fatal(err)
		}
		w.Write([]byte(m[1]))
	}
	if err := zw.Close(); err != nil {
		t.Fatal(err)
	}
	f.Close()
}

// npyMember is an NPZ member: a [2, 4, 4] float32 array of 0.25 (a head of
// uniform rows) in the NPY format.
func npyMember(name string) [2]string {
	var data []byte
	for i := 0; i < 2*4*4; i++ {
		data = binary.LittleEndian.AppendUint32(data, math.Float32bits(0.25))
	}
	return [2]string{name + ".npy", string(npyBytes("<f4", []int{2, 4, 4}, data))}
}

// Where two arrays could both be meant, opening is an error that names
// them and says how to choose, the same error every time (50 opens each).
func TestAmbiguousIsOneError(t *testing.T) {
	dir := t.TempDir()
	for _, c := range []struct {
		name    string
		members [][2]string
		want    string
	}{
		{"whole and layers", [][2]string{npyMember("attn"), npyMember("attn_0"), npyMember("attn_1")},
			`arrays attn, attn_0 and attn_1 could each be the attention of block "attn" (attn as a whole, the others as its layers): say which by naming them`},
		{"one layer twice", [][2]string{npyMember("layer_0"), npyMember("layer_1"), npyMember("layer.1")},
			`arrays layer.1 and layer_1 both number layer 1 of block "layer": say which`},
		{"one block name twice", [][2]string{npyMember("0"), npyMember("1"), npyMember("attn")},
			`arrays 0, 1 and attn could each be the attention of block "attn": say which`},
		{"two torch archives", [][2]string{{"a/data.pkl", "\x80\x02}q\x00."}, {"b/data.pkl", "\x80\x02}q\x00."}},
			"holds 2 torch.save archives (a/data.pkl, b/data.pkl), each of which could be the one meant: save one object per file"},
	} {
		path := filepath.Join(dir, strings.ReplaceAll(c.name, " ", "_")+".zip")
		writeZip(t, path, c.members...)
		var first string
		for i := 0; i < 50; i++ {
			ex, err := Open([]string{path}, NewOptions())
			if err == nil {
				ex.Close()
				t.Fatalf("%s: opened", c.name)
			}
			var fe *FormatError
			if i == 0 {
				first = err.Error()
				if !errors.As(err, &fe) || !strings.HasPrefix(first, path+": ") || !strings.Contains(first, c.want) || strings.Contains(first, "\n") {
					t.Errorf("%s: %q, want one line naming the file and %q", c.name, first, c.want)
				}
			} else if err.Error() != first {
				t.Fatalf("%s: open %d: %q, open 0: %q", c.name, i, err, first)
			}
		}
	}
	// numbered arrays without a whole one are still the layers of one block
	path := filepath.Join(dir, "layers.zip")
	writeZip(t, path, npyMember("layer_1"), npyMember("layer_0"))
	ex, err := Open([]string{path}, NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	defer ex.Close()
	if len(ex.Blocks) != 1 || ex.Blocks[0].Name != "layer" || ex.Blocks[0].Layers != 2 || ex.Blocks[0].Source != "layer_0 ... layer_1" {
		t.Errorf("layer_0, layer_1: %d blocks, first %+v", len(ex.Blocks), ex.Blocks[0])
	}
}
