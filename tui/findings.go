// Findings: the checks' findings and diagnosis, worst first.

package tui

import (
	"fmt"
	"strings"

	"charm.land/bubbles/v2/key"
	tea "charm.land/bubbletea/v2"
	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/internal/prose"
	"github.com/heed-dev/heed/internal/words"
	"github.com/heed-dev/heed/views"
)

type findingsScreen struct {
	base
	sel    int
	layout views.FindingsLayout
}

func newFindings(m *Model) *findingsScreen { return &findingsScreen{base: base{m: m}} }

func (s *findingsScreen) Name() string { return "Findings" }

func (s *findingsScreen) ShortHelp() []key.Binding {
	k := s.m.keys
	return []key.Binding{k.Up, k.Down, k.Enter}
}

func (s *findingsScreen) FullHelp() [][]key.Binding {
	k := s.m.keys
	return [][]key.Binding{{k.Up, k.Down, k.PageUp, k.PageDown, k.Enter}}
}

func (s *findingsScreen) findings() []analysis.Finding {
	if s.m.res == nil {
		return nil
	}
	return s.m.res.Findings
}

func (s *findingsScreen) Update(msg tea.Msg) tea.Cmd {
	m := s.m
	k := m.keys
	n := len(s.findings())
	switch msg := msg.(type) {
	case tea.KeyPressMsg:
		switch {
		case key.Matches(msg, k.Up):
			s.sel--
		case key.Matches(msg, k.Down):
			s.sel++
		case key.Matches(msg, k.PageUp):
			s.sel -= max(1, s.layout.Visible)
		case key.Matches(msg, k.PageDown):
			s.sel += max(1, s.layout.Visible)
		case key.Matches(msg, k.Enter):
			if n > 0 {
				m.showFinding(max(0, min(s.sel, n-1)))
			}
		}
	case tea.MouseClickMsg:
		if i, ok := s.layout.RowAt(msg.Y); ok && i < n {
			if i == s.sel {
				m.showFinding(i)
			}
			s.sel = i
		}
	case tea.MouseWheelMsg:
		if msg.Button == tea.MouseWheelUp {
			s.sel--
		} else if msg.Button == tea.MouseWheelDown {
			s.sel++
		}
	}
	s.sel = max(0, min(s.sel, n-1))
	return nil
}

func offsetsText(os []analysis.OffsetCount) string {
	var parts []string
	for i, o := range os {
		if i == 3 {
			parts = append(parts, "…")
			break
		}
		parts = append(parts, fmt.Sprintf("%+d ×%d", o.Offset, o.Count))
	}
	return strings.Join(parts, ", ")
}

func (s *findingsScreen) Refresh() {
	m := s.m
	d := &views.FindingsData{Done: m.anaDone, Progress: fmt.Sprintf("%.0f%%", 100*m.anaFrac)}
	if m.anaErr != nil {
		d.Notes = append(d.Notes, "the checks failed: "+m.anaErr.Error())
	}
	d.Notes = append(d.Notes, m.set.Warnings...)
	if m.res != nil {
		for _, f := range m.res.Findings {
			bl := m.res.Block(f.Block)
			L, H, B := 0, 0, 0
			if bl != nil {
				L, H, B = bl.Layers, bl.Heads, bl.Batch
			}
			w := f.Worst
			worst := w.String()
			d.Rows = append(d.Rows, views.FindingRow{Block: f.Block, Rule: f.Rule.String(),
				Layers: words.Ranges(f.Layers, L), Heads: words.Ranges(f.Heads, H), Batches: words.Ranges(f.Batches, B),
				Mass: f.Mass, Max: f.Max, Cells: f.Cells, Rows: f.Rows, Worst: worst, Offsets: offsetsText(f.Offsets)})
		}
		for _, dg := range prose.Diagnoses(m.res.Diagnoses) {
			d.Diagnosis = append(d.Diagnosis, strings.TrimSpace(strings.TrimSuffix(dg.Text, prose.Caveat)))
		}
		d.Caveat = prose.Caveat
		d.Notes = append(d.Notes, prose.Notes(m.res.Notes)...)
		for _, c := range m.res.Coverage {
			for _, g := range c.NotJudged {
				d.NotJudged = append(d.NotJudged, fmt.Sprintf("%s: %s: %s. To judge it: %s", g.Block, g.What, g.Why, g.Fix))
			}
			if c.KindFrom == "inferred" {
				d.Inferred = append(d.Inferred, c.Block+": "+c.Evidence)
			}
		}
	}
	s.sel = max(0, min(s.sel, len(d.Rows)-1))
	c, l := views.Findings(d, s.w, s.h, s.sel, m.st)
	s.layout = l
	s.show(c)
}
