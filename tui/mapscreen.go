// The Map: one head's heat map, the rule under the data, the row inspector.

package tui

import (
	"charm.land/bubbles/v2/key"
	tea "charm.land/bubbletea/v2"
	"errors"
	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/views"
)

type mapMemo struct {
	key  headKey
	md   *views.MapData
	err  error
	made bool
}

type mapScreen struct {
	base
	memo    mapMemo
	layout  views.MapLayout
	inspect bool // the row inspector beside (or under) the map
}

func newMapScreen(m *Model) *mapScreen { return &mapScreen{base: base{m: m}} }

func (s *mapScreen) Name() string { return "Map" }

func mapShort(k KeyMap) []key.Binding {
	return []key.Binding{k.Up, k.Left, k.PrevLayer, k.NextLayer, k.PrevHead, k.NextHead, k.ZoomIn, k.ZoomOut}
}

func mapFull(k KeyMap) []key.Binding {
	return []key.Binding{k.Up, k.Down, k.Left, k.Right, k.PageUp, k.PageDown, k.ZoomIn, k.ZoomOut, k.Agg, k.Scale, k.Sink}
}

func (s *mapScreen) ShortHelp() []key.Binding { return append(mapShort(s.m.keys), s.m.keys.Inspect) }
func (s *mapScreen) FullHelp() [][]key.Binding {
	return [][]key.Binding{append(mapFull(s.m.keys), s.m.keys.Inspect)}
}

// mapUpdate handles the keys and mouse of a heat map (Map and Compare):
// the moves go to the root as one selectMsg.
func mapUpdate(m *Model, l views.MapLayout, msg tea.Msg) (handled bool) {
	b := m.bi().blk
	k := m.keys
	next := m.sel // sent to the root at the end (selectMsg)
	defer func() {
		if handled {
			m.update(selectMsg{sel: next, screen: -1})
		}
	}()
	step := max(1, l.Block)
	clampQ := func(q int) int { return max(0, min(q, b.Queries-1)) }
	clampK := func(x int) int { return max(l.KeyStart, min(x, b.Keys-1)) }
	zoom := func(d int) {
		next.Map.Zoom = max(0, min(l.Zoom+d, l.MaxZoom))
	}
	switch msg := msg.(type) {
	case tea.KeyPressMsg:
		switch {
		case key.Matches(msg, k.Up):
			next.Q = clampQ(next.Q - step)
		case key.Matches(msg, k.Down):
			next.Q = clampQ(next.Q + step)
		case key.Matches(msg, k.Left):
			next.K = clampK(next.K - step)
		case key.Matches(msg, k.Right):
			next.K = clampK(next.K + step)
		case key.Matches(msg, k.PageUp):
			next.Q = clampQ(next.Q - l.PageRows())
		case key.Matches(msg, k.PageDown):
			next.Q = clampQ(next.Q + l.PageRows())
		case key.Matches(msg, k.ZoomIn):
			zoom(1)
		case key.Matches(msg, k.ZoomOut):
			zoom(-1)
		case key.Matches(msg, k.Agg):
			next.Map.Agg = 1 - next.Map.Agg
			m.setMsg("zoomed-out pixels show the "+next.Map.Agg.String()+" weight", m.st.Text)
		case key.Matches(msg, k.Scale):
			next.Map.Scale = 1 - next.Map.Scale
			m.setMsg(next.Map.Scale.String()+" colour scale", m.st.Text)
		case key.Matches(msg, k.Sink):
			next.Map.HideSink = !next.Map.HideSink
			if next.Map.HideSink {
				next.K = max(next.K, 1)
				m.setMsg("sink column (key 0) hidden; the scale ignores it", m.st.Text)
			} else {
				m.setMsg("sink column shown", m.st.Text)
			}
		default:
			return false
		}
	case tea.MouseClickMsg:
		if q, kk, ok := l.CellAt(msg.X, msg.Y); ok {
			next.Q, next.K = q, kk
		}
	case tea.MouseWheelMsg:
		switch msg.Button {
		case tea.MouseWheelUp:
			zoom(1)
		case tea.MouseWheelDown:
			zoom(-1)
		}
	default:
		return false
	}
	return true
}

func (s *mapScreen) Update(msg tea.Msg) tea.Cmd {
	if km, ok := msg.(tea.KeyPressMsg); ok && key.Matches(km, s.m.keys.Inspect) {
		s.inspect = !s.inspect
		return nil
	}
	mapUpdate(s.m, s.layout, msg)
	return nil
}

// rowPanelW is the row inspector's width beside the map; below
// rowPanelMinW columns of body it goes under the map instead.
const (
	rowPanelW    = 40
	rowPanelMinW = 110
)

