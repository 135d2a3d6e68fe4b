package loader

import (
	"path/filepath"
	"slices"
	"testing"
)

// TestViewRaw16 checks the in-place view of a head's float16 patterns
// against the copy ReadRaw16 makes and against ReadAttn's conversion (the
// values numpy wrote: gen_fixtures.py's export_causal_arrays, float16), in
// a stored NPZ (mapped: views only with Options.ThroughMapping) and a deflated one, and
// that Close waits for the views to be released and later views fail.
func TestViewRaw16(t *testing.T) {
	opt := NewOptions()
	opt.ThroughMapping = true
	for _, name := range []string{"stored.npz", "deflated.npz"} {
		ex, err := Open([]string{filepath.Join("..", "testdata", "fixtures", "npz", name)}, opt)
		if err != nil {
			t.Fatal(err)
		}
		blk := ex.Block("decoder")
		n := blk.Queries * blk.Keys
		cp, f := make([]uint16, n), make([]float32, n)
		tab := F16ToF32Table()
		var releases []func()
		for l := 0; l < blk.Layers; l++ {
			for b := 0; b < blk.Batch; b++ {
				for h := 0; h < blk.Heads; h++ {
					v, d, release, err := blk.ViewRaw16(l, b, h)
					if err != nil || d != Float16 || len(v) != n {
						t.Fatalf("%s: ViewRaw16(%d, %d, %d) = %d patterns, %v, %v; want %d, float16", name, l, b, h, len(v), d, err, n)
					}
					if _, err := blk.ReadRaw16(l, b, h, cp); err != nil {
						t.Fatal(err)
					}
					if !slices.Equal(v, cp) {
						t.Fatalf("%s: head (%d, %d, %d): view %v, copy %v", name, l, b, h, v, cp)
					}
					if err := blk.ReadAttn(l, b, h, f); err != nil {
						t.Fatal(err)
					}
					for i, p := range v {
						if tab[p] != f[i] && !(f[i] != f[i] && tab[p] != tab[p]) {
							t.Fatalf("%s: head (%d, %d, %d) element %d: table %v, ReadAttn %v", name, l, b, h, i, tab[p], f[i])
						}
					}
					releases = append(releases, release)
				}
			}
		}
		done := make(chan error)
		go func() { done <- ex.Close() }()
		for _, r := range releases {
			r()
			r() // a second call is harmless
		}
		if err := <-done; err != nil {
			t.Fatalf("%s: Close: %v", name, err)
		}
		if _, _, _, err := blk.ViewRaw16(0, 0, 0); err == nil {
			t.Fatalf("%s: ViewRaw16 after Close succeeded", name)
		}
	}
}

// RawTable gives, for every pattern, what ReadAttn converts it to: the
// float16 table (checked against numpy in convert_test.go) and, for
// bfloat16, bf16ToF32 (checked against PyTorch there); none for other dtypes.
func TestRawTable(t *testing.T) {
	if RawTable(Float16) != F16ToF32Table() {
		t.Error("RawTable(Float16) is not the float16 table")
	}
	bf := RawTable(BFloat16)
	for i := range bf {
		if a, b := bf[i], bf16ToF32(uint16(i)); a != b && !(a != a && b != b) {
			t.Fatalf("RawTable(BFloat16)[%#04x] = %v, want %v", i, a, b)
		}
	}
	if RawTable(Float32) != nil {
		t.Error("RawTable(Float32) is not nil")
	}
}
