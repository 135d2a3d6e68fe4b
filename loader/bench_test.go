package loader

import (
	"encoding/binary"
	"fmt"
	"math/rand"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// writeNPY writes a C-order little-endian NPY v1.0 file of dtype descr and
// shape with data from fill (numpy's format module docstring gives the layout).
func writeNPY(tb testing.TB, path, descr string, shape []int, data []byte) {
	if err := os.WriteFile(path, npyBytes(descr, shape, data), 0o644); err != nil {
		tb.Fatal(err)
	}
}

// npyBytes is an NPY 1.0 file (numpy.lib.format's docstring: magic,
// version, little-endian header length, a dict literal padded with spaces
// so that the data starts at a multiple of 64) holding data.
func npyBytes(descr string, shape []int, data []byte) []byte {
	dims := make([]string, len(shape))
	for i, d := range shape {
		dims[i] = fmt.Sprint(d)
	}
	hdr := fmt.Sprintf("{'descr': '%s', 'fortran_order': False, 'shape': (%s,), }", descr, strings.Join(dims, ", "))
	pad := (64 - (10+len(hdr)+1)%64) % 64
	hdr += strings.Repeat(" ", pad) + "\n"
	b := append([]byte("\x93NUMPY\x01\x00"), byte(len(hdr)), byte(len(hdr)>>8))
	b = append(b, hdr...)
	return append(b, data...)
}

// BenchmarkReadAttn reads every head of a mapped float16 NPY export
// [layers=2, heads=4, n, n] once per iteration (random bits, seed 1).
func BenchmarkReadAttn(b *testing.B) {
	for _, n := range []int{128, 512, 1024} {
		b.Run(fmt.Sprintf("f16_%d", n), func(b *testing.B) {
			shape := []int{2, 4, n, n}
			r := rand.New(rand.NewSource(1))
			data := make([]byte, 2*prod(shape))
			for i := 0; i < len(data); i += 2 {
				binary.LittleEndian.PutUint16(data[i:], uint16(r.Intn(0x3c00))) // values in [0, 1)
			}
			path := filepath.Join(b.TempDir(), "attn.npy")
			writeNPY(b, path, "<f2", shape, data)
			ex, err := Open([]string{path}, NewOptions())
			if err != nil {
				b.Fatal(err)
			}
			defer ex.Close()
			blk := ex.Blocks[0]
			dst := make([]float32, n*n)
			b.SetBytes(int64(len(data)))
			b.ReportAllocs()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				for l := 0; l < blk.Layers; l++ {
					for h := 0; h < blk.Heads; h++ {
						if err := blk.ReadAttn(l, 0, h, dst); err != nil {
							b.Fatal(err)
						}
					}
				}
			}
		})
	}
}
