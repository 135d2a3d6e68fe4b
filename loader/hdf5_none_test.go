//go:build !cgo || nohdf5

package loader

import (
	"errors"
	"path/filepath"
	"strings"
	"testing"
)

// TestNoHDF5Refuses: a build without cgo refuses an HDF5 file (the h5py
// fixture) with ErrNoHDF5 and an error naming the file, and still opens the
// other containers (the NumPy NPZ fixture).
func TestNoHDF5Refuses(t *testing.T) {
	if HDF5Supported {
		t.Fatal("HDF5Supported in a build without HDF5")
	}
	h5 := filepath.Join("..", "testdata", "fixtures", "exports", "encdec.h5")
	_, err := Open([]string{h5}, NewOptions())
	if !errors.Is(err, ErrNoHDF5) || !strings.Contains(err.Error(), "encdec.h5") {
		t.Fatalf("Open(%s) = %v, want ErrNoHDF5 naming the file", h5, err)
	}
	ex, err := Open([]string{filepath.Join("..", "testdata", "fixtures", "npz", "stored.npz")}, NewOptions())
	if err != nil {
		t.Fatalf("NPZ in a build without HDF5: %v", err)
	}
	ex.Close()
}
