package loader

import (
	"errors"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
)

// Fuzz targets for the parsers, seeded from every fixture of their format
// (good and bad) and from the hostile corpus (testdata/hostile). Inputs over maxFuzzInput bytes are skipped so each run
// stays fast; the parsers must return errors, never panic, hang or allocate
// more than the input justifies.
//
//	go test ./loader -run '^$' -fuzz FuzzNPY -fuzztime 20s

const maxFuzzInput = 64 << 10

func seedFrom(f *testing.F, exts ...string) {
	n := 0
	walk := func(p string, d os.DirEntry, err error) error {
		if err != nil || d.IsDir() {
			return nil
		}
		for _, e := range exts {
			if strings.HasSuffix(p, e) {
				if b, err := os.ReadFile(p); err == nil && len(b) <= maxFuzzInput {
					f.Add(b)
					n++
				}
			}
		}
		return nil
	}
	filepath.WalkDir(fixtures, walk)
	filepath.WalkDir(hostileDir, walk)
	if n == 0 {
		f.Fatalf("no seeds with %v under %s", exts, fixtures)
	}
}

// readAll reads every array whole, as heed does for tokens and masks.
func readAll(arrs []Array) {
	for _, a := range arrs {
		n := prod(a.Shape())
		switch {
		case a.DType() == String:
			_, _ = a.ReadStrings()
		case n <= 1<<20:
			_ = a.ReadFloat32(nil, make([]float32, n))
			if a.DType().IsInt() {
				_ = a.ReadInt64(nil, make([]int64, n))
			}
			if sh := a.Shape(); len(sh) > 0 && sh[0] > 0 {
				_ = a.ReadFloat32([]int{sh[0] - 1}, make([]float32, n/sh[0]))
			}
		}
	}
}

// assembleAndRead runs the convention over the arrays and reads every head.
func assembleAndRead(arrs []Array, meta string) {
	ex, err := Assemble(arrs, meta, NewOptions())
	if err != nil {
		return
	}
	for _, b := range ex.Blocks {
		if b.Layers == 0 || b.Queries*b.Keys > 1<<20 {
			continue
		}
		buf := make([]float32, b.Queries*b.Keys)
		mask := make([]bool, len(buf))
		for l := 0; l < b.Layers; l++ {
			_ = b.ReadAttn(l, b.Batch-1, b.Heads-1, buf)
			if b.HasGrad {
				_ = b.ReadGrad(l, 0, 0, buf)
			}
		}
		_ = b.ReadAllow(0, 0, mask)
	}
}

func FuzzNPY(f *testing.F) {
	seedFrom(f, ".npy")
	f.Fuzz(func(t *testing.T, data []byte) {
		if len(data) > maxFuzzInput {
			return
		}
		a, err := npyArray(data, hasFile, "fuzz.npy", "decoder/attn", &lifetime{})
		if err != nil {
			return
		}
		readAll([]Array{a})
		assembleAndRead([]Array{a}, "")
	})
}

// fuzzContainer runs a container parser on fuzzed file bytes, then reads
// every array and assembles the export, as the commands would.
func fuzzContainer(f *testing.F, ext string, open func(name string, mf *mappedFile) (Container, error)) {
	seedFrom(f, ext)
	f.Fuzz(func(t *testing.T, data []byte) {
		if len(data) > maxFuzzInput {
			return
		}
		c, err := open("fuzz"+ext, memFile("fuzz"+ext, data))
		if err != nil {
			return
		}
		defer c.Close()
		readAll(c.Arrays())
		m, _ := c.Meta()
		assembleAndRead(c.Arrays(), m)
	})
}

func FuzzNPZ(f *testing.F) {
	fuzzContainer(f, ".npz", func(name string, mf *mappedFile) (Container, error) { return newNPZ(name, mf) })
}

func FuzzSafetensors(f *testing.F) {
	fuzzContainer(f, ".safetensors", func(name string, mf *mappedFile) (Container, error) { return newSafetensors(name, mf) })
}

