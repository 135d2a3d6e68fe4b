package loader

import (
	"bufio"
	"bytes"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"sort"
	"strings"
)

// Extensions heed picks up when walking a directory. Files named explicitly
// are opened whatever their extension: the format is sniffed from the bytes.
var exportExts = map[string]string{
	".npy": "npy", ".npz": "npz", ".safetensors": "safetensors",
	".h5": "hdf5", ".hdf5": "hdf5", ".hdf": "hdf5", ".he5": "hdf5",
	".pt": "torch", ".pth": "torch",
}

const hdf5Magic = "\x89HDF\r\n\x1a\n"

// sniff names the container format from the first bytes of a file ("" when
// unknown). HDF5 files may start with a user block of 512, 1024, 2048...
// bytes, so its signature is also looked for at those offsets.
func sniff(f io.ReaderAt, size int64) string {
	var b [16]byte
	n, _ := f.ReadAt(b[:], 0)
	h := b[:n]
	switch {
	case bytes.HasPrefix(h, []byte(npyMagic)):
		return "npy"
	case bytes.HasPrefix(h, []byte("PK\x03\x04")), bytes.HasPrefix(h, []byte("PK\x05\x06")):
		return "npz"
	case bytes.HasPrefix(h, []byte(hdf5Magic)):
		return "hdf5"
	case n >= 9 && h[8] == '{':
		return "safetensors"
	}
	if hasHDF5Signature(f, size) {
		return "hdf5"
	}
	return ""
}

// hasHDF5Signature looks for the HDF5 format signature at 0, 512, 1024, ...
// (the HDF5 file format specification, "Format Signature").
func hasHDF5Signature(f io.ReaderAt, size int64) bool {
	var b [8]byte
	for off := int64(0); off+8 <= size; off = max(512, off*2) {
		if n, _ := f.ReadAt(b[:], off); n == 8 && string(b[:]) == hdf5Magic {
			return true
		}
		if off > 1<<30 {
			break
		}
	}
	return false
}

// OpenFile opens one container file read-only. The format is sniffed from
// the file's first bytes; the extension only decides which parser reports
// the error when the bytes match no format. A lone NPY file's array is named
// after the file's stem.
func OpenFile(path string) (Container, error) {
	return openFile(fileRef{path: path, npyName: stem(path)})
}

// fileRef is one file of an export and, for NPY files, the array name it gets.
type fileRef struct {
	path    string
	npyName string
}

func stem(path string) string {
	b := filepath.Base(path)
	if e := filepath.Ext(b); e != "" && e != b {
		b = strings.TrimSuffix(b, e)
	}
	return b
}

func openFile(ref fileRef) (Container, error) {
	f, st, err := openRegular(ref.path)
	if err != nil {
		return nil, err
	}
	format := sniff(f, st.Size())
	f.Close()
	if format == "" {
		format = exportExts[strings.ToLower(filepath.Ext(ref.path))]
	}
	switch format {
	case "npy":
		return openNPY(ref)
	case "npz": // a zip archive: NPZ or torch.save
		return openZip(ref)
	case "torch": // by its extension only: the bytes are not a zip archive
		return nil, &FormatError{File: ref.path, Offset: 0, Msg: "not a torch.save zip archive: a file in the legacy format (torch < 1.6, or _use_new_zipfile_serialization=False); re-save it with torch.save's default format"}
	case "safetensors":
		return openSafetensors(ref.path)
	case "hdf5":
		if err := checkHDF5Signature(ref.path); err != nil {
			return nil, err
		}
		return openHDF5(ref.path)
	}
	if st.Size() == 0 {
		return nil, &FormatError{File: ref.path, Offset: -1, Msg: "empty file"}
	}
	return nil, &FormatError{File: ref.path, Offset: 0, Msg: "not an export heed reads (NPY, NPZ, safetensors, HDF5 or torch.save): unrecognised first bytes"}
}

