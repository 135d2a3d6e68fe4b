// Trace: which input tokens one output position draws on.

package tui

import (
	"charm.land/bubbles/v2/key"
	tea "charm.land/bubbletea/v2"
	"fmt"
	"github.com/heed-dev/heed/internal/words"
	"github.com/heed-dev/heed/views"
)

type traceScreen struct {
	base
	sel     int
	byShare bool
	layout  views.TraceLayout
	landed  bool // chose its own query on the first visit
}

// land chooses the query Trace explains on its first visit, on its own
// terms rather than wherever the Map's cursor was: the first finding's
// query in this block (what leaked there), else the last real position
// (the prediction a model makes at the end of its input). A location given
// at the start with a query (--at) is kept.
func (s *traceScreen) land() {
	m := s.m
	if s.landed {
		return
	}
	s.landed = true
	if l, err := words.ParseLoc(m.opts.At); err == nil && l.Query >= 0 {
		return
	}
	b := m.bi().blk
	q, why := -1, ""
	if m.res != nil {
		for _, f := range m.res.Findings {
			if f.Block == b.Name && f.Worst.Query >= 0 && f.Worst.Batch == m.sel.Batch {
				q, why = f.Worst.Query, "the worst cell of the first finding"
				break
			}
		}
	}
	if q < 0 {
		qside := m.d.ex.Side(b.QuerySide)
		for p := b.Queries - 1; p >= 0; p-- {
			if qside.IsValid(m.sel.Batch, p+b.QueryOffset) {
				q, why = p, "the last real position"
				break
			}
		}
	}
	if q < 0 {
		return
	}
	m.selectSet(func(sel *Selection) { sel.Q = q })
	m.setMsg(fmt.Sprintf("Trace explains query %d (%s) · ←/→ another query", q, why), m.st.Accent)
}

func newTrace(m *Model) *traceScreen { return &traceScreen{base: base{m: m}} }

func (s *traceScreen) Name() string { return "Trace" }

func (s *traceScreen) ShortHelp() []key.Binding {
	k := s.m.keys
	return []key.Binding{k.Up, k.Left, k.Order, k.Enter}
}

func (s *traceScreen) FullHelp() [][]key.Binding {
	k := s.m.keys
	up, left, right := k.Up, k.Left, k.Right
	up.SetHelp("↑/↓", "pick an input token")
	left.SetHelp("←/h", "previous output position")
	right.SetHelp("→/l", "next output position")
	return [][]key.Binding{{up, left, right, k.PageUp, k.PageDown, k.Order, k.Enter}}
}

func (s *traceScreen) data() *views.TraceData {
	m := s.m
	return m.traces[traceKey{m.sel.Block, m.sel.Batch, m.sel.Q}]
}

func (s *traceScreen) Update(msg tea.Msg) tea.Cmd {
	m := s.m
	k := m.keys
	d := s.data()
	var order []int
	if d != nil {
		order = views.TraceOrder(d, s.byShare)
	}
	idx := 0
	for i, p := range order {
		if p == s.sel {
			idx = i
		}
	}
	moveSel := func(delta int) {
		if len(order) > 0 {
			s.sel = order[max(0, min(idx+delta, len(order)-1))]
		}
	}
	switch msg := msg.(type) {
	case tea.KeyPressMsg:
		switch {
		case key.Matches(msg, k.Up):
			moveSel(-1)
		case key.Matches(msg, k.Down):
			moveSel(1)
		case key.Matches(msg, k.PageUp):
			moveSel(-max(1, len(s.layout.Order)))
		case key.Matches(msg, k.PageDown):
			moveSel(max(1, len(s.layout.Order)))
		case key.Matches(msg, k.Left):
			m.selectSet(func(sel *Selection) { sel.Q = max(0, sel.Q-1) })
		case key.Matches(msg, k.Right):
			m.selectSet(func(sel *Selection) { sel.Q = min(m.bi().blk.Queries-1, sel.Q+1) })
		case key.Matches(msg, k.Order):
			s.byShare = !s.byShare
		case key.Matches(msg, k.Enter):
			if d != nil && (d.Side == m.bi().blk.KeySide || d.Side == "") && s.sel < m.bi().blk.Keys {
				m.selectSet(func(sel *Selection) { sel.K = s.sel })
				m.show(ScreenMap)
			} else if d != nil {
				m.setMsg("the trace is over "+d.Side+" tokens; the map of "+m.bi().blk.Name+" has other keys", m.st.Warn)
			}
		}
	case tea.MouseClickMsg:
		if p, ok := s.layout.PosAt(msg.Y); ok {
			s.sel = p
		}
	case tea.MouseWheelMsg:
		if msg.Button == tea.MouseWheelUp {
			moveSel(-3)
		} else if msg.Button == tea.MouseWheelDown {
			moveSel(3)
		}
	}
	return nil
}

func (s *traceScreen) Refresh() {
	m := s.m
	d := s.data()
	if d == nil {
		qt, _ := m.bi().tokens(m.sel.Batch)
		tok := ""
		if m.sel.Q < len(qt) {
			tok = qt[m.sel.Q]
		}
		d = &views.TraceData{Block: m.bi().blk.Name, Query: m.sel.Q, QueryToken: tok, Note: "tracing… (rollout, flow, gradient relevance)"}
	} else if d.QueryToken == "" {
		if qt, _ := m.bi().tokens(m.sel.Batch); m.sel.Q < len(qt) {
			d.QueryToken = qt[m.sel.Q]
		}
	}
	c, l := views.Trace(d, s.w, s.h, views.TraceOptions{Selected: s.sel, ByShare: s.byShare}, m.st)
	s.layout = l
	s.show(c)
}
