package loader

import (
	"archive/zip"
	"bytes"
	"compress/flate"
	"fmt"
	"hash/crc32"
	"strings"
	"testing"
)

// A deflated member whose zip directory and NPY header both claim far more
// data than DEFLATE can produce from its compressed bytes (about 1032:1 at
// best, RFC 1951) is refused before anything is allocated for it.
func TestDeflateRatioBound(t *testing.T) {
	hdr := "{'descr': '<f4', 'fortran_order': False, 'shape': (100000, 100000), }"
	pad := 64 - (10+len(hdr)+1)%64
	npy := []byte("\x93NUMPY\x01\x00")
	hl := len(hdr) + pad + 1
	npy = append(npy, byte(hl), byte(hl>>8))
	npy = append(npy, hdr+strings.Repeat(" ", pad)+"\n"...)
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
