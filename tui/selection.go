package tui

import "github.com/heed-dev/heed/views"

// Selection is the one thing every screen shows and moves: which block,
// layer, head and batch item, the cursor cell (query Q, key K), and the
// Map's zoom, origin and drawing options. The root model owns it; the
// screens read it and change it by sending selectMsg values, which the root
// applies (clamped to the block) before anything is drawn.
type Selection struct {
	Block, Layer, Head, Batch int
	Q, K                      int
	Map                       views.MapOptions
}

// selectMsg asks the root to make sel the selection, and to show screen
// (-1: stay on the focused one).
type selectMsg struct {
	sel    Selection
	screen int
}

// selectSet sends a copy of the selection changed by edit: the way screens
// move it.
func (m *Model) selectSet(edit func(*Selection)) {
	s := m.sel
	edit(&s)
	m.update(selectMsg{sel: s, screen: -1})
}

// applySelect is the one place the selection changes: the block first (its
// shape bounds the rest), then everything clamped to the block.
func (m *Model) applySelect(msg selectMsg) {
	s := msg.sel
	if s.Block != m.sel.Block && s.Block >= 0 && s.Block < len(m.d.blocks) {
		m.setBlock(s.Block)
		s.Map = m.sel.Map // another block's matrix: the map starts over
	}
	s.Block = m.sel.Block
	b := m.bi().blk
	clamp := func(v, n int) int { return max(0, min(v, n-1)) }
	s.Layer, s.Head, s.Batch = clamp(s.Layer, b.Layers), clamp(s.Head, b.Heads), clamp(s.Batch, b.Batch)
	s.Q, s.K = clamp(s.Q, b.Queries), clamp(s.K, b.Keys)
	m.sel = s
	if msg.screen >= 0 {
		m.switchTo(msg.screen)
	}
}

// show asks the root to focus screen i, the selection unchanged.
func (m *Model) show(i int) { m.update(selectMsg{sel: m.sel, screen: i}) }
