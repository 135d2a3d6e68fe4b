// Compare: two exports of the same shape, the most changed heads first.

package tui

import (
	"fmt"
	"strings"

	"charm.land/bubbles/v2/key"
	tea "charm.land/bubbletea/v2"
	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/views"
)

type compareScreen struct {
	base
	memoKey headKey
	memoMD  *views.MapData
	memoErr error
	made    bool
	layout  views.CompareLayout
	next    int  // table row the last enter went to
	landed  bool // opened on the most changed head already
}

func newCompare(m *Model) *compareScreen { return &compareScreen{base: base{m: m}, next: -1} }

func (s *compareScreen) Name() string { return "Compare" }

func (s *compareScreen) ShortHelp() []key.Binding {
	k := s.m.keys
	return []key.Binding{k.Up, k.Left, k.PrevHead, k.NextHead, k.Enter}
}

func (s *compareScreen) FullHelp() [][]key.Binding {
	return [][]key.Binding{append(mapFull(s.m.keys), s.m.keys.Enter)}
}

func (s *compareScreen) Update(msg tea.Msg) tea.Cmd {
	m := s.m
	heads := m.cmp[m.sel.Block]
	if km, ok := msg.(tea.KeyPressMsg); ok && key.Matches(km, m.keys.Enter) {
		if len(heads) == 0 {
			return nil
		}
		// The first enter goes to the most changed head, each next one down the table.
		s.next = (s.next + 1) % len(heads)
		s.goHead(heads[s.next])
		return nil
	}
	if cm, ok := msg.(tea.MouseClickMsg); ok {
		if i, ok := s.layout.HeadAt(cm.X, cm.Y); ok && i < len(heads) {
			s.next = i
			s.goHead(heads[i])
			return nil
		}
		mouse := cm.Mouse()
		mouse.X -= s.layout.MapX
		mouse.Y -= s.layout.MapY
		mapUpdate(m, s.layout.Map, tea.MouseClickMsg(mouse))
		return nil
	}
	mapUpdate(m, s.layout.Map, msg)
	return nil
}

func (s *compareScreen) goHead(h views.HeadChange) {
	m := s.m
	m.selectSet(func(sel *Selection) { sel.Layer, sel.Head, sel.Q, sel.K = h.Layer, h.Head, h.Q, h.K })
	rank := "most changed head"
	if s.next > 0 {
		rank = fmt.Sprintf("changed head %d", s.next+1)
	}
	m.setMsg(fmt.Sprintf("%s: L%d H%d, mean total variation %s (0 = same, 1 = disjoint), largest |A−B| %s at q%d k%d · enter: the next", rank, h.Layer, h.Head,
		views.FormatValue(h.TV), views.FormatValue(h.MaxAbs), h.Q, h.K), m.st.Accent)
}

// land opens Compare on the most changed head the first time its table is
// there (not on layer 0 head 0, which often did not change at all).
func (s *compareScreen) land() {
	m := s.m
	if s.landed || m.active != ScreenCompare || m.opts.At != "" {
		// a location given at the start (--at, a render) is kept
		return
	}
	if heads := m.cmp[m.sel.Block]; len(heads) > 0 {
		s.landed = true
		s.next = 0
		s.goHead(heads[0])
	}
}

func (s *compareScreen) Refresh() {
	m := s.m
	if !m.hasCompare() {
		s.canvas, s.view = nil, m.compareWhyNot()
		return
	}
	hk := m.headKey(0)
	if !s.made || s.memoKey != hk {
		s.made, s.memoKey = true, hk
		s.memoMD, s.memoErr = m.diffData(hk)
	}
	if s.memoErr != nil {
		s.canvas, s.view = nil, "cannot read this head: "+s.memoErr.Error()
		return
	}
	cd := &views.CompareData{NameA: strings.Join(m.set.Examples[0], " "), NameB: strings.Join(m.set.Examples[1], " "),
		Block: m.bi().blk.Name, Layer: m.sel.Layer, Head: m.sel.Head, Diff: s.memoMD, Explain: analysis.TVDoc}
	heads, done := m.cmp[m.sel.Block]
	cd.Heads, cd.Done = heads, done
	switch {
	case m.cmpErr != nil:
		cd.Progress = "failed: " + m.cmpErr.Error()
	case !done:
		cd.Progress = fmt.Sprintf("measuring %.0f%%", 100*m.cmpFrac)
	}
	sel := -1
	for i, h := range heads {
		if h.Layer == m.sel.Layer && h.Head == m.sel.Head {
			sel = i
		}
	}
	// The difference map uses the shared map state: draw it through drawMap
	// so that cursor and zoom stay in step with the layout.
	c, l := views.Compare(cd, s.w, s.h, m.syncedMapOpt(s.memoMD, s.w, s.h), sel, m.st)
	s.layout = l
	s.show(c)
}

// syncedMapOpt lays out md the way views.Compare will (its map area) and
// stores the origin and zoom, so that keys move in step with what is drawn.
func (m *Model) syncedMapOpt(md *views.MapData, w, h int) views.MapOptions {
	mw, mh := w, h-1
	if w >= 100 {
		mw = w - 38 - 1
	} else {
		rows := min(len(m.cmp[m.sel.Block]), 5, max(0, h/3-1))
		mh = h - 1 - rows - 2
	}
	m.sel.Map.CursorQ, m.sel.Map.CursorK = m.sel.Q, m.sel.K
	if mh > 0 {
		l := views.LayoutMap(md, mw, mh, m.sel.Map, m.st)
		m.sel.Map.Zoom, m.sel.Map.Q0, m.sel.Map.K0 = l.Zoom, l.Q0, l.K0
	}
	return m.sel.Map
}

// diffData is |A−B| of head hk as Compare shows it: the Map's data of the
// difference, the readout naming both weights.
func (m *Model) diffData(hk headKey) (*views.MapData, error) {
	a, b, diff, err := m.d.diff(hk)
	if err != nil {
		return nil, err
	}
	md := m.dressMapData(views.NewMapData(m.bi().blk.Queries, m.bi().blk.Keys, diff))
	md.Measure = "|A−B|"
	K := m.bi().blk.Keys
	md.Describe = func(q, k int) string {
		return "A " + views.FormatWeight(a[q*K+k]) + " → B " + views.FormatWeight(b[q*K+k])
	}
	return md, nil
}