// openRegular opens an input file read-only and refuses what is not a
// regular file: a directory, a named pipe (FIFO), a device or a socket. heed
// maps the files it reads and reads them more than once, which a stream
// cannot give, and opening a FIFO for reading would wait for a writer for
// ever. It looks before opening (stat follows symbolic links), opens with
// O_NONBLOCK (openNonblock) so that a file swapped for a FIFO after that
// look does not block the open either, and decides on the opened file.
func openRegular(path string) (*os.File, os.FileInfo, error) {
	st, err := os.Stat(path)
	if err != nil {
		return nil, nil, fmt.Errorf("%s: %w", path, unwrapPath(err))
	}
	if err := notRegular(path, st); err != nil {
		return nil, nil, err
	}
	f, err := os.OpenFile(path, os.O_RDONLY|openNonblock, 0)
	if err != nil {
		return nil, nil, fmt.Errorf("%s: %w", path, unwrapPath(err))
	}
	st, err = f.Stat()
	if err == nil {
		err = notRegular(path, st)
	}
	if err != nil {
		f.Close()
		return nil, nil, err
	}
	return f, st, nil
}

// notRegular is the one-line refusal of a file that is not a regular file
// (nil for a regular file).
func notRegular(path string, st os.FileInfo) error {
	m := st.Mode()
	var what string
	switch {
	case m.IsRegular():
		return nil
	case m.IsDir():
		return &FormatError{File: path, Offset: -1, Msg: "is a directory"}
	case m&fs.ModeNamedPipe != 0:
		what = "a named pipe (FIFO)"
	case m&fs.ModeSocket != 0:
		what = "a socket"
	case m&fs.ModeCharDevice != 0:
		what = "a character device"
	case m&fs.ModeDevice != 0:
		what = "a block device"
	default:
		what = "a special file"
	}
	return &FormatError{File: path, Offset: -1, Msg: "is " + what + ", not a regular file: save the export to a file first"}
}

func unwrapPath(err error) error {
	var pe *fs.PathError
	if errors.As(err, &pe) {
		return pe.Err
	}
	return err
}

func checkHDF5Signature(path string) error {
	f, st, err := openRegular(path)
	if err != nil {
		return err
	}
	defer f.Close()
	if !hasHDF5Signature(f, st.Size()) {
		return &FormatError{File: path, Offset: 0, Msg: "not an HDF5 file (no \\x89HDF signature), although named like one"}
	}
	return nil
}

// npyFile is a Container holding one NPY array.
type npyFile struct {
	mf  *mappedFile
	arr *rawArray
}

func openNPY(ref fileRef) (Container, error) {
	mf, err := mapFile(ref.path)
	if err != nil {
		return nil, err
	}
	a, err := npyArray(mf.bytes(), hasFile, ref.path, ref.npyName, &mf.life)
	if err != nil {
		mf.close()
		return nil, err
	}
	a.src = mf
	return &npyFile{mf: mf, arr: a}, nil
}

func (n *npyFile) Path() string         { return n.mf.path }
func (n *npyFile) Format() string       { return "npy" }
func (n *npyFile) Arrays() []Array      { return []Array{n.arr} }
func (n *npyFile) Meta() (string, bool) { return "", false }
func (n *npyFile) Close() error         { return n.mf.close() }

