package loader

import (
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"
)

// TestPreadSameAsMapping: a whole head read with a positioned read of the
// file (the default for mapped files) is the same, bit for bit, as the copy
// through the mapping (Options.ThroughMapping), for every export fixture the loader
// maps (NPY, stored and zip64 NPZ, safetensors; float16 and float32; the
// mapping path is the one TestFixtures and TestViewRaw16 check against
// numpy), and a mapped file gives no view unless ThroughMapping is set.
func TestPreadSameAsMapping(t *testing.T) {
	files, err := filepath.Glob(filepath.Join("..", "testdata", "fixtures", "*", "*"))
	if err != nil {
		t.Fatal(err)
	}
	checked, filesRead := 0, 0
	for _, file := range files {
		if !strings.HasSuffix(file, ".npy") && !strings.HasSuffix(file, ".npz") && !strings.HasSuffix(file, ".safetensors") {
			continue
		}
		if strings.Contains(file, string(filepath.Separator)+"bad"+string(filepath.Separator)) {
			continue
		}
		var got [2][][]float32
		var raw [2][][]uint16
		for i, mapped := range []bool{false, true} {
			opt := NewOptions()
			opt.ThroughMapping = mapped
			ex, err := Open([]string{file}, opt)
			if err != nil {
				break // not an export (plain arrays): other tests cover it
			}
			for _, b := range ex.Blocks {
				n := b.Queries * b.Keys
				for l := 0; l < b.Layers; l++ {
					for bt := 0; bt < b.Batch; bt++ {
						for h := 0; h < b.Heads; h++ {
							f := make([]float32, n)
							if err := b.ReadAttn(l, bt, h, f); err != nil {
								t.Fatalf("%s: %v", file, err)
							}
							got[i] = append(got[i], f)
							r := make([]uint16, n)
							if _, err := b.ReadRaw16(l, bt, h, r); err != nil {
								t.Fatalf("%s: %v", file, err)
							}
							raw[i] = append(raw[i], r)
							if ra, ok := b.attn[l].flat.(*rawArray); ok && ra.src != nil && !mapped {
								filesRead++
								if v, d, _, err := b.ViewRaw16(l, bt, h); err != nil || v != nil || d != Invalid {
									t.Fatalf("%s: ViewRaw16 of a mapped file = %d patterns, %v, %v; want none", file, len(v), d, err)
								}
							}
						}
					}
				}
			}
			ex.Close()
		}
		if got[0] == nil {
			continue
		}
		checked++
		for i := range got[0] {
			same := slices.EqualFunc(got[0][i], got[1][i], func(a, b float32) bool { return a == b || (a != a && b != b) })
			if !same || !slices.Equal(raw[0][i], raw[1][i]) {
				t.Fatalf("%s: head %d: positioned read and mapping differ", file, i)
			}
		}
	}
	if checked < 3 || filesRead == 0 {
		t.Fatalf("only %d export fixtures checked, %d heads read from the file", checked, filesRead)
	}
}

// TestPreadTruncated: a file cut short after it was opened gives an error
// naming it when a head past the new end is read, not a crash (reading a
// mapping past the end of its file raises SIGBUS).
func TestPreadTruncated(t *testing.T) {
	src, err := os.ReadFile(filepath.Join("..", "testdata", "fixtures", "exports", "gqa.safetensors"))
	if err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(t.TempDir(), "cut.safetensors")
	if err := os.WriteFile(path, src, 0o644); err != nil {
		t.Fatal(err)
	}
	ex, err := Open([]string{path}, NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	defer ex.Close()
	b := ex.Blocks[0]
	if err := os.Truncate(path, int64(len(src)/2)); err != nil {
		t.Fatal(err)
	}
	r := make([]uint16, b.Queries*b.Keys)
	l, bt, h := b.Layers-1, b.Batch-1, b.Heads-1 // the last head: past the cut
	_, err = b.ReadRaw16(l, bt, h, r)
	if err == nil {
		t.Fatal("reading past the end of a truncated file succeeded")
	}
	// one line: the file once, the array, what is wrong
	want := path + ": " + b.Name + "/attn/" + strconv.Itoa(l) + ": the file got shorter while heed read it"
	if msg := err.Error(); !strings.HasPrefix(msg, want) || strings.Count(msg, "cut.safetensors") != 1 || strings.Contains(msg, "\n") {
		t.Errorf("error %q, want %q... naming the file once", msg, want)
	}
}

// TestMappingTruncated: reads that go through the mapping (here a
// big-endian array, converted from the mapped bytes) of a file cut short
// after it was opened give an error naming the file and the array once,
// not a crash: a fault past the end of the file (SIGBUS) is caught.
func TestMappingTruncated(t *testing.T) {
	b := npyBytes(">f4", []int{16, 4096}, make([]byte, 16*4096*4))
	path := filepath.Join(t.TempDir(), "cut.npy")
	if err := os.WriteFile(path, b, 0o644); err != nil {
		t.Fatal(err)
	}
	c, err := OpenFile(path)
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	a := c.Arrays()[0]
	if err := os.Truncate(path, 100); err != nil {
		t.Fatal(err)
	}
	err = a.ReadFloat32([]int{15}, make([]float32, 4096))
	checkRefusal(t, "ReadFloat32", err, path, "cut: the file got shorter while heed read it")
}