func FuzzTorch(f *testing.F) {
	fuzzContainer(f, ".pt", func(name string, mf *mappedFile) (Container, error) {
		return newTorch(fileRef{path: name, npyName: "fuzz"}, mf)
	})
}

// FuzzMeta runs the heed-export/1 metadata (the meta JSON: format,
// compute_dtype, blocks and their kind, sides, axes, window, prefix,
// kv_heads, query_start) through merging and validation over a fixed set of
// arrays: any text gives an export or one *FormatError line, never a panic,
// and the same text the same answer (no choice follows map order). Seeds:
// the metadata of every fixture and test export that has one.
//
//	go test ./loader -run '^$' -fuzz FuzzMeta -fuzztime 20s
func FuzzMeta(f *testing.F) {
	n := 0
	for _, dir := range []string{fixtures, "../testdata/cases", "../testdata/verdict", "../testdata/invariance"} {
		filepath.WalkDir(dir, func(p string, d os.DirEntry, err error) error {
			if err != nil || d.IsDir() {
				return nil
			}
			if _, ok := exportExts[strings.ToLower(filepath.Ext(p))]; !ok {
				return nil
			}
			c, err := openFile(fileRef{path: p, npyName: "attn"})
			if err != nil {
				return nil
			}
			if m, ok := c.Meta(); ok {
				f.Add(m)
				n++
			}
			c.Close()
			return nil
		})
	}
	if n < 10 {
		f.Fatalf("%d metadata seeds", n)
	}
	arrays := func() []Array {
		return []Array{
			NewMemArray("decoder/attn", Float32, []int{2, 2, 3, 4}, fill([]int{2, 2, 3, 4})),
			NewMemArray("cross/attn", Float32, []int{2, 2, 3, 5}, fill([]int{2, 2, 3, 5})),
			NewMemArray("cross/qpos", Int64, []int{3}, []float64{0, 1, 2}),
			NewMemStrings("tokens/target", []int{4}, toks(4)),
			NewMemStrings("tokens/source", []int{5}, toks(5)),
			NewMemArray("valid/source", Bool, []int{5}, []float64{1, 1, 1, 1, 0}),
		}
	}
	f.Fuzz(func(t *testing.T, meta string) {
		if len(meta) > maxFuzzInput {
			return
		}
		ex, err := Assemble(arrays(), meta, NewOptions())
		ex2, err2 := Assemble(arrays(), meta, NewOptions())
		if (err == nil) != (err2 == nil) || err != nil && err.Error() != err2.Error() {
			t.Fatalf("two answers: %v / %v", err, err2)
		}
		if err != nil {
			var fe *FormatError
			if !errors.As(err, &fe) || strings.Contains(err.Error(), "\n") {
				t.Fatalf("error %q is not one *FormatError line", err)
			}
			return
		}
		if !slices.Equal(ex.Warnings, ex2.Warnings) {
			t.Fatalf("warnings differ: %q / %q", ex.Warnings, ex2.Warnings)
		}
		for _, b := range ex.Blocks {
			switch b.Kind {
			case KindUnknown, KindCausal, KindBidirectional, KindCross:
			default:
				t.Fatalf("block %s: kind %q passed validation", b.Name, b.Kind)
			}
			if b.Window < 0 || b.Prefix < 0 || b.Prefix > b.Keys || b.KVHeads < 0 || b.KVHeads > 0 && b.Heads%b.KVHeads != 0 {
				t.Fatalf("block %s: window %d, prefix %d, kv_heads %d of %d heads, %d keys passed validation", b.Name, b.Window, b.Prefix, b.KVHeads, b.Heads, b.Keys)
			}
			for i := 0; i < b.Batch; i++ {
				for q := 0; q < b.Queries; q++ {
					if p := b.QueryPos(i, q); p < 0 || p >= b.Keys {
						t.Fatalf("block %s: batch item %d, query %d at key position %d of %d", b.Name, i, q, p, b.Keys)
					}
				}
			}
		}
		ex.Close()
		ex2.Close()
	})
}