// expand turns path arguments into files: a file stands for itself, a
// directory for every export file under it (recursively, in lexical order,
// hidden entries skipped), "@LIST" for the paths listed one a line in LIST
// (blank lines and lines starting with # skipped; relative paths are taken
// from the current directory). An NPY file found under a directory is named
// by its path relative to that directory without ".npy", so
// export/decoder/attn/3.npy is the array decoder/attn/3.
func expand(paths []string) ([]fileRef, error) {
	var out []fileRef
	for _, p := range paths {
		if strings.HasPrefix(p, "@") && len(p) > 1 {
			list := p[1:]
			f, err := os.Open(list)
			if err != nil {
				return nil, fmt.Errorf("%s: %w", list, unwrapPath(err))
			}
			var names []string
			sc := bufio.NewScanner(f)
			sc.Buffer(make([]byte, 64*1024), 1<<20)
			for sc.Scan() {
				l := strings.TrimSpace(sc.Text())
				if l == "" || strings.HasPrefix(l, "#") {
					continue
				}
				if strings.HasPrefix(l, "@") {
					f.Close()
					return nil, &FormatError{File: list, Offset: -1, Msg: "list files cannot name other list files"}
				}
				names = append(names, l)
			}
			err = sc.Err()
			f.Close()
			if err != nil {
				return nil, &FormatError{File: list, Offset: -1, Msg: "cannot read the list", Err: err}
			}
			if len(names) == 0 {
				return nil, &FormatError{File: list, Offset: -1, Msg: "the list names no files"}
			}
			refs, err := expand(names)
			if err != nil {
				return nil, err
			}
			out = append(out, refs...)
			continue
		}
		st, err := os.Stat(p)
		if err != nil {
			return nil, fmt.Errorf("%s: %w", p, unwrapPath(err))
		}
		if !st.IsDir() {
			out = append(out, fileRef{path: p, npyName: stem(p)})
			continue
		}
		n0 := len(out)
		err = filepath.WalkDir(p, func(path string, d fs.DirEntry, err error) error {
			if err != nil {
				return err
			}
			if path != p && strings.HasPrefix(d.Name(), ".") {
				if d.IsDir() {
					return filepath.SkipDir
				}
				return nil
			}
			if d.IsDir() {
				return nil
			}
			ext := strings.ToLower(filepath.Ext(path))
			if _, ok := exportExts[ext]; !ok {
				return nil
			}
			rel, err := filepath.Rel(p, path)
			if err != nil {
				return err
			}
			rel = filepath.ToSlash(rel)
			out = append(out, fileRef{path: path, npyName: rel[:len(rel)-len(ext)]})
			return nil
		})
		if err != nil {
			return nil, fmt.Errorf("%s: %w", p, unwrapPath(err))
		}
		if len(out) == n0 {
			return nil, &FormatError{File: p, Offset: -1, Msg: "directory holds no export files (.npy, .npz, .safetensors, .h5)"}
		}
	}
	if len(out) == 0 {
		return nil, errors.New("loader: no files given")
	}
	return out, nil
}

// Open opens every file named by paths (files, directories, @LIST files;
// see OpenSet) as one export. Array names must not repeat across files.
func Open(paths []string, opt Options) (*Export, error) {
	refs, err := expand(paths)
	if err != nil {
		return nil, err
	}
	return openGroup(refs, nil, opt)
}

// openGroup opens the files of refs, but for those already open in have
// (nil, or one container or nil per ref), and assembles them as one
// export; on failure it closes them all, have's included.
func openGroup(refs []fileRef, have []Container, opt Options) (*Export, error) {
	cs := make([]Container, len(refs))
	copy(cs, have)
	for i, r := range refs {
		if cs[i] != nil {
			continue
		}
		c, err := opt.openRef(r)
		if err != nil {
			closeAll(cs)
			return nil, err
		}
		cs[i] = c
	}
	ex, err := assembleContainers(cs, opt)
	if err != nil {
		closeAll(cs)
		return nil, err
	}
	return ex, nil
}

// closeAll closes the containers that are open (not nil).
func closeAll(cs []Container) {
	for _, c := range cs {
		if c != nil {
			c.Close()
		}
	}
}

// assembleContainers assembles the arrays and metadata of open containers;
// on success the export owns them.
func assembleContainers(cs []Container, opt Options) (*Export, error) {
	var arrays []Array
	var metas []metaSource
	var paths []string
	for _, c := range cs {
		arrays = append(arrays, c.Arrays()...)
		if m, ok := c.Meta(); ok {
			metas = append(metas, metaSource{file: c.Path(), text: m})
		}
		paths = append(paths, c.Path())
	}
	if opt.ThroughMapping {
		for _, a := range arrays {
			if r, ok := a.(*rawArray); ok {
				r.src = nil // no file to read from: copies and views come from the mapping
			}
		}
	}
	ex, err := assemble(arrays, metas, opt)
	if err != nil {
		return nil, err
	}
	ex.Paths = paths
	ex.containers = cs
	return ex, nil
}

// sortedArrays sorts arrays by name, as Container.Arrays promises.
func sortedArrays(a []Array) []Array {
	sort.Slice(a, func(i, j int) bool { return a[i].Name() < a[j].Name() })
	return a
}
