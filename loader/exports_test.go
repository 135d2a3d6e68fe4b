package loader

import (
	"math"
	"path/filepath"
	"reflect"
	"strconv"
	"strings"
	"testing"
)

// Exports under testdata/fixtures/exports are written by gen_fixtures.py in
// heed-export/1 (numpy savez, h5py, hand-written safetensors, a directory of
// NPY files); heads.json holds heads as numpy / h5py / PyTorch read them.

type headRef struct {
	File    string   `json:"file"`
	Block   string   `json:"block"`
	Layer   int      `json:"layer"`
	Batch   int      `json:"batch"`
	Head    int      `json:"head"`
	F32Bits []string `json:"f32_bits"`
}

func TestExportHeads(t *testing.T) {
	var heads []headRef
	loadJSON(t, filepath.Join(fixtures, "exports", "heads.json"), &heads)
	for _, h := range heads {
		path := filepath.Join(fixtures, "exports", h.File)
		if filepath.Ext(path) == ".h5" && !HDF5Supported {
			continue
		}
		ex, err := Open([]string{path}, NewOptions())
		if err != nil {
			t.Errorf("%s: %v", h.File, err)
			continue
		}
		b := ex.Block(h.Block)
		if b == nil {
			t.Errorf("%s: no block %q", h.File, h.Block)
			ex.Close()
			continue
		}
		dst := make([]float32, b.Queries*b.Keys)
		if len(dst) != len(h.F32Bits) {
			t.Errorf("%s: %s head of %d values, reference has %d", h.File, h.Block, len(dst), len(h.F32Bits))
		} else if err := b.ReadAttn(h.Layer, h.Batch, h.Head, dst); err != nil {
			t.Errorf("%s: ReadAttn: %v", h.File, err)
		} else {
			for i, hx := range h.F32Bits {
				w, _ := strconv.ParseUint(hx, 16, 32)
				if math.Float32bits(dst[i]) != uint32(w) {
					t.Errorf("%s: %s L%d B%d H%d [%d] = %08x, reference %s", h.File, h.Block, h.Layer, h.Batch, h.Head, i, math.Float32bits(dst[i]), hx)
					break
				}
			}
		}
		ex.Close()
	}
}

// TestExportCausalRead checks one whole NPZ export against the convention:
// gradients, padding and the allocation-free head read on mapped bytes.
func TestExportCausalRead(t *testing.T) {
	for _, f := range []string{"causal.npz", "causal_zip64.npz"} {
		ex, err := Open([]string{filepath.Join(fixtures, "exports", f)}, NewOptions())
		if err != nil {
			t.Fatal(err)
		}
		b := ex.Block("decoder")
		s := ex.Side("target")
		if !b.HasGrad || s == nil || s.IsValid(1, 3) || !s.IsValid(1, 2) || s.Token(0, 1) != " cat" {
			t.Errorf("%s: block %+v side %+v", f, b, s)
		}
		dst := make([]float32, b.Queries*b.Keys)
		if err := b.ReadAttn(0, 0, 0, dst); err != nil {
			t.Fatal(err)
		}
		if f == "causal.npz" {
			if n := testing.AllocsPerRun(50, func() { _ = b.ReadAttn(1, 1, 1, dst) }); n != 0 {
				t.Errorf("%s: ReadAttn allocates %v times per call on a stored member, want 0", f, n)
			}
		}
		// Rows are softmax outputs (computed in float64 by the generator and
		// rounded to float16): causal cells above the diagonal are exactly 0.
		for q := 0; q < b.Queries; q++ {
			for k := q + 1; k < b.Keys; k++ {
				if dst[q*b.Keys+k] != 0 {
					t.Errorf("%s: [%d,%d] = %v above the diagonal", f, q, k, dst[q*b.Keys+k])
				}
			}
		}
		ex.Close()
	}
}

func TestOpenSetGrouping(t *testing.T) {
	e := filepath.Join(fixtures, "exports")
	// Two whole exports: two examples. A directory of per-layer files: one.
	set, err := OpenSet([]string{filepath.Join(e, "causal.npz"), filepath.Join(e, "causal_zip64.npz")}, NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	if set.Len() != 2 || len(set.Layout()) != 1 || set.Layout()[0].Layers != 2 {
		t.Errorf("set = %+v layout %+v", set.Examples, set.Layout())
	}
	ex, err := set.Open(1)
	if err != nil {
		t.Fatal(err)
	}
	if ex.Paths[0] != filepath.Join(e, "causal_zip64.npz") {
		t.Errorf("example 1 = %v", ex.Paths)
	}
	ex.Close()
	set, err = OpenSet([]string{filepath.Join(e, "decode_step")}, NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	if set.Len() != 1 || len(set.Examples[0]) != 5 {
		t.Errorf("decode_step: %d examples %v", set.Len(), set.Examples)
	}
	// Different layouts are refused: when the example is opened, and by
	// Check, which opens every example (OpenSet assembles only the first).
	set, err = OpenSet([]string{filepath.Join(e, "causal.npz"), filepath.Join(e, "lone.npy"), filepath.Join(e, "lone.npy")}, NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	if err := set.Check(); err == nil || !strings.Contains(err.Error(), "lone.npy") {
		t.Errorf("mixed layouts: Check: %v, want an error naming lone.npy", err)
	}
	if _, err := set.Open(1); err == nil {
		t.Error("mixed layouts: Open(1): no error")
	}
	// Open joins files whose names do not collide.
	ex, err = Open([]string{filepath.Join(e, "lone.npy"), filepath.Join(e, "causal.npz")}, NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	var names []string
	for _, b := range ex.Blocks {
		names = append(names, b.Name)
	}
	if !reflect.DeepEqual(names, []string{"decoder"}) {
		// lone.npy's array "lone" is outside the convention once the
		// convention found a block: it is reported, not assembled.
		t.Errorf("blocks %v", names)
	}
	if len(ex.Warnings) == 0 {
		t.Error("no warning for the ignored array")
	}
	ex.Close()
}
