package tui

import (
	"fmt"
	"iter"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/internal/words"
	"github.com/heed-dev/heed/views"
)

// stepFinding moves d findings on (n: +1, N: -1) from the last one shown,
// from any screen, and shows it on the Map.
func (m *Model) stepFinding(d int) {
	switch {
	case !m.anaDone:
		m.setMsg(fmt.Sprintf("the checks are still running (%.0f%%): the findings come when they finish", 100*m.anaFrac), m.st.Warn)
		return
	case m.res == nil || len(m.res.Findings) == 0:
		if m.res != nil && m.res.Verdict() == analysis.VerdictNotJudged {
			m.setMsg("no findings, but some blocks were not judged: press 3 for what and how to judge them", m.st.Warn)
		} else {
			m.setMsg("no findings: every judged row is clean", m.st.Good)
		}
		return
	}
	n := len(m.res.Findings)
	switch {
	case m.findAt < 0 && d < 0:
		m.findAt = n - 1
	case m.findAt < 0:
		m.findAt = 0
	default:
		m.findAt = (m.findAt + d + n) % n
	}
	m.showFinding(m.findAt)
}

// showFinding puts the Map's cursor on finding i's worst cell, centred, at
// the largest zoom (up to one cell a pixel) at which every leaking cell of
// that head is in view, and says what the finding is.
func (m *Model) showFinding(i int) {
	f := m.res.Findings[i]
	w := f.Worst
	loc := words.Loc{Block: w.Block, Layer: w.Layer, Head: w.Head, Batch: w.Batch, Query: w.Query, Key: w.Key}
	if err := m.gotoLoc(loc.String(), false); err != nil {
		m.setMsg(err.Error(), m.st.Bad)
		return
	}
	m.findAt = i
	m.screens[ScreenFindings].(*findingsScreen).sel = i
	m.switchTo(ScreenMap)
	if w.Key < 0 {
		m.sel.K = 0
	}
	bi := m.bi()
	b := bi.blk
	// the box to show: the leaking cells of this head for a mask rule,
	// the worst row for a row check
	box := analysis.Extent{Q0: w.Query, Q1: w.Query, K0: 0, K1: b.Keys - 1}
	extent := ""
	md, err := m.mapData(&m.screens[ScreenMap].(*mapScreen).memo)
	if err == nil && f.Rule.IsMask() && bi.rules != nil {
		row := func(q int, dst []float32) error {
			for k := range dst {
				dst[k] = md.At(q, k)
			}
			return nil
		}
		if e, ok, err := analysis.LeakExtent(bi.rules, f.Rule, m.sel.Batch, m.sel.Head, float32(m.anaOpt.Tol), row); err == nil && ok {
			box = e
			extent = fmt.Sprintf(" · in this head: %s in q %s, k %s, mass %s",
				words.Count(e.Cells, "cell", "cells"), span(e.Q0, e.Q1), span(e.K0, e.K1), views.FormatValue(e.Mass))
		}
	}
	if err == nil {
		m.sel.Map.Zoom = m.zoomFor(md, box)
		m.centre(md)
	}
	what := f.Rule.String()
	if f.Rule.IsMask() {
		what += fmt.Sprintf(" leak: mass %s on %s", views.FormatValue(f.Mass), words.Count(int(f.Cells), "cell", "cells"))
	} else {
		what += ": " + words.Count(int(f.Rows), "row", "rows")
	}
	m.setMsg(fmt.Sprintf("finding %d of %d · %s · worst %s = %s%s · n/N next/previous", i+1, len(m.res.Findings), what,
		loc.String(), views.FormatValue(w.Value), extent), m.st.Bad)
}

func span(a, b int) string {
	if a == b {
		return fmt.Sprint(a)
	}
	return fmt.Sprintf("%d-%d", a, b)
}

// zoomFor returns the largest zoom, up to the first at one cell a pixel,
// at which the Map's view spans box.
func (m *Model) zoomFor(md *views.MapData, box analysis.Extent) int {
	best := 0
	for z, l := range m.zoomLayouts(md) {
		if l.PageRows() < box.Q1-box.Q0+1 || l.PageCols() < box.K1-box.K0+1 {
			break
		}
		best = z
		if l.Block == 1 {
			break
		}
	}
	return best
}

// zoomLayouts yields the Map's layout at each zoom step of this terminal,
// from the first (the whole matrix) to the last it can draw, with the
// cursor where the selection has it.
func (m *Model) zoomLayouts(md *views.MapData) iter.Seq2[int, views.MapLayout] {
	return func(yield func(int, views.MapLayout) bool) {
		bw, bh := m.bodySize()
		for z := 0; z < 64; z++ {
			opt := m.sel.Map
			opt.Zoom, opt.CursorQ, opt.CursorK = z, m.sel.Q, m.sel.K
			l := views.LayoutMap(md, bw, bh, opt, m.st)
			if l.TooSmall || l.Zoom != z || !yield(z, l) {
				return
			}
		}
	}
}

// centre asks the Map for an origin that puts the cursor in the middle of
// the view (LayoutMap keeps it inside the matrix).
func (m *Model) centre(md *views.MapData) {
	bw, bh := m.bodySize()
	opt := m.sel.Map
	opt.CursorQ, opt.CursorK = m.sel.Q, m.sel.K
	l := views.LayoutMap(md, bw, bh, opt, m.st)
	m.sel.Map.Q0 = max(0, m.sel.Q-l.PageRows()/2)
	m.sel.Map.K0 = max(l.KeyStart, m.sel.K-l.PageCols()/2)
}
