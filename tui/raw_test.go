package tui

import (
	"path/filepath"
	"slices"
	"strings"
	"testing"

	tea "charm.land/bubbletea/v2"
	"github.com/charmbracelet/colorprofile"
	"github.com/charmbracelet/x/ansi"
	"github.com/heed-dev/heed/loader"
	"github.com/heed-dev/heed/views"
)

// storedF16Model opens numpy's float16 NPZ fixture (gen_fixtures.py) at loc,
// 100 x 30 without colour; it is closed when the test ends.
func storedF16Model(t *testing.T, loc string) *Model {
	t.Helper()
	path := filepath.Join("..", "testdata", "fixtures", "npz", "stored.npz")
	set, err := loader.OpenSet([]string{path}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	m, err := New(set, Options{At: loc, Background: "dark", Profile: colorprofile.Ascii})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { m.Close() })
	m.Update(tea.WindowSizeMsg{Width: 100, Height: 30})
	return m
}

// A float16 export (numpy's, gen_fixtures.py) is drawn from its stored
// patterns: the Map's head is held as patterns, and the status bar's weight
// at the cursor is what ReadAttn converts that cell to.
func TestMapFromFloat16Patterns(t *testing.T) {
	m := storedF16Model(t, "decoder:L1:H1:B0:q3")
	v := ansi.Strip(m.View().Content)
	hk := m.headKey(0)
	if _, ok, err := m.d.raw(hk); !ok || err != nil {
		t.Fatalf("the float16 head is not held as patterns (%v)", err)
	}
	blk := m.bi().blk
	w := make([]float32, blk.Queries*blk.Keys)
	if err := blk.ReadAttn(1, 0, 1, w); err != nil {
		t.Fatal(err)
	}
	want := "w " + views.FormatWeight(w[m.sel.Q*blk.Keys+m.sel.K])
	if !strings.Contains(v, want) {
		t.Errorf("status bar lacks %q:\n%s", want, v)
	}
}

// Pattern buffers of heads the cache drops are reused for the next heads
// (data.spare), never the buffer of the head the Map shows: with a cache
// of two heads, walking through every head of a float16 export and back,
// the Map's matrix is always the file's head it names (ReadRaw16 of that
// head, which TestMapFromFloat16Patterns ties to numpy's values).
func TestRawBuffersReused(t *testing.T) {
	m := storedF16Model(t, "decoder:L0:H0:B0:q1")
	blk := m.bi().blk
	n := blk.Queries * blk.Keys
	m.d.raws.budget = int64(2 * 2 * n) // two heads
	reused := 0
	keys := strings.Repeat("}", blk.Heads-1) + "]" + strings.Repeat("{", blk.Heads-1) + "[" + strings.Repeat("}", blk.Heads-1)
	for i, k := range keys {
		spare := m.d.spare.p
		m.Update(tea.KeyPressMsg{Code: k, Text: string(k)})
		_ = m.View()
		md, err := m.mapData(&m.screens[ScreenMap].(*mapScreen).memo)
		if err != nil {
			t.Fatal(err)
		}
		if spare != nil && len(md.Raw) > 0 && &spare[0] == &md.Raw[0] {
			reused++
		}
		want := make([]uint16, n)
		if _, err := blk.ReadRaw16(m.sel.Layer, m.sel.Batch, m.sel.Head, want); err != nil {
			t.Fatal(err)
		}
		if !slices.Equal(md.Raw, want) {
			t.Fatalf("step %d (L%d H%d): the Map's patterns are not that head's", i, m.sel.Layer, m.sel.Head)
		}
	}
	if reused == 0 {
		t.Error("no dropped buffer was reused")
	}
}
