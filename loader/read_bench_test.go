package loader_test

import (
	"fmt"
	"os/exec"
	"path/filepath"
	"testing"

	"github.com/heed-dev/heed/internal/testpy"
	"github.com/heed-dev/heed/loader"
)

// benchContainers writes bench/gen_containers.py's files (one seeded float16
// causal array [2, 4, seq, seq] in every container) into a new directory.
func benchContainers(b *testing.B, seq int) string {
	b.Helper()
	dir := b.TempDir()
	out, err := exec.Command(testpy.Path(), "../bench/gen_containers.py", dir, "--layers", "2", "--heads", "4",
		"--seq", fmt.Sprint(seq)).CombinedOutput()
	if err != nil {
		b.Skipf("bench/gen_containers.py (numpy, h5py) failed: %v\n%s", err, out)
	}
	return dir
}

var benchContainerFiles = []struct{ name, file string }{
	{"npy", "attn.npy"},
	{"npz-stored", "attn_stored.npz"},
	{"npz-deflated", "attn_deflated.npz"},
	{"safetensors", "attn.safetensors"},
	{"hdf5", "attn.h5"},
	{"hdf5-chunked-gzip", "attn_chunked.h5"},
}

// BenchmarkReadHead reads one (layer, head) matrix after another into a
// reused float32 buffer, the way the analysis pass and the TUI do, from each
// container, at two sequence lengths. The bytes are the head's stored bytes
// (float16). Files are opened once; the deflated NPZ member is inflated on
// the first read (outside the timing, by a warm-up read), as heed caches it.
func BenchmarkReadHead(b *testing.B) {
	for _, seq := range []int{256, 1024} {
		dir := benchContainers(b, seq)
		for _, c := range benchContainerFiles {
			b.Run(fmt.Sprintf("%s/S%d", c.name, seq), func(b *testing.B) {
				if filepath.Ext(c.file) == ".h5" && !loader.HDF5Supported {
					b.Skip("built without HDF5")
				}
				ex, err := loader.Open([]string{filepath.Join(dir, c.file)}, loader.NewOptions())
				if err != nil {
					b.Fatal(err)
				}
				defer ex.Close()
				blk := ex.Blocks[0]
				if blk.Queries != seq || blk.Layers*blk.Heads != 8 {
					b.Fatalf("%s: block %s is %dx%dx%d, want 2x4x%d", c.file, blk.Name, blk.Layers, blk.Heads, blk.Queries, seq)
				}
				buf := make([]float32, seq*seq)
				if err := blk.ReadAttn(0, 0, 0, buf); err != nil {
					b.Fatal(err)
				}
				b.SetBytes(int64(seq * seq * 2))
				b.ReportAllocs()
				b.ResetTimer()
				for i := range b.N {
					u := i % 8
					if err := blk.ReadAttn(u/4, 0, u%4, buf); err != nil {
						b.Fatal(err)
					}
				}
			})
		}
	}
}

// BenchmarkOpen is opening a container and assembling the export (headers,
// metadata, no data), per container.
func BenchmarkOpen(b *testing.B) {
	dir := benchContainers(b, 256)
	for _, c := range benchContainerFiles {
		b.Run(c.name, func(b *testing.B) {
			if filepath.Ext(c.file) == ".h5" && !loader.HDF5Supported {
				b.Skip("built without HDF5")
			}
			path := filepath.Join(dir, c.file)
			b.ReportAllocs()
			for range b.N {
				ex, err := loader.Open([]string{path}, loader.NewOptions())
				if err != nil {
					b.Fatal(err)
				}
				ex.Close()
			}
		})
	}
}
