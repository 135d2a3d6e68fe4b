package loader

import (
	"archive/zip"
	"bytes"
	"errors"
	"fmt"
	"io"
	"os"
	"strings"
	"sync"

	"github.com/edsrzf/mmap-go"
)

// NPZ is a zip archive of NPY members (numpy.savez: ZIP_STORED;
// numpy.savez_compressed: ZIP_DEFLATED; numpy writes zip64 extras, see
// numpy/lib/npyio.py _savez). Stored members are used in place in the
// mapped archive. A deflated member is inflated once, on its first read,
// and cached: in memory when small, otherwise in an unlinked temporary file
// that is mapped, so a large compressed export does not grow the process's
// anonymous memory.

// maxDeflateRatio bounds how much data a deflated member can claim per
// compressed byte: DEFLATE's best case is about 1032:1 (RFC 1951 limits; a
// fact of the trade), so a header claiming more is lying, and is refused
// before anything is allocated for it.
const maxDeflateRatio = 1032

// inflateInMemory is the largest member inflated into memory; larger ones go
// to a temporary file.
const inflateInMemory = 32 << 20

type npzFile struct {
	mf      *mappedFile
	arrays  []Array
	meta    string
	hasMeta bool
	temps   []*inflated
}

// openZip opens a zip archive: a torch.save file when it holds
// ARCHIVE/data.pkl (torch.go), else an NPZ. Its directory is read once.
func openZip(ref fileRef) (Container, error) {
	mf, err := mapFile(ref.path)
	if err != nil {
		return nil, err
	}
	zr, err := readZip(ref.path, mf)
	if err != nil {
		mf.close()
		return nil, err
	}
	if torchArchive(zr) != nil {
		return newTorchZip(ref, mf, zr)
	}
	return newNPZZip(ref.path, mf, zr)
}

func readZip(path string, mf *mappedFile) (*zip.Reader, error) {
	zr, err := zip.NewReader(mf.readerAt(), mf.size())
	if err != nil {
		return nil, &FormatError{File: path, Offset: -1, Msg: "not a readable NPZ or torch.save (zip) archive", Err: err}
	}
	return zr, nil
}

// newNPZ reads an NPZ from a mapped file (tests and fuzzing; openZip is
// what opens files).
func newNPZ(path string, mf *mappedFile) (*npzFile, error) {
	zr, err := readZip(path, mf)
	if err != nil {
		mf.close()
		return nil, err
	}
	return newNPZZip(path, mf, zr)
}

func newNPZZip(path string, mf *mappedFile, zr *zip.Reader) (*npzFile, error) {
	z := &npzFile{mf: mf}
	if err := z.read(path, zr); err != nil {
		z.Close()
		return nil, err
	}
	return z, nil
}

func (z *npzFile) read(path string, zr *zip.Reader) error {
	seen := map[string]bool{}
	for _, f := range zr.File {
		if !strings.HasSuffix(f.Name, ".npy") || strings.HasSuffix(f.Name, "/") {
			continue // numpy.load ignores other members too
		}
		name := strings.TrimSuffix(f.Name, ".npy")
		if seen[name] {
			return &FormatError{File: path, Array: name, Offset: -1, Msg: "member appears twice in the archive"}
		}
		seen[name] = true
		a, err := z.member(path, name, f)
		if err != nil {
			return err
		}
		if name == "meta" {
			if a.dtype != String || prod(a.shape) != 1 {
				return &FormatError{File: path, Array: name, Offset: -1, Msg: "meta must be a 0-d string array holding the JSON"}
			}
			s, err := a.ReadStrings()
			if err != nil {
				return &FormatError{File: path, Array: name, Offset: -1, Msg: "cannot read the metadata", Err: err}
			}
			z.meta, z.hasMeta = s[0], true
			continue
		}
		z.arrays = append(z.arrays, a)
	}
	sortedArrays(z.arrays)
	return nil
}

