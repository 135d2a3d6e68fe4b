package main

import (
	"bytes"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/heed-dev/heed/demo"
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
