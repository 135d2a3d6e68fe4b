package main

import (
	"bytes"
	"errors"
	"fmt"
	"github.com/heed-dev/heed/internal/words"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"github.com/heed-dev/heed/demo"
	"github.com/heed-dev/heed/internal/termtest"
	"github.com/heed-dev/heed/loader"
)

// TestDemoExport writes the embedded exports with "heed demo --export" and
// runs heed check on them: the run trained with the causal mask is clean, the
// run trained with k <= q+1 is found shifted by +1 (in NPZ and in HDF5), and
// the generation export's decode steps (queries are the last of the cached
// keys) are clean. The exports come from PyTorch (testdata/demo/generate.py),
// whose masks are known: k <= q, k <= q+1, and causal with a KV cache.
func TestDemoExport(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "demo out")
	out, code := run(t, "demo", "--export", dir)
	if code != 0 {
		t.Fatalf("demo --export: exit %d\n%s", code, out)
	}
	for _, name := range append(append([]string(nil), demo.Exports...), demo.ResultsFile) {
		got, err := os.ReadFile(filepath.Join(dir, name))
		if err != nil {
			t.Fatal(err)
		}
		want, _ := demo.ReadFile(name)
		if !bytes.Equal(got, want) {
			t.Errorf("%s differs from the embedded file", name)
		}
	}
	// the printed commands name the written files, quoted for the shell
	if !strings.Contains(out, "heed check '"+filepath.Join(dir, "leaky.npz")+"'") {
		t.Errorf("output lacks the check command on leaky.npz:\n%s", out)
	}

	root := newRootCmd()
	root.SetOut(&bytes.Buffer{})
	root.SetArgs([]string{"demo", "--export", dir})
	err := root.Execute()
	var ee *demo.ExistsError
	if !errors.As(err, &ee) || len(ee.Paths) != len(demo.Exports)+1 || !strings.Contains(err.Error(), "--force") || exitCode(err, false) != 2 {
		t.Errorf("second export without --force: %v, want exit 2, every file named and a hint to use --force", err)
	}
	if out, code := run(t, "demo", "--export", dir, "--force"); code != 0 {
		t.Errorf("export with --force: exit %d\n%s", code, out)
	}
	if _, code := run(t, "demo", "--force"); code != 2 {
		t.Errorf("--force without --export: exit %d, want 2", code)
	}

	files := []string{"clean.npz", "leaky.npz", "clean.h5", "leaky.h5"}
	if _, err := loader.OpenFile(filepath.Join(dir, "clean.h5")); errors.Is(err, loader.ErrNoHDF5) {
		t.Log("this build has no HDF5 support: checking the NPZ exports only")
		files = files[:2]
	}
	for _, f := range files {
		out, code := run(t, "check", "--json", filepath.Join(dir, f))
		if strings.HasPrefix(f, "clean") {
			if code != 0 || !strings.Contains(out, `"clean": true`) {
				t.Errorf("check %s: exit %d, want 0 (clean)\n%s", f, code, out)
			}
			continue
		}
		if code != 1 {
			t.Errorf("check %s: exit %d, want 1\n%s", f, code, out)
			continue
		}
		assertPlusOne(t, out, "decoder", true)
	}
	if out, code := run(t, "check", filepath.Join(dir, "generation.npz")); code != 0 {
		t.Errorf("check generation.npz: exit %d, want 0\n%s", code, out)
	}
}

// TestDemoOpens runs plain "heed demo" (nothing but the binary): it starts
// with the one-line hint and shows the leaking run's finding.
func TestDemoOpens(t *testing.T) {
	res, err := demo.LoadResults()
	if err != nil {
		t.Fatal(err)
	}
	out, code := run(t, "demo")
	if code != 0 {
		t.Fatalf("demo: exit %d\n%s", code, out)
	}
	if first := strings.SplitN(out, "\n", 2)[0]; !strings.Contains(first, res.Demo.Hint) {
		t.Errorf("first line %q lacks the hint %q", first, res.Demo.Hint)
	}
	if !strings.Contains(out, "shifted by +1") {
		t.Errorf("demo output lacks the +1 finding:\n%s", out)
	}
}