// rowData prepares the row inspector of the cursor's query.
func (m *Model) rowData(md *views.MapData, top int) *views.RowData {
	bi := m.bi()
	b := bi.blk
	q := m.sel.Q
	row := make([]float32, b.Keys)
	for k := range row {
		row[k] = md.At(q, k)
	}
	var rules []analysis.Rule
	judged := true
	if r := bi.rules; r != nil && len(r.Active()) > 0 {
		judged = r.Judged(m.sel.Batch, q)
		if judged {
			rules = make([]analysis.Rule, b.Keys)
			if err := r.CellRow(m.sel.Batch, m.sel.Head, q, rules); err != nil {
				rules = nil
			}
		}
	}
	sum := analysis.SummarizeRow(row, rules, top, float32(m.anaOpt.Tol))
	qt, kt := bi.tokens(m.sel.Batch)
	d := &views.RowData{Query: q, Position: q + b.QueryOffset, Judged: judged, Sum: sum.Sum, Entropy: sum.Entropy,
		Forbidden: sum.Forbidden, ForbidKeys: sum.ForbiddenKeys, Keys: b.Keys}
	if bi.rules != nil {
		d.Position = bi.rules.Pos(m.sel.Batch, q)
	}
	if q < len(qt) {
		d.QueryToken = qt[q]
	}
	for _, rk := range sum.Top {
		k := views.RowKey{Key: rk.Key, Weight: rk.Weight, Status: "allowed"}
		if rk.Key < len(kt) {
			k.Token = kt[rk.Key]
		}
		switch {
		case !judged:
			k.Status = "not judged"
		case rk.Rule != analysis.RuleNone:
			k.Status, k.Forbidden = "forbidden by "+rk.Rule.String(), true
		}
		d.Top = append(d.Top, k)
	}
	return d
}

// mapData returns the MapData of the current head of example 0, memoised.
func (m *Model) mapData(memo *mapMemo) (*views.MapData, error) {
	hk := m.headKey(0)
	if memo.made && memo.key == hk {
		return memo.md, memo.err
	}
	memo.key, memo.made = hk, true
	m.d.pinned = hk // its patterns stay this head's while md reads them
	bi := m.bi()
	var md *views.MapData
	if r, ok, err := m.d.raw(hk); err != nil {
		memo.md, memo.err = nil, err
		return nil, err
	} else if ok {
		md = views.NewMapData16(bi.blk.Queries, bi.blk.Keys, r.p, r.value)
	} else {
		w, err := m.d.head(hk)
		if err != nil {
			memo.md, memo.err = nil, err
			return nil, err
		}
		md = views.NewMapData(bi.blk.Queries, bi.blk.Keys, w)
	}
	memo.md, memo.err = m.dressMapData(md), nil
	return memo.md, nil
}

// dressMapData gives md, the selected head's weights (or a difference of
// them), what the Map draws beside them: tokens, the query offset and the
// mask rules the checks judge by.
func (m *Model) dressMapData(md *views.MapData) *views.MapData {
	bi := m.bi()
	md.QueryTokens, md.KeyTokens = bi.tokens(m.sel.Batch)
	md.QueryOffset = bi.blk.QueryOffset
	md.Rule = bi.ruleFunc(m.sel.Batch, m.sel.Head)
	md.RowRuns = bi.rowRunsFunc(m.sel.Batch, m.sel.Head)
	md.Tol = float32(m.anaOpt.Tol)
	return md
}

// HeadData is the selected head's data as the Map shows it or, with
// compare, as Compare shows |A−B| of the two exports: for a figure of the
// same head (a copy the caller may change). Compare needs two exports of
// one shape.
func (m *Model) HeadData(compare bool) (*views.MapData, error) {
	var md *views.MapData
	var err error
	if compare {
		if !m.hasCompare() {
			return nil, errors.New(m.compareWhyNot())
		}
		md, err = m.diffData(m.headKey(0))
	} else {
		md, err = m.mapData(&m.screens[ScreenMap].(*mapScreen).memo)
	}
	if err != nil {
		return nil, err
	}
	c := *md
	return &c, nil
}

// drawMap lays out md in w x h, syncing the cursor and origin with the
// layout, and returns the canvas.
func (m *Model) drawMap(md *views.MapData, hk headKey, isDiff bool, w, h int) (*views.Canvas, views.MapLayout) {
	m.sel.Map.CursorQ, m.sel.Map.CursorK = m.sel.Q, m.sel.K
	l := views.LayoutMap(md, w, h, m.sel.Map, m.st)
	m.sel.Map.Zoom, m.sel.Map.Q0, m.sel.Map.K0 = l.Zoom, l.Q0, l.K0
	if m.sel.K < l.KeyStart {
		m.sel.K = l.KeyStart
		m.sel.Map.CursorK = m.sel.K
	}
	var px *views.Pixels
	if !l.TooSmall {
		px = m.d.window(hk, md, l, m.sel.Map.Agg, isDiff)
	}
	return views.Map(md, px, l, m.sel.Map, m.st), l
}

func (s *mapScreen) Refresh() {
	m := s.m
	md, err := m.mapData(&s.memo)
	if err != nil {
		s.canvas, s.view = nil, m.st.Bad.Lip().Render("cannot read this head: "+err.Error())
		return
	}
	if !s.inspect {
		c, l := m.drawMap(md, m.headKey(0), false, s.w, s.h)
		s.layout = l
		s.show(c)
		return
	}
	// the map beside the inspector when wide, above it when not; the
	// map keeps the top-left corner, so mouse positions stay its own
	mw, mh := s.w-rowPanelW-1, s.h
	px, py, pw, ph := mw+1, 0, rowPanelW, s.h
	if s.w < rowPanelMinW {
		ph = min(16, max(6, s.h/3))
		mw, mh = s.w, s.h-ph-1
		px, py, pw = 0, mh+1, s.w
	}
	c, l := m.drawMap(md, m.headKey(0), false, mw, mh)
	s.layout = l
	all := views.NewCanvas(s.w, s.h)
	all.Blit(0, 0, c)
	all.Blit(px, py, views.RowPanel(m.rowData(md, max(3, ph-5)), pw, ph, m.st))
	s.show(all)
}
