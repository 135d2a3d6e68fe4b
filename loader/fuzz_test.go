package loader

import (
	"os"
	"path/filepath"
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
