//go:build cgo && !nohdf5

package loader

import (
	"math"
	"os/exec"
	"path/filepath"
	"testing"

	"github.com/heed-dev/heed/internal/testpy"
)

// TestHDF5Float16AllPatterns: every float16 bit pattern written by h5py (as
// numpy float16, h5py's IEEE half type) and read through the HDF5 fast path
// (stored bytes widened by heed's table) equals numpy's float16 -> float32
// conversion (testdata/fixtures/conv/f16_to_f32_numpy.npz, numpy 1.24),
// NaN payloads included.
func TestHDF5Float16AllPatterns(t *testing.T) {
	py := testpy.Path()
	path := filepath.Join(t.TempDir(), "bits.h5")
	script := `import sys, numpy as np, h5py
bits = np.arange(65536, dtype=np.uint32).astype(np.uint16)
with h5py.File(sys.argv[1], "w") as f:
    f.create_dataset("bits", data=bits.view(np.float16))
    f.create_dataset("chunked", data=bits.view(np.float16).reshape(256, 256), chunks=(16, 256), compression="gzip")`
	if out, err := exec.Command(py, "-c", script, path).CombinedOutput(); err != nil {
		t.Skipf("h5py: %v\n%s", err, out)
	}
	ref := readBitsRef(t, filepath.Join(fixtures, "conv", "f16_to_f32_numpy.npz"))
	c, err := OpenFile(path)
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	for _, a := range c.Arrays() {
		if h, ok := a.(*h5Array); !ok || !h.half || h.DType() != Float16 {
			t.Fatalf("%s: not read through the half-float path (%T)", a.Name(), a)
		}
		dst := make([]float32, 65536)
		if err := a.ReadFloat32(nil, dst); err != nil {
			t.Fatal(err)
		}
		bad := 0
		for i, v := range dst {
			if math.Float32bits(v) != ref[i] {
				if bad < 5 {
					t.Errorf("%s: float16 %04x -> %08x, numpy gives %08x", a.Name(), i, math.Float32bits(v), ref[i])
				}
				bad++
			}
		}
		if bad > 0 {
			t.Errorf("%s: %d of 65536 patterns differ from numpy", a.Name(), bad)
		}
		// One row of the chunked dataset: a hyperslab, widened in place.
		if a.Name() == "chunked" {
			row := make([]float32, 256)
			if err := a.ReadFloat32([]int{3}, row); err != nil {
				t.Fatal(err)
			}
			for k, v := range row {
				if math.Float32bits(v) != ref[3*256+k] {
					t.Fatalf("chunked row 3 key %d: %08x, numpy %08x", k, math.Float32bits(v), ref[3*256+k])
				}
			}
		}
	}
}