func (z *npzFile) member(path, name string, f *zip.File) (*rawArray, error) {
	ferr := func(msg string, err error) error {
		return &FormatError{File: path, Array: name, Offset: -1, Msg: msg, Err: err}
	}
	switch f.Method {
	case zip.Store:
		off, err := f.DataOffset()
		if err != nil {
			return nil, ferr("bad zip member header", err)
		}
		size := int64(f.CompressedSize64)
		if f.UncompressedSize64 != f.CompressedSize64 || off < 0 || size < 0 || off > z.mf.size() || size > z.mf.size()-off {
			return nil, ferr(fmt.Sprintf("stored member of %d bytes at %d runs past the end of the archive (%d bytes)", size, off, z.mf.size()), nil)
		}
		a, err := npyArray(z.mf.bytes()[off:off+size], path, name, &z.mf.life)
		if a != nil {
			a.src = z.mf
		}
		return a, err
	case zip.Deflate:
		rc, err := f.Open()
		if err != nil {
			return nil, ferr("cannot open the deflated member", err)
		}
		usize := int64(f.UncompressedSize64)
		if usize < 0 {
			usize = 0
		}
		h, err := readNPYHeader(rc, usize, path, name)
		rc.Close()
		if err != nil {
			var fe *FormatError
			if errors.As(err, &fe) {
				return nil, err
			}
			return nil, ferr("cannot inflate the member's header", err)
		}
		total := h.dataOff + h.nbytes
		if f.CompressedSize64 > uint64(z.mf.size()) {
			return nil, ferr(fmt.Sprintf("compressed size %d is larger than the archive (%d bytes)", f.CompressedSize64, z.mf.size()), nil)
		}
		if total > maxDeflateRatio*(int64(f.CompressedSize64)+1) {
			return nil, ferr(fmt.Sprintf("header claims %d bytes, more than %d compressed bytes can hold", total, f.CompressedSize64), nil)
		}
		lz := &inflated{f: f, total: total, dataOff: h.dataOff, path: path, name: name}
		z.temps = append(z.temps, lz)
		return h.array(path, name, &z.mf.life, lz.data), nil
	}
	return nil, ferr(fmt.Sprintf("zip compression method %d is not supported (numpy writes stored or deflated members)", f.Method), nil)
}

func (z *npzFile) Path() string         { return z.mf.path }
func (z *npzFile) Format() string       { return "npz" }
func (z *npzFile) Arrays() []Array      { return append([]Array(nil), z.arrays...) }
func (z *npzFile) Meta() (string, bool) { return z.meta, z.hasMeta }

func (z *npzFile) Close() error {
	return z.mf.life.end(func() error {
		for _, t := range z.temps {
			t.release()
		}
		return z.mf.release()
	})
}

// inflated is a deflated member's data, inflated on first use.
type inflated struct {
	f              *zip.File
	total, dataOff int64
	path, name     string

	once sync.Once
	buf  []byte
	tmp  *os.File
	m    mmap.MMap
	err  error
}

func (l *inflated) data() ([]byte, error) {
	l.once.Do(l.inflate)
	if l.err != nil {
		return nil, l.err
	}
	return l.buf[l.dataOff:l.total], nil
}

func (l *inflated) inflate() {
	fail := func(msg string, err error) {
		l.err = &FormatError{File: l.path, Array: l.name, Offset: -1, Msg: msg, Err: err}
	}
	rc, err := l.f.Open()
	if err != nil {
		fail("cannot open the deflated member", err)
		return
	}
	defer rc.Close()
	if l.total <= inflateInMemory {
		// Grow with the data actually inflated, not with what the header claims.
		var bb bytes.Buffer
		if n, err := io.CopyN(&bb, rc, l.total); err != nil || n != l.total {
			fail("truncated deflated member", err)
			return
		}
		buf := bb.Bytes()
		if err := drain(rc); err != nil {
			fail("corrupt deflated member", err)
			return
		}
		l.buf = buf
		return
	}
	tmp, err := os.CreateTemp("", "heed-npz-*")
	if err != nil {
		fail("cannot create a temporary file to inflate into", err)
		return
	}
	os.Remove(tmp.Name()) // the open descriptor keeps it until Close
	n, err := io.CopyN(tmp, rc, l.total)
	if err != nil || n != l.total {
		tmp.Close()
		fail("truncated deflated member", err)
		return
	}
	if err := drain(rc); err != nil {
		tmp.Close()
		fail("corrupt deflated member", err)
		return
	}
	m, err := mmap.Map(tmp, mmap.RDONLY, 0)
	if err != nil {
		tmp.Close()
		fail("cannot map the inflated member", err)
		return
	}
	adviseSequential(m)
	l.tmp, l.m, l.buf = tmp, m, m
}

// drain reads what is left of a member (normally nothing), so that
// archive/zip checks the CRC-32 at its end. It stops after 1 MiB of excess.
func drain(r io.Reader) error {
	_, err := io.CopyN(io.Discard, r, 1<<20)
	if err == io.EOF {
		return nil
	}
	if err == nil {
		return nil // more data than the header describes: numpy ignores it too
	}
	return err
}

func (l *inflated) release() {
	if l.m != nil {
		l.m.Unmap()
		l.m = nil
	}
	if l.tmp != nil {
		l.tmp.Close()
		l.tmp = nil
	}
	l.buf = nil
}