// TestDemoTUI runs the real binary in a real terminal (tmux): heed demo opens
// the Map on the cell where the +1 leak is strongest, says so in the tab bar,
// and prints the hint when the user quits.
func TestDemoTUI(t *testing.T) {
	dir, bin := terminalTest(t)
	res, err := demo.LoadResults()
	if err != nil {
		t.Fatal(err)
	}
	if _, err := demo.Export(dir, false); err != nil {
		t.Fatal(err)
	}
	start, err := demoStart(filepath.Join(dir, res.Demo.Open), res.Demo.At)
	if err != nil {
		t.Fatal(err)
	}
	loc, err := words.ParseLoc(start)
	if err != nil {
		t.Fatal(err)
	}
	tm := termtest.New(t).Start("demo", termtest.Window{W: 100, H: 30, Env: []string{"TERM=xterm-256color"}}, bin, "demo")
	// the first frame with the statistics done (no fixed timing is asserted)
	screen := tm.See("finding")
	first := strings.SplitN(screen, "\n", 2)[0]
	if !strings.Contains(first, "[2 Map]") || !strings.Contains(first, "+1 leak: right of the diagonal") {
		t.Errorf("tab bar %q: want the Map active and the hint", first)
	}
	if !strings.Contains(screen, fmt.Sprintf(":q%d:k%d", loc.Query, loc.Key)) || !strings.Contains(screen, "forbidden by causal") {
		t.Errorf("the Map does not start on the leaking cell q%d k%d (forbidden by causal):\n%s", loc.Query, loc.Key, screen)
	}
	tm.Keys("q")
	if st := tm.Exited(); st != "0" {
		t.Fatalf("heed demo exited %s after q, want 0", st)
	}
	screen = strings.Join(strings.Fields(tm.History()), " ")
	if !strings.Contains(screen, strings.Join(strings.Fields(res.Demo.Hint), " ")) {
		t.Errorf("after quitting, the screen lacks the hint %q:\n%s", res.Demo.Hint, screen)
	}
}

// heed demo --export refuses a directory of source files (this repository's
// demo/ package, a module root, a Go package) with one line and exit 2, and
// writes nothing there, even with --force.
func TestDemoExportRefusesSourceDir(t *testing.T) {
	mod := t.TempDir()
	os.WriteFile(filepath.Join(mod, "go.mod"), []byte("module example.com/x\n"), 0o644)
	pkg := t.TempDir()
	os.WriteFile(filepath.Join(pkg, "main.go"), []byte("package main\n"), 0o644)
	for _, dir := range []string{"../../demo", mod, pkg} {
		before, _ := os.ReadDir(dir)
		for _, force := range []bool{false, true} {
			args := []string{"demo", "--export", dir}
			if force {
				args = append(args, "--force")
			}
			out, errOut, code := runSplit(t, args...)
			var se *demo.SourceError
			_, err := demo.Export(dir, force)
			if code != 2 || out != "" || strings.Count(strings.TrimSpace(errOut), "\n") != 0 || !strings.Contains(errOut, "source files") || !errors.As(err, &se) {
				t.Errorf("%v: exit %d, stdout %q, stderr %q; want exit 2 and one line", args, code, out, errOut)
			}
		}
		if after, _ := os.ReadDir(dir); len(after) != len(before) {
			t.Errorf("%s: %d entries before, %d after: something was written", dir, len(before), len(after))
		}
	}
}

// terminalTest skips without tmux or in -short mode, else builds heed into
// a temporary directory for a test in a real terminal: the directory and
// the binary.
func terminalTest(t *testing.T) (dir, bin string) {
	t.Helper()
	if _, err := exec.LookPath("tmux"); err != nil {
		t.Skip("skipping: tmux is not installed")
	}
	if testing.Short() {
		t.Skip("skipping the terminal test in -short mode")
	}
	dir = t.TempDir()
	bin = filepath.Join(dir, "heed")
	if out, err := exec.Command("go", "build", "-o", bin, ".").CombinedOutput(); err != nil {
		t.Fatalf("go build: %v\n%s", err, out)
	}
	return dir, bin
}
