package main

import (
	"bytes"
	"context"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/heed-dev/heed/internal/testpy"
)

// TestMain lets the test binary stand in for heed: with HEED_TEST_AS_HEED=1
// it runs main with its arguments, so tests can run the real command path
// (main, exitCode, os.Exit) in a subprocess they can time out and measure.
func TestMain(m *testing.M) {
	if os.Getenv("HEED_TEST_AS_HEED") == "1" {
		main()
		return
	}
	os.Exit(m.Run())
}

const hostileDir = "../../testdata/hostile"

// heedRun is one run of heed in a subprocess.
type heedRun struct {
	stdout, stderr string
	code           int
	maxRSS         int64 // peak resident set size in bytes (getrusage ru_maxrss: the kernel's VmHWM)
	timedOut       bool
}

// runHeedProcess runs heed with args in a subprocess (this test binary, see
// TestMain) and kills it when the context's time is up: a hang shows as
// timedOut, not as a test that never ends.
func runHeedProcess(t *testing.T, args ...string) heedRun {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	cmd := exec.CommandContext(ctx, os.Args[0], args...)
	cmd.Env = append(os.Environ(), "HEED_TEST_AS_HEED=1")
	var out, errb bytes.Buffer
	cmd.Stdout, cmd.Stderr = &out, &errb
	err := cmd.Run()
	r := heedRun{stdout: out.String(), stderr: errb.String(), timedOut: ctx.Err() != nil}
	if cmd.ProcessState == nil {
		t.Fatalf("heed %v: %v", args, err)
	}
	r.code = cmd.ProcessState.ExitCode()
	if ru, ok := cmd.ProcessState.SysUsage().(*syscall.Rusage); ok {
		r.maxRSS = int64(ru.Maxrss) * 1024 // kilobytes on Linux (getrusage(2))
	}
	return r
}

// TestHostileCommands: heed check and heed info on every hostile input
// (testdata/hostile, an unwritten HDF5 dataset, FIFOs named and found in a
// directory, a device, a 1 GiB zip bomb) exit 2 with one line on stderr that
// names the file once, and nothing on stdout, before the context's time is
// up (a FIFO or an unwritten dataset used to hang them). The zip bomb must
// not grow the process by more than 64 MiB over a run on a small export
// (it was inflated: 2 GiB of zeros took check to 2.1 GB), and an honest
// deflated export of 256 MiB not by more than 160 MiB (it was read through a
// mapping of the inflated temporary file, all of it resident).
func TestHostileCommands(t *testing.T) {
	if testing.Short() {
		t.Skip("runs heed in subprocesses on generated zip bombs")
	}
	py := testpy.Require(t, "numpy", "h5py")
	big := t.TempDir()
	if out, err := exec.Command(py, filepath.Join(hostileDir, "gen.py"), "--big", big).CombinedOutput(); err != nil {
		t.Fatalf("gen.py --big: %v\n%s", err, out)
	}
	bomb := filepath.Join(big, "bomb.npz")

	type input struct{ arg, file string }
	var inputs []input
	files, _ := filepath.Glob(filepath.Join(hostileDir, "*.[nh]*"))
	files = append(files, filepath.Join(fixturesDir, "bad", "h5_unwritten.h5"), bomb)
	for _, f := range files {
		inputs = append(inputs, input{f, f})
	}
	dir := t.TempDir()
	fifo := filepath.Join(dir, "pipe.npz")
	exp := filepath.Join(dir, "export")
	inner := filepath.Join(exp, "decoder", "attn", "1.npy")
	if err := os.MkdirAll(filepath.Dir(inner), 0o755); err != nil {
		t.Fatal(err)
	}
	good, err := os.ReadFile(filepath.Join(fixturesDir, "npy", "f32_le.npy"))
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(exp, "decoder", "attn", "0.npy"), good, 0o644); err != nil {
		t.Fatal(err)
	}
	for _, p := range []string{fifo, inner} {
		if err := syscall.Mkfifo(p, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	inputs = append(inputs, input{fifo, fifo}, input{exp, inner})
	if st, err := os.Stat("/dev/zero"); err == nil && st.Mode()&os.ModeCharDevice != 0 {
		inputs = append(inputs, input{"/dev/zero", "/dev/zero"})
	}
	if len(inputs) < 12 {
		t.Fatalf("only %d hostile inputs", len(inputs))
	}

	// the baseline: the same subprocess on a small export
	small := filepath.Join(casesDir, "shift_good.npz")
	base := runHeedProcess(t, "check", small)
	if base.code != 0 || base.maxRSS == 0 {
		t.Fatalf("check %s: exit %d, max RSS %d\n%s", small, base.code, base.maxRSS, base.stderr)
	}
	for _, in := range inputs {
		for _, c := range []string{"check", "info"} {
			r := runHeedProcess(t, c, in.arg)
			what := "heed " + c + " " + in.arg
			if r.timedOut {
				t.Errorf("%s: still running when the context's time was up", what)
				continue
			}
			if r.code != 2 || r.stdout != "" {
				t.Errorf("%s: exit %d, stdout %q; want exit 2 and nothing on stdout", what, r.code, r.stdout)
			}
			line := strings.TrimSuffix(r.stderr, "\n")
			if !strings.HasPrefix(line, "heed: "+in.file+": ") || strings.Contains(line, "\n") || strings.Count(line, in.file) != 1 ||
				strings.Contains(line, "loader:") {
				t.Errorf("%s: stderr %q, want one line naming %s once", what, r.stderr, in.file)
			}
			if in.arg == bomb {
				if grew := r.maxRSS - base.maxRSS; grew > 64<<20 {
					t.Errorf("%s: peak RSS %d MiB, %d MiB over a small export's", what, r.maxRSS>>20, grew>>20)
				}
			}
		}
	}

	// an honest deflated export too large to keep in memory is inflated into
	// a temporary file and read from it without holding it
	onehot := filepath.Join(big, "onehot.npz")
	r := runHeedProcess(t, "check", onehot)
	if r.timedOut || r.code == 2 {
		t.Fatalf("check %s: exit %d (timed out %v)\n%s", onehot, r.code, r.timedOut, r.stderr)
	}
	if grew := r.maxRSS - base.maxRSS; grew > 160<<20 {
		t.Errorf("check %s (256 MiB inflated): peak RSS %d MiB, %d MiB over a small export's", onehot, r.maxRSS>>20, grew>>20)
	}
	t.Logf("peak RSS: small export %d MiB, 256 MiB deflated export %d MiB", base.maxRSS>>20, r.maxRSS>>20)
}
