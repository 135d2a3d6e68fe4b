//go:build cgo && !nohdf5 && linux

package loader

import (
	"errors"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"strings"
	"sync"
	"syscall"
	"testing"

	"github.com/heed-dev/heed/internal/testpy"
)

// TestHDF5ReadErrorsSayNothing: a dataset whose compressed chunks are
// garbage (written by h5py with gzip, then every chunk's bytes overwritten
// at the offsets h5py reports) fails to read with heed's one-line error,
// and the HDF5 library prints nothing on the process's stderr, whichever
// OS thread the read runs on. Each read runs on a goroutine locked to an
// OS thread that ends with it, so reads land on threads the library has
// not seen before: its automatic error printing is a per-thread setting in
// a thread-safe build, and turning it off once on one thread let the
// library print its error stack on stderr beside heed's line.
func TestHDF5ReadErrorsSayNothing(t *testing.T) {
	py := testpy.Require(t, "numpy", "h5py")
	path := filepath.Join(t.TempDir(), "bad_chunks.h5")
	script := `import sys, numpy as np, h5py
with h5py.File(sys.argv[1], "w") as f:
    ds = f.create_dataset("attn", data=np.full((8, 16, 16), 1 / 16, np.float32), chunks=(1, 16, 16), compression="gzip")
    where = [ds.id.get_chunk_info(i) for i in range(ds.id.get_num_chunks())]
with open(sys.argv[1], "r+b") as f:
    for c in where:
        f.seek(c.byte_offset)
        f.write(b"\xff" * c.size)`
	if out, err := exec.Command(py, "-c", script, path).CombinedOutput(); err != nil {
		t.Skipf("h5py: %v\n%s", err, out)
	}

	// stderr (fd 2) goes to a file while the library is called
	capture, err := os.Create(filepath.Join(t.TempDir(), "stderr"))
	if err != nil {
		t.Fatal(err)
	}
	defer capture.Close()
	saved, err := syscall.Dup(2)
	if err != nil {
		t.Fatal(err)
	}
	if err := syscall.Dup3(int(capture.Fd()), 2, 0); err != nil {
		t.Fatal(err)
	}
	restored := false
	restore := func() {
		if !restored {
			syscall.Dup3(saved, 2, 0)
			syscall.Close(saved)
			restored = true
		}
	}
	defer restore()

	c, err := OpenFile(path)
	if err != nil {
		restore()
		t.Fatalf("open: %v", err)
	}
	defer c.Close()
	a := c.Arrays()[0]
	errs := make([]error, 8)
	var wg sync.WaitGroup
	for i := range errs {
		wg.Add(1)
		go func() {
			defer wg.Done()
			runtime.LockOSThread() // not unlocked: the thread ends with the goroutine
			errs[i] = a.ReadFloat32([]int{i}, make([]float32, 16*16))
		}()
		wg.Wait() // one at a time: each on a thread of its own
	}
	restore()

	for i, err := range errs {
		var fe *FormatError
		if !errors.As(err, &fe) || !strings.Contains(err.Error(), "the HDF5 library cannot read the data") {
			t.Errorf("chunk %d: error %v, want heed's FormatError saying the library cannot read the data", i, err)
		}
	}
	out, err := os.ReadFile(capture.Name())
	if err != nil {
		t.Fatal(err)
	}
	if len(out) > 0 {
		t.Errorf("the HDF5 library wrote %d bytes on stderr:\n%.600s", len(out), out)
	}
}
