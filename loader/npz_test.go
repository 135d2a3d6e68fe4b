package loader

import (
	"archive/zip"
	"bytes"
	"compress/flate"
	"fmt"
	"hash/crc32"
	"os"
	"strings"
	"testing"
)

// A deflated member whose zip directory and NPY header both claim far more
// data than DEFLATE can produce from its compressed bytes (about 1032:1 at
// best, RFC 1951) is refused before anything is allocated for it.
func TestDeflateRatioBound(t *testing.T) {
	npy := npyBytes("<f4", []int{100000, 100000}, nil) // its header only
	var comp bytes.Buffer
	fw, _ := flate.NewWriter(&comp, flate.BestCompression)
	fw.Write(npy)
	fw.Write(make([]byte, 4096))
	fw.Close()
	var zb bytes.Buffer
	zw := zip.NewWriter(&zb)
	w, err := zw.CreateRaw(&zip.FileHeader{Name: "x.npy", Method: zip.Deflate,
		CRC32: crc32.ChecksumIEEE(npy), CompressedSize64: uint64(comp.Len()), UncompressedSize64: 40_000_000_128})
	if err != nil {
		t.Fatal(err)
	}
	w.Write(comp.Bytes())
	zw.Close()
	_, err = newNPZ("bomb.npz", memFile("bomb.npz", zb.Bytes()))
	want := fmt.Sprintf("bomb.npz: x: declared uncompressed size 40000000128 bytes is more than DEFLATE can make of its %d compressed bytes", comp.Len())
	if err == nil || !strings.HasPrefix(err.Error(), want) {
		t.Fatalf("newNPZ = %v, want %q...", err, want)
	}
}

// deflatedNPZ returns an NPZ (numpy.savez_compressed's layout: one deflated
// member NAME.npy) holding a float32 array of zeros of the given shape.
func deflatedNPZ(t *testing.T, name string, shape []int, n int) []byte {
	t.Helper()
	npy := npyBytes("<f4", shape, nil)
	var zb bytes.Buffer
	zw := zip.NewWriter(&zb)
	w, err := zw.CreateHeader(&zip.FileHeader{Name: name + ".npy", Method: zip.Deflate})
	if err != nil {
		t.Fatal(err)
	}
	w.Write(npy)
	w.Write(make([]byte, 4*n))
	if err := zw.Close(); err != nil {
		t.Fatal(err)
	}
	return zb.Bytes()
}

// TestInflateToTempFile: a deflated member over inflateInMemory is inflated
// into a temporary file, read by pread (the array's src), and refused with
// one line when the temporary directory has not the room.
func TestInflateToTempFile(t *testing.T) {
	const n = 10 << 20 // 40 MiB of float32 zeros
	data := deflatedNPZ(t, "decoder/attn", []int{10, 1048576}, n)
	open := func() (*npzFile, *rawArray) {
		z, err := newNPZ("big.npz", memFile("big.npz", data))
		if err != nil {
			t.Fatal(err)
		}
		a := z.arrays[0].(*rawArray)
		if a.src == nil || len(z.temps) != 1 || z.temps[0].file == nil {
			t.Fatalf("a member of %d bytes is not inflated into a temporary file", 4*n)
		}
		return z, a
	}
	z, a := open()
	row := make([]float32, 1048576)
	row[7] = 1
	if err := a.ReadFloat32([]int{9}, row); err != nil {
		t.Fatal(err)
	}
	if row[7] != 0 || a.src.f == nil {
		t.Errorf("read %v from the temporary file (mapped %v)", row[7], a.src.f != nil)
	}
	z.Close()

	z, a = open()
	defer z.Close()
	z.temps[0].free = func(string) (int64, bool) { return 1 << 20, true } // before the first read inflates
	err := a.ReadFloat32([]int{9}, row)
	want := fmt.Sprintf("big.npz: decoder/attn: inflating it takes %d bytes of temporary space, %s has 1048576 free (set TMPDIR to a larger disk)", 4*n+128, os.TempDir())
	if err == nil || err.Error() != want {
		t.Errorf("error %v, want %q", err, want)
	}
}
