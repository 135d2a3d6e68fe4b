package loader

import (
	"encoding/binary"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// numberedSet writes n files dir/ex0000.npy ... each [2 layers, 4 heads,
// 16, 16] float32 (an example of a whole export without metadata), in the
// NPY v1.0 layout of numpy's format docstring.
func numberedSet(t testing.TB, n int) string {
	dir := t.TempDir()
	shape := []int{2, 4, 16, 16}
	data := make([]byte, 4*prod(shape))
	for i := 0; i < len(data); i += 4 {
		binary.LittleEndian.PutUint32(data[i:], math.Float32bits(1.0/16))
	}
	for i := 0; i < n; i++ {
		writeNPY(t, filepath.Join(dir, fmt.Sprintf("ex%04d.npy", i)), "<f4", shape, data)
	}
	return dir
}

// A directory of per-example files named with numbers is a set of as many
// examples as files, and says that the grouping was guessed and the setting
// that says otherwise (named by Options.SettingName when the caller words
// settings); grouping by layers reads them as before (the layers of one
// block), one as one export.
func TestNumberedFilesAreExamples(t *testing.T) {
	dir := numberedSet(t, 20)
	set, err := OpenSet([]string{dir}, NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	if set.Len() != 20 || len(set.Examples[19]) != 1 || filepath.Base(set.Examples[19][0]) != "ex0019.npy" {
		t.Fatalf("%d examples, last %v; want 20, one file each", set.Len(), set.Examples[set.Len()-1])
	}
	if l := set.Layout(); len(l) != 1 || l[0].Name != "ex" || l[0].Layers != 2 || l[0].Heads != 4 {
		t.Errorf("layout %+v, want block ex of 2 layers x 4 heads", l)
	}
	g := set.Grouping
	if !g.Guessed || g.Rule != "numbered files are examples" || !strings.HasSuffix(g.Warning, "pass Options.Group layers") ||
		len(set.Warnings) == 0 || set.Warnings[0] != g.Warning {
		t.Errorf("grouping %+v, warnings %q: want a guess, said in the first warning", g, set.Warnings)
	}
	worded := NewOptions()
	worded.SettingName = func(s string) string { return "<" + s + ">" }
	if ws, err := OpenSet([]string{dir}, worded); err != nil || !strings.HasSuffix(ws.Grouping.Warning, "pass <group> layers") ||
		!strings.Contains(ws.Warnings[1], "(no metadata, no <axes>)") {
		t.Errorf("settings worded by the caller: %v, warnings %q", err, ws.Warnings)
	}
	if err := set.Check(); err != nil {
		t.Fatal(err)
	}
	ex, err := set.Open(7)
	if err != nil {
		t.Fatal(err)
	}
	if b := ex.Blocks[0]; b.Name != "ex" || b.Layers != 2 || b.Heads != 4 || b.Queries != 16 || filepath.Base(ex.Paths[0]) != "ex0007.npy" {
		t.Errorf("example 7: %s %d layers %d heads %d queries from %v", b.Name, b.Layers, b.Heads, b.Queries, ex.Paths)
	}
	ex.Close()

	opt := NewOptions()
	opt.Group = GroupLayers
	set, err = OpenSet([]string{dir}, opt)
	if err != nil {
		t.Fatal(err)
	}
	// per-layer arrays of rank 4 are [batch head query key]
	if l := set.Layout(); set.Len() != 1 || l[0].Layers != 20 || l[0].Heads != 4 || set.Grouping.Guessed || set.Grouping.Rule != "Options.Group layers" {
		t.Errorf("group layers: %d examples, layout %+v, grouping %+v", set.Len(), l, set.Grouping)
	}
	opt.Group = GroupOne
	if set, err = OpenSet([]string{dir}, opt); err != nil || set.Len() != 1 || len(set.Examples[0]) != 20 {
		t.Errorf("group one: %v", err)
	}
	opt.Group = GroupExamples
	if set, err = OpenSet([]string{dir}, opt); err != nil || set.Len() != 20 || set.Grouping.Guessed {
		t.Errorf("group examples: %v, grouping %+v", err, set.Grouping)
	}
	if _, err := ParseGroupMode("pairs"); err == nil {
		t.Error("ParseGroupMode(pairs): no error")
	}
}

// Named per-layer files are still one example: the names say so, nothing is
// guessed. Bare numbered files beside another file are layers, said to be guessed.
func TestPerLayerFilesStayOneExample(t *testing.T) {
	set, err := OpenSet([]string{filepath.Join(fixtures, "exports", "decode_step")}, NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	if set.Len() != 1 || set.Grouping.Guessed || set.Grouping.Rule != "array names" || set.Layout()[0].Layers != 3 {
		t.Errorf("decode_step: %d examples, grouping %+v, layout %+v", set.Len(), set.Grouping, set.Layout())
	}
	dir := numberedSet(t, 3)
	writeNPY(t, filepath.Join(dir, "layer_7.npy"), "<f4", []int{2, 4, 16, 16}, make([]byte, 4*2*4*16*16))
	set, err = OpenSet([]string{dir}, NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	if set.Len() != 1 || !set.Grouping.Guessed || !strings.HasSuffix(set.Grouping.Warning, "pass Options.Group examples") {
		t.Errorf("ex0000..ex0002 + layer_7: %d examples, grouping %+v", set.Len(), set.Grouping)
	}
}

// A task that reads one example of a set opens that example's files and
// the first example's (the layout every example must share), whatever the
// size of the set: for NPY files, whose names come from their paths, and
// for files whose names are in their headers (safetensors here).
func TestShardOpensItsOwnFiles(t *testing.T) {
	src := filepath.Join(fixtures, "exports", "gqa.safetensors")
	raw, err := os.ReadFile(src)
	if err != nil {
		t.Fatal(err)
	}
	for _, n := range []int{16, 64} {
		npyDir := numberedSet(t, n)
		stDir := t.TempDir()
		for i := 0; i < n; i++ {
			if err := os.WriteFile(filepath.Join(stDir, fmt.Sprintf("ex%02d.safetensors", i)), raw, 0o644); err != nil {
				t.Fatal(err)
			}
		}
		for _, c := range []struct {
			dir  string
			want int // files opened
		}{
			{npyDir, 2}, // example 0 (layout) and example 1
			{stDir, 3},  // file 0 and file 1 read for their names (file 1 repeats them), then example 1
		} {
			opens := 0
			opt := NewOptions()
			opt.opened = func(string) { opens++ }
			set, err := OpenSet([]string{c.dir}, opt)
			if err != nil {
				t.Fatal(err)
			}
			// shard 1 of n: example 1
			for i := 1; i < set.Len(); i += n {
				ex, err := set.Open(i)
				if err != nil {
					t.Fatal(err)
				}
				ex.Close()
			}
			if set.Len() != n || opens != c.want {
				t.Errorf("%s: %d examples (want %d); shard 1/%d opened %d files, want %d", filepath.Base(c.dir), set.Len(), n, n, opens, c.want)
			}
		}
	}
}
