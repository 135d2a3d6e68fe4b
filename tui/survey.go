// The Survey: one statistic of every head of a block, leaks marked.

package tui

import (
	"cmp"
	"fmt"
	"math"
	"slices"
	"strconv"

	"charm.land/bubbles/v2/key"
	tea "charm.land/bubbletea/v2"
	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/internal/words"
	"github.com/heed-dev/heed/views"
)

// stat is one statistic the Survey can colour its grid by.
type stat struct {
	name, unit, hint string
	// lowFirst ranks the lowest values first in the list (prune candidates)
	lowFirst bool
	// log colours on a log scale (leak mass: one leaking cell stands apart from 0)
	log bool
	get func(*analysis.Stats, *analysis.HeadStats) float64
}

// surveyStats are the Survey's statistics: those of the table of
// statistics (analysis.Statistics) with a Survey look offered for a block
// with or without gradients, in their Survey order; get reads the
// per-batch Stats (s) or, for what exists only over every batch item, the
// head's (h, nil for a batch item alone).
func surveyStats(hasGrad bool) []stat {
	type offered struct {
		order int
		stat
	}
	var out []offered
	for _, st := range analysis.Statistics() {
		if look := st.Survey; look != nil && look.When.With(hasGrad) {
			out = append(out, offered{look.Order, stat{look.Label, look.Unit, look.Hint, st.LowFirst, look.Log, st.Value}})
		}
	}
	slices.SortStableFunc(out, func(a, b offered) int { return cmp.Compare(a.order, b.order) })
	stats := make([]stat, len(out))
	for i := range out {
		stats[i] = out[i].stat
	}
	return stats
}

type surveyScreen struct {
	base
	layout  views.SurveyLayout
	numbers bool // values written in the cells
	ranked  bool // the ranked list instead of the grid
	order   []int
}

func newSurvey(m *Model) *surveyScreen { return &surveyScreen{base: base{m: m}} }

func (s *surveyScreen) Name() string { return "Survey" }

func (s *surveyScreen) ShortHelp() []key.Binding {
	k := s.m.keys
	return []key.Binding{k.Up, k.Left, k.Enter, k.Stat, k.Order}
}

func (s *surveyScreen) FullHelp() [][]key.Binding {
	k := s.m.keys
	return [][]key.Binding{{k.Up, k.Down, k.Left, k.Right, k.Enter, k.Stat, k.Order, k.Numbers}}
}

// step moves the cursor d places along the ranked list.
func (s *surveyScreen) step(d int) {
	m := s.m
	heads := m.bi().blk.Heads
	cur := slices.Index(s.order, m.sel.Layer*heads+m.sel.Head)
	if len(s.order) == 0 {
		return
	}
	i := max(0, min(cur+d, len(s.order)-1))
	m.selectSet(func(sel *Selection) { sel.Layer, sel.Head = s.order[i]/heads, s.order[i]%heads })
}

func (s *surveyScreen) Update(msg tea.Msg) tea.Cmd {
	m := s.m
	k := m.keys
	switch msg := msg.(type) {
	case tea.KeyPressMsg:
		switch {
		case s.ranked && key.Matches(msg, k.Up):
			s.step(-1)
		case s.ranked && key.Matches(msg, k.Down):
			s.step(1)
		case s.ranked && key.Matches(msg, k.PageUp):
			s.step(-max(1, s.layout.ListRows))
		case s.ranked && key.Matches(msg, k.PageDown):
			s.step(max(1, s.layout.ListRows))
		case m.stepKeys(msg, k.Up, k.Down, k.Left, k.Right):
			// moved to another layer or head
		case key.Matches(msg, k.Stat):
			n := len(surveyStats(m.bi().blk.HasGrad))
			m.statIndex = (m.statIndex + 1) % n
		case key.Matches(msg, k.Order):
			s.ranked = !s.ranked
		case key.Matches(msg, k.Numbers):
			s.numbers = !s.numbers
		case key.Matches(msg, k.Enter):
			m.show(ScreenMap)
		}
	case tea.MouseClickMsg:
		if l, h, ok := s.layout.HeadAt(msg.X, msg.Y); ok {
			again := l == m.sel.Layer && h == m.sel.Head
			m.selectSet(func(sel *Selection) { sel.Layer, sel.Head = l, h })
			if again {
				m.show(ScreenMap)
			}
		}
	case tea.MouseWheelMsg:
		d := 0
		if msg.Button == tea.MouseWheelUp {
			d = -1
		} else if msg.Button == tea.MouseWheelDown {
			d = 1
		}
		if s.ranked {
			s.step(d)
		} else if d != 0 {
			m.moveLayer(d)
		}
	}
	return nil
}

