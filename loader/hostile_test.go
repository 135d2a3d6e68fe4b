package loader

import (
	"crypto/sha256"
	"errors"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"

	"github.com/heed-dev/heed/internal/testpy"
)

// The hostile corpus: testdata/hostile (written by its gen.py with numpy,
// h5py and zip structures by hand from PKWARE's APPNOTE), the big files the
// same script writes on demand, and FIFOs, devices and truncations made
// here. Each must be refused by Open and OpenSet with a *FormatError of one
// line naming the file once and saying what is wrong, without changing it.

const hostileDir = "../testdata/hostile"

// hostileBig runs testdata/hostile/gen.py --big into a temporary directory
// and returns the path of the file it wrote (the test is skipped without
// Debian's python3 and numpy).
func hostileBig(t *testing.T, only string) string {
	t.Helper()
	py := testpy.Require(t, "numpy", "h5py")
	dir := t.TempDir()
	if out, err := exec.Command(py, filepath.Join(hostileDir, "gen.py"), "--big", dir, "--only", only).CombinedOutput(); err != nil {
		t.Fatalf("gen.py --big: %v\n%s", err, out)
	}
	return filepath.Join(dir, only+".npz")
}

type hostileCase struct {
	name string
	arg  string // what is passed to Open / OpenSet
	file string // the file the message must name (arg when empty)
	want string // what the message must say
}

func hostileCases(t *testing.T) []hostileCase {
	cases := []hostileCase{
		{name: "declared size", arg: "declared_size.npz", want: "decoder/attn: declared uncompressed size 4294967280 bytes is more than DEFLATE can make of its "},
		{name: "overlapping members", arg: "overlap.npz", want: "-byte archive (members that overlap: a zip bomb)"},
		{name: "long key", arg: "long_key.npy", want: `bad NPY header "{'descr': '<f4', 'fortran_order': False, 'shape': (2, 2), 'x"…: unexpected key "xAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAA"…`},
		{name: "long dtype", arg: "long_dtype.npy", want: `unknown dtype "<fffffffffffffffffffffffffffffffffffffff"…`},
		{name: "long dimension", arg: "long_dim.npy", want: `dimension "9999999999999999999999999999999999999999"… too large`},
		{name: "control characters", arg: "newline_key.npy", want: `unexpected key "a\nb\r\x1b[31mc"`},
		{name: "unwritten chunked HDF5", arg: "unwritten_chunked.h5", want: "decoder/attn: created but never written"},
		{name: "unwritten HDF5", arg: filepath.Join("..", "fixtures", "bad", "h5_unwritten.h5"), want: "decoder/attn: created but never written"},
	}
	listed := map[string]bool{}
	for i, c := range cases {
		listed[c.arg] = true
		cases[i].arg = filepath.Join(hostileDir, c.arg)
	}
	all, _ := os.ReadDir(hostileDir)
	for _, e := range all {
		if n := e.Name(); n != "gen.py" && !listed[n] {
			t.Errorf("hostile input %s has no case", n)
		}
	}
	// FIFOs: named, and found by a directory walk beside a good file
	dir := t.TempDir()
	fifo := filepath.Join(dir, "pipe.npz")
	exp := filepath.Join(dir, "export")
	if err := os.Mkdir(exp, 0o755); err != nil {
		t.Fatal(err)
	}
	inner := filepath.Join(exp, "decoder", "attn", "1.npy")
	os.MkdirAll(filepath.Dir(inner), 0o755)
	good, err := os.ReadFile(filepath.Join(fixtures, "npy", "f32_le.npy"))
	if err != nil {
		t.Fatal(err)
	}
	os.WriteFile(filepath.Join(exp, "decoder", "attn", "0.npy"), good, 0o644)
	for _, p := range []string{fifo, inner} {
		if err := syscall.Mkfifo(p, 0o644); err != nil {
			t.Skipf("mkfifo: %v", err)
		}
	}
	cases = append(cases,
		hostileCase{name: "FIFO", arg: fifo, want: "is a named pipe (FIFO), not a regular file"},
		hostileCase{name: "FIFO in a directory", arg: exp, file: inner, want: "is a named pipe (FIFO), not a regular file"},
		hostileCase{name: "symlink to a FIFO", arg: symlink(t, fifo), want: "is a named pipe (FIFO), not a regular file"})
	if st, err := os.Stat("/dev/null"); err == nil && st.Mode()&os.ModeCharDevice != 0 {
		cases = append(cases, hostileCase{name: "character device", arg: "/dev/null", want: "is a character device, not a regular file"})
	}
	return cases
}

