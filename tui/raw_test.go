package tui

import (
	"path/filepath"
	"strings"
	"testing"

	tea "charm.land/bubbletea/v2"
	"github.com/charmbracelet/colorprofile"
	"github.com/charmbracelet/x/ansi"
	"github.com/heed-dev/heed/loader"
	"github.com/heed-dev/heed/views"
)

// A float16 export (numpy's, gen_fixtures.py) is drawn from its stored
// patterns: the Map's head is held as patterns, and the status bar's weight
// at the cursor is what ReadAttn converts that cell to.
func TestMapFromFloat16Patterns(t *testing.T) {
	path := filepath.Join("..", "testdata", "fixtures", "npz", "stored.npz")
	set, err := loader.OpenSet([]string{path}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	m, err := New(set, Options{At: "decoder:L1:H1:B0:q3", Background: "dark", Profile: colorprofile.Ascii})
	if err != nil {
		t.Fatal(err)
	}
	defer m.Close()
	m.Update(tea.WindowSizeMsg{Width: 100, Height: 30})
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
	want := "w " + views.FormatWeight(w[m.q*blk.Keys+m.k])
	if !strings.Contains(v, want) {
		t.Errorf("status bar lacks %q:\n%s", want, v)
	}
}