func (s *surveyScreen) Refresh() {
	m := s.m
	b := m.bi().blk
	stats := surveyStats(b.HasGrad)
	st := stats[m.statIndex%len(stats)]
	d := &views.SurveyData{Block: b.Name, Layers: b.Layers, Heads: b.Heads, Stat: st.name, Unit: st.unit, Hint: st.hint,
		Values: make([]float64, b.Layers*b.Heads), Log: st.log, Numbers: s.numbers, Pending: !m.anaDone}
	var br *analysis.BlockResult
	if m.res != nil {
		br = m.res.Block(b.Name)
	}
	// one batch item's statistics once the user picks one (b / B), else
	// every batch item's together
	perBatch := b.Batch > 1 && m.batchPicked
	switch {
	case perBatch:
		d.Scope = fmt.Sprintf("batch item %d of %d", m.sel.Batch, b.Batch)
	case b.Batch > 1:
		d.Scope = fmt.Sprintf("all %d batch items (b: one)", b.Batch)
	}
	get := func(i int) (*analysis.Stats, *analysis.HeadStats) {
		hs := &br.Stats[i]
		if perBatch && m.sel.Batch < len(hs.Batch) {
			return &hs.Batch[m.sel.Batch], nil
		}
		return &hs.Stats, hs
	}
	for i := range d.Values {
		d.Values[i] = math.NaN()
		if br != nil {
			d.Values[i] = st.get(get(i))
		}
	}
	if br != nil {
		d.Marks = make([]bool, len(d.Values))
		for i := range d.Marks {
			ps, _ := get(i)
			d.Marks[i] = ps.LeakCells > 0
		}
		hs := br.Head(m.sel.Layer, m.sel.Head)
		ps, ph := get(m.sel.Layer*b.Heads + m.sel.Head)
		for _, x := range stats {
			d.Details = append(d.Details, views.Field{Name: x.name, Value: views.FormatValue(x.get(ps, ph))})
		}
		d.Details = append(d.Details, views.Field{Name: "rows", Value: strconv.FormatInt(ps.Rows, 10)})
		if ps.LeakCells > 0 {
			d.Details = append(d.Details, views.Field{Name: "leaking cells", Value: strconv.FormatInt(ps.LeakCells, 10)})
		}
		if hs.NaNRows > 0 {
			d.Details = append(d.Details, views.Field{Name: "NaN rows", Value: strconv.FormatInt(hs.NaNRows, 10)})
		}
		d.Note = fmt.Sprintf("over %s; suggestions are evidence to confirm by re-evaluating the model",
			words.Count(int(m.res.Examples), "example", "examples"))
		if b.Heads == 1 {
			d.Note = "one head: heads were probably averaged at export, so these describe the average"
		}
	} else if m.anaErr != nil {
		d.Note = "statistics failed: " + m.anaErr.Error()
	} else {
		d.Note = "computing statistics in the background…"
	}
	s.order = nil
	if s.ranked {
		s.order = analysis.Order(d.Values, !st.lowFirst) // NaN last; ties by position
		d.Order = s.order
	}
	c, l := views.Survey(d, s.w, s.h, m.sel.Layer, m.sel.Head, m.st)
	s.layout = l
	s.show(c)
}
