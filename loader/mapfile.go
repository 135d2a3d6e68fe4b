package loader

import (
	"fmt"
	"io"
	"os"
	"unsafe"

	"github.com/edsrzf/mmap-go"
)

// mappedFile is a file opened read-only and mapped into memory, so that a
// read of one head touches only that head's pages.
type mappedFile struct {
	path string
	f    *os.File
	m    mmap.MMap // nil for an empty file
	life lifetime
	// borrowed is true when m is caller memory rather than a mapping (tests, fuzzing).
	borrowed bool
}

// memFile wraps bytes as if they were a mapped file.
func memFile(path string, b []byte) *mappedFile {
	return &mappedFile{path: path, m: b, borrowed: true}
}

func mapFile(path string) (*mappedFile, error) {
	f, st, err := openRegular(path)
	if err != nil {
		return nil, err
	}
	mf := &mappedFile{path: path, f: f}
	if st.Size() > 0 {
		if int64(int(st.Size())) != st.Size() {
			f.Close()
			return nil, &FormatError{File: path, Offset: -1, Msg: "file too large to map on this platform"}
		}
		m, err := mmap.Map(f, mmap.RDONLY, 0)
		if err != nil {
			f.Close()
			return nil, fmt.Errorf("%s: mmap: %w", path, err)
		}
		mf.m = m
		adviseSequential(m)
	}
	return mf, nil
}

// pread copies len(dst) bytes of the file into dst, starting off bytes after
// within[0], which must lie in the mapping, with a positioned read of the
// file (pread(2)) instead of through the mapping; it reports false (and
// copies nothing) when it cannot (memory rather than a file, within not in
// the mapping). Reading a head this way costs a copy in the kernel from
// the page cache; reading it through the mapping the first time costs a
// page fault every few pages, which on the machines we measured is two to
// four times as much (docs/scale.md). The caller holds the lifetime. Its
// errors are *FormatError naming the file, which the caller completes with
// the array's name (rawArray.copyBytes).
func (m *mappedFile) pread(dst, within []byte, off int) (bool, error) {
	if m.f == nil || m.borrowed || len(m.m) == 0 || len(dst) == 0 || len(within) == 0 {
		return false, nil
	}
	base, p := uintptr(unsafe.Pointer(&m.m[0])), uintptr(unsafe.Pointer(&within[0]))
	if p < base || off < 0 || p-base > uintptr(len(m.m)) || uintptr(len(m.m))-(p-base) < uintptr(off)+uintptr(len(dst)) {
		return false, nil
	}
	pos := int64(p-base) + int64(off)
	n, err := m.f.ReadAt(dst, pos)
	if n != len(dst) {
		if err == nil || err == io.EOF {
			return false, &FormatError{File: m.path, Offset: pos + int64(n), Msg: errShrunk}
		}
		return false, &FormatError{File: m.path, Offset: pos + int64(n), Msg: "cannot read the file", Err: err}
	}
	return true, nil
}

// bytes returns the whole mapping.
func (m *mappedFile) bytes() []byte { return m.m }

func (m *mappedFile) size() int64 { return int64(len(m.m)) }

// readerAt reads the mapping; used to parse indexes (zip directories).
func (m *mappedFile) readerAt() io.ReaderAt { return bytesReaderAt(m.m) }

func (m *mappedFile) close() error {
	return m.life.end(m.release)
}

// release unmaps and closes; the caller holds the lifetime exclusively.
func (m *mappedFile) release() error {
	var err error
	if m.m != nil && !m.borrowed {
		err = m.m.Unmap()
	}
	m.m = nil
	if m.f != nil {
		if cerr := m.f.Close(); err == nil {
			err = cerr
		}
		m.f = nil
	}
	return err
}

// bytesReaderAt is an io.ReaderAt over a byte slice.
type bytesReaderAt []byte

func (b bytesReaderAt) ReadAt(p []byte, off int64) (int, error) {
	if off < 0 {
		return 0, fmt.Errorf("negative offset")
	}
	if off >= int64(len(b)) {
		return 0, io.EOF
	}
	n := copy(p, b[off:])
	if n < len(p) {
		return n, io.EOF
	}
	return n, nil
}
