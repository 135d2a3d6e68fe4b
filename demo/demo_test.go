package demo

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"testing"

	"github.com/heed-dev/heed/internal/testdoc"
)

// TestChecksums checks every embedded file against the sha256 that the
// generator (testdata/demo/generate.py, Python's hashlib) recorded when it
// wrote them, and that nothing is embedded that the generator did not write.
func TestChecksums(t *testing.T) {
	sums, err := Checksums()
	if err != nil {
		t.Fatal(err)
	}
	want := append(append([]string(nil), Exports...), ResultsFile)
	sort.Strings(want)
	var got []string
	for n := range sums {
		got = append(got, n)
	}
	sort.Strings(got)
	if len(got) != len(want) {
		t.Fatalf("checksums.json lists %v, want %v", got, want)
	}
	for i := range want {
		if got[i] != want[i] {
			t.Fatalf("checksums.json lists %v, want %v", got, want)
		}
	}
	for name, sum := range sums {
		b, err := ReadFile(name)
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		h := sha256.Sum256(b)
		if hex.EncodeToString(h[:]) != sum {
			t.Errorf("%s: sha256 %x, checksums.json says %s: regenerate with testdata/demo/generate.py", name, h, sum)
		}
	}
	entries, err := fs.ReadDir(FS(), ".")
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range entries {
		if _, ok := sums[e.Name()]; !ok && e.Name() != ChecksumsFile {
			t.Errorf("embedded %s is not in checksums.json", e.Name())
		}
	}
}

// TestResultsTellTheStory checks the measured figures the README quotes: the
// leaking run's training loss far below the clean run's (which cannot go
// below the format coin flip's floor), and its greedy decoding failing.
func TestResultsTellTheStory(t *testing.T) {
	r, err := LoadResults()
	if err != nil {
		t.Fatal(err)
	}
	clean, leaky := r.Runs["clean"], r.Runs["leaky"]
	if clean.DecoderMask != "k <= q" || leaky.DecoderMask != "k <= q+1" {
		t.Fatalf("runs: %+v", r.Runs)
	}
	if !(leaky.TrainLoss < clean.TrainLoss/5) {
		t.Errorf("leaky training loss %g is not far below the clean run's %g", leaky.TrainLoss, clean.TrainLoss)
	}
	if !(clean.TrainLoss >= r.LossFloor) {
		t.Errorf("clean training loss %g below the floor %g a model that cannot see ahead can reach", clean.TrainLoss, r.LossFloor)
	}
	if !(clean.ExactMatch >= 0.9 && leaky.ExactMatch <= 0.1) {
		t.Errorf("held-out exact match: clean %g, leaky %g; want the clean run right and the leaky run wrong", clean.ExactMatch, leaky.ExactMatch)
	}
	for l, row := range clean.PlusOneMass {
		for h, m := range row {
			if m != 0 {
				t.Errorf("clean run: decoder L%d H%d has mass %g at k = q+1", l, h, m)
			}
		}
	}
	if r.Demo.Open != "leaky.npz" || r.Demo.At != leaky.Strongest.At || r.Demo.Hint == "" {
		t.Errorf("demo start %+v, want leaky.npz at %s", r.Demo, leaky.Strongest.At)
	}
}

func TestExport(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "new", "dir")
	paths, err := Export(dir, false)
	if err != nil {
		t.Fatal(err)
	}
	if len(paths) != len(Exports)+1 {
		t.Fatalf("wrote %v", paths)
	}
	for _, p := range paths {
		got, err := os.ReadFile(p)
		if err != nil {
			t.Fatal(err)
		}
		want, _ := ReadFile(filepath.Base(p))
		if !bytes.Equal(got, want) {
			t.Errorf("%s differs from the embedded file", p)
		}
	}

	// an existing file stops the export before anything is written
	dir2 := t.TempDir()
	mine := filepath.Join(dir2, "leaky.npz")
	if err := os.WriteFile(mine, []byte("mine"), 0o644); err != nil {
		t.Fatal(err)
	}
	_, err = Export(dir2, false)
	var ee *ExistsError
	if !errors.As(err, &ee) || len(ee.Paths) != 1 || ee.Paths[0] != mine {
		t.Fatalf("export over an existing file: %v, want an ExistsError naming %s", err, mine)
	}
	if b, _ := os.ReadFile(mine); string(b) != "mine" {
		t.Error("the existing file was changed without force")
	}
	if _, err := os.Stat(filepath.Join(dir2, "clean.npz")); !errors.Is(err, fs.ErrNotExist) {
		t.Errorf("clean.npz written although the export was refused: %v", err)
	}

	// force replaces it, and leaves no temporary files behind
	if _, err := Export(dir2, true); err != nil {
		t.Fatal(err)
	}
	want, _ := ReadFile("leaky.npz")
	if b, _ := os.ReadFile(mine); !bytes.Equal(b, want) {
		t.Error("force did not replace leaky.npz")
	}
	entries, _ := os.ReadDir(dir2)
	if len(entries) != len(Exports)+1 {
		var names []string
		for _, e := range entries {
			names = append(names, e.Name())
		}
		t.Errorf("after a forced export the directory holds %v", names)
	}
}

// figuresTable is the table of measured figures the README's demo section
// quotes (between <!-- demo-figures --> markers), rendered from results.json.
func figuresTable(r *Results) string {
	var b strings.Builder
	b.WriteString("| run | decoder mask | training loss (mean of the last 100 steps) | held-out greedy exact match |\n")
	b.WriteString("|---|---|---|---|\n")
	for _, name := range []string{"clean", "leaky"} {
		run := r.Runs[name]
		fmt.Fprintf(&b, "| %s | `%s` | %.4f | %.1f%% of %d dates |\n", name, run.DecoderMask, run.TrainLoss, 100*run.ExactMatch, r.Heldout)
	}
	fmt.Fprintf(&b, "\nA model that cannot see ahead cannot get below %.4f on this data (derived: ln 2 per target whose\n", r.LossFloor)
	b.WriteString("ISO 8601 format, basic or extended, is drawn at random, over all target characters).\n")
	g := r.Generation
	fmt.Fprintf(&b, "The decoder-only model of generation.npz reaches %.1f%% exact match with KV-cache greedy decoding.\n", 100*g.ExactMatch)
	return b.String()
}

// TestQuotedFigures checks that the figures the README quotes are those in results.json.
func TestQuotedFigures(t *testing.T) {
	r, err := LoadResults()
	if err != nil {
		t.Fatal(err)
	}
	const readme = "../README.md"
	if got := strings.TrimPrefix(testdoc.Section(t, readme, "demo-figures"), "\n"); got != figuresTable(r) {
		t.Fatalf("%s quotes figures that are not results.json's; replace the text between the markers with:\n%s", readme, figuresTable(r))
	}
}
