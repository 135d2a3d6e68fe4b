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

// maxDeflateRatio is the most DEFLATE can inflate a compressed byte to: the
// longest match is 258 bytes (RFC 1951, section 3.2.5) and its length and
// distance codes take at least one bit each, so two bits make 258 bytes and
// a byte at most 1032. A member whose zip entry or NPY header claims more
// than that is lying, and is refused before anything is allocated for it.
const maxDeflateRatio = 1032

// maxBlankRatio and maxBlankInflate bound what a member of almost nothing
// can cost. Past about 1000:1 deflated data is nearly all one repeated byte:
// zlib (level 6, what numpy.savez_compressed writes) makes 1028.7:1 of
// constant data, while the densest honest arrays measured here with zlib
// 1.2.13 and numpy stay far below (float16 heads of one-hot rows 609:1, a
// causal bool mask of 8192 x 8192 556:1, float32 sliding-window attention
// over 8192 keys with a window of 16 322:1). Deflated members above
// maxBlankRatio are refused once they add up to more than maxBlankInflate
// bytes: a zip bomb, or an array whose writer never filled it. (A constant
// array that large that is meant, say an all-true mask, can be saved with
// numpy.savez, stored, which heed reads in place without inflating.)
const (
	maxBlankRatio   = 1000
	maxBlankInflate = 256 << 20
)

// inflateInMemory is the largest member inflated into memory, and
// inflateMemBudget the most an archive's members take in memory together;
// other members are inflated into temporary files.
const (
	inflateInMemory  = 32 << 20
	inflateMemBudget = 128 << 20
)

type npzFile struct {
	mf      *mappedFile
	arrays  []Array
	meta    string
	hasMeta bool
	temps   []*inflated
	// claimed, blank and inMemory add up the inflated sizes of the deflated
	// members: all of them, those above maxBlankRatio, those kept in memory.
	claimed, blank, inMemory int64
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
	if len(torchArchives(zr)) > 0 {
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
		a, err := npyArray(z.mf.bytes()[off:off+size], "the member has %d", path, name, &z.mf.life)
		if a != nil {
			a.src = z.mf
		}
		return a, err
	case zip.Deflate:
		csize, usize, size := f.CompressedSize64, f.UncompressedSize64, uint64(z.mf.size())
		if csize > size {
			return nil, ferr(fmt.Sprintf("compressed size %d is larger than the archive (%d bytes)", csize, size), nil)
		}
		if usize/maxDeflateRatio > csize {
			return nil, ferr(fmt.Sprintf("declared uncompressed size %d bytes is more than DEFLATE can make of its %d compressed bytes (1032 per byte at most)", usize, csize), nil)
		}
		rc, err := f.Open()
		if err != nil {
			return nil, ferr("cannot open the deflated member", err)
		}
		h, err := readNPYHeader(rc, int64(usize), "the member declares %d bytes uncompressed", path, name)
		rc.Close()
		if err != nil {
			var fe *FormatError
			if errors.As(err, &fe) {
				return nil, err
			}
			return nil, ferr("cannot inflate the member's header", err)
		}
		// The header's size is at most usize (checked above), so at most
		// maxDeflateRatio times the compressed size.
		total := h.dataOff + h.nbytes
		z.claimed += total
		if z.claimed/maxDeflateRatio > z.mf.size() {
			return nil, ferr(fmt.Sprintf("the deflated members claim %d bytes together, more than DEFLATE can make of the %d-byte archive (members that overlap: a zip bomb)", z.claimed, z.mf.size()), nil)
		}
		if total > maxBlankRatio*int64(csize) {
			z.blank += total
			if z.blank > maxBlankInflate {
				return nil, ferr(fmt.Sprintf("inflates %d:1, %d bytes to %d: nearly all one repeated byte (a zip bomb, or an array never written); heed refuses more than %d MiB of such members",
					total/max(int64(csize), 1), csize, total, maxBlankInflate>>20), nil)
			}
		}
		lz := &inflated{f: f, total: total, dataOff: h.dataOff, path: path, name: name, free: freeSpace}
		if total > inflateInMemory || z.inMemory+total > inflateMemBudget {
			lz.file = &mappedFile{path: path}
		} else {
			z.inMemory += total
		}
		z.temps = append(z.temps, lz)
		a := h.array(path, name, &z.mf.life, lz.data)
		a.src = lz.file // a head of a temporary file is read with pread, as a mapped file's
		return a, nil
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

// inflated is a deflated member's data, inflated on first use: into memory,
// or (file set) into an unlinked temporary file that is mapped and read like
// a mapped input file (heads by pread), so that neither inflating nor
// reading it grows the process's memory with the member's size.
type inflated struct {
	f              *zip.File
	total, dataOff int64
	path, name     string
	file           *mappedFile                    // the temporary file, nil when in memory
	free           func(dir string) (int64, bool) // the free space of a directory: freeSpace (tests shrink the disk)

	once sync.Once
	buf  []byte
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
	if l.file == nil {
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
	dir := os.TempDir()
	if free, ok := l.free(dir); ok && free < l.total {
		fail(fmt.Sprintf("inflating it takes %d bytes of temporary space, %s has %d free (set TMPDIR to a larger disk)", l.total, dir, free), nil)
		return
	}
	tmp, err := os.CreateTemp(dir, "heed-npz-*")
	if err != nil {
		fail("cannot create a temporary file to inflate into", err)
		return
	}
	os.Remove(tmp.Name()) // the open descriptor keeps it until Close
	n, err := io.CopyN(tmp, rc, l.total)
	if err != nil || n != l.total {
		tmp.Close()
		if err == nil || err == io.EOF {
			fail("truncated deflated member", err)
		} else {
			fail("cannot inflate into a temporary file", err)
		}
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
	l.file.f, l.file.m, l.buf = tmp, m, m
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
	if l.file != nil {
		l.file.release()
	}
	l.buf = nil
}