func symlink(t *testing.T, target string) string {
	p := filepath.Join(t.TempDir(), "link.npz")
	if err := os.Symlink(target, p); err != nil {
		t.Fatal(err)
	}
	return p
}

// checkRefusal checks that err is one line naming file once and saying want.
func checkRefusal(t *testing.T, what string, err error, file, want string) {
	t.Helper()
	if err == nil {
		t.Errorf("%s: no error", what)
		return
	}
	var fe *FormatError
	if !errors.As(err, &fe) {
		t.Errorf("%s: %T %v, want a *FormatError", what, err, err)
	}
	msg := err.Error()
	if strings.Contains(msg, "\n") || !strings.HasPrefix(msg, file+": ") || strings.Count(msg, file) != 1 ||
		strings.HasPrefix(msg, "loader:") || !strings.Contains(msg, want) {
		t.Errorf("%s: error %q, want one line naming %s once and saying %q", what, msg, file, want)
	}
	if len(msg) > 300 {
		t.Errorf("%s: error of %d bytes: %q", what, len(msg), msg)
	}
}

func digest(path string) [32]byte {
	b, _ := os.ReadFile(path)
	return sha256.Sum256(b)
}

// TestHostile: every hostile input is refused by Open and OpenSet at once
// (a FIFO does not block, an unwritten HDF5 dataset is not scanned: each
// call returns before reading any data) with one line, and stays unchanged.
func TestHostile(t *testing.T) {
	for _, c := range hostileCases(t) {
		t.Run(c.name, func(t *testing.T) {
			file := c.file
			if file == "" {
				file = c.arg
			}
			if strings.HasSuffix(file, ".h5") && !HDF5Supported {
				_, err := Open([]string{c.arg}, NewOptions())
				if !errors.Is(err, ErrNoHDF5) {
					t.Errorf("%v, want ErrNoHDF5", err)
				}
				return
			}
			var before [32]byte
			st, _ := os.Stat(file)
			regular := st != nil && st.Mode().IsRegular()
			if regular {
				before = digest(file)
			}
			ex, err := Open([]string{c.arg}, NewOptions())
			if err == nil {
				ex.Close()
			}
			checkRefusal(t, "Open", err, file, c.want)
			_, err = OpenSet([]string{c.arg}, NewOptions())
			checkRefusal(t, "OpenSet", err, file, c.want)
			if regular && digest(file) != before {
				t.Errorf("%s changed", file)
			}
		})
	}
}

// TestHostileZipBomb: 1 GiB of deflated zeros in a 1 MB NPZ is refused at
// open, before anything is inflated.
func TestHostileZipBomb(t *testing.T) {
	if testing.Short() {
		t.Skip("writes a 1 MB zip bomb with gen.py")
	}
	bomb := hostileBig(t, "bomb")
	for _, open := range []func() error{
		func() error {
			ex, err := Open([]string{bomb}, NewOptions())
			if err == nil {
				ex.Close()
			}
			return err
		},
		func() error { _, err := OpenSet([]string{bomb}, NewOptions()); return err },
	} {
		checkRefusal(t, "bomb.npz", open(), bomb, "bytes to 1073741952: nearly all one repeated byte")
	}
}
