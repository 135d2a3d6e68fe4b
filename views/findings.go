package views

import (
	"fmt"
	"strconv"
	"strings"
)

// FindingRow is one finding of the mask and row checks.
type FindingRow struct {
	Block, Rule string
	// Layers, Heads, Batches name the units concerned ("0-11", "1, 3").
	Layers, Heads, Batches string
	// Mass is the total forbidden mass (NaN rows for nan_rows, total |sum-1|
	// for row_sum); Max the largest leaking value.
	Mass, Max   float64
	Cells, Rows int64
	// Worst is the cell to look at first, as "L3 H7 B0 q12 k13".
	Worst string
	// Offsets summarises k - q of the leaking cells ("+1 ×120").
	Offsets string
}

// FindingsData is what the Findings screen shows.
type FindingsData struct {
	// Rows, worst first.
	Rows []FindingRow
	// Diagnosis sentences (each names a likely bug).
	Diagnosis []string
	// Caveat is said once under the diagnosis (suggestions are evidence).
	Caveat string
	// Done is false while the checks still run; Progress then says how far.
	Done     bool
	Progress string
	// Notes are things worth knowing that are not findings.
	Notes []string
	// NotJudged says, one line each, what the checks could not judge, why,
	// and what would let them: with no rows, the verdict is then "not
	// judged", never "clean".
	NotJudged []string
	// Inferred says, one line per block, a mask inferred from the data.
	Inferred []string
}

// FindingsLayout is where the table went, for mouse clicks.
type FindingsLayout struct {
	TableY, Start, Visible int
}

// RowAt maps a canvas line to a finding index.
func (l FindingsLayout) RowAt(y int) (int, bool) {
	i := y - l.TableY
	if i < 0 || i >= l.Visible {
		return 0, false
	}
	return l.Start + i, true
}

type column struct {
	title string
	w     int
	right bool
}

// Findings draws the diagnosis and the findings table, row sel selected.
func Findings(d *FindingsData, w, h, sel int, st Styles) (*Canvas, FindingsLayout) {
	c := NewCanvas(w, h)
	var l FindingsLayout
	title := "Findings"
	switch {
	case !d.Done:
		title += " · checking… " + d.Progress
	case len(d.Rows) == 0 && len(d.NotJudged) > 0:
		title += " · NOT JUDGED"
	case len(d.Rows) == 0:
		title += " · clean"
	default:
		title += fmt.Sprintf(" · %d, worst first", len(d.Rows))
	}
	c.Text(0, 0, title, st.Title, -1)
	y := 1
	if d.Done && len(d.Rows) == 0 && len(d.NotJudged) == 0 {
		y++
		c.Text(0, y, "No forbidden cell carries mass, no row is NaN, every judged row sums to 1.", st.Good, -1)
		y += 2
	}
	if d.Done && len(d.NotJudged) > 0 {
		y++
		if len(d.Rows) == 0 {
			c.Text(0, y, "Not clean: nothing found in what was judged, but this was not judged:", st.Warn, -1)
			y++
		}
		for _, n := range d.NotJudged {
			for i, ln := range wrap(n, w-2) {
				if y >= h-4 {
					break
				}
				if i == 0 {
					c.Text(0, y, "! ", st.Warn, -1)
				}
				c.Text(2, y, ln, st.Text, -1)
				y++
			}
		}
		y++
	}
	// faint wraps each of lines, prefixed, while 4 rows stay for the table
	faint := func(prefix string, lines []string) {
		for _, n := range lines {
			for _, ln := range wrap(prefix+n, w) {
				if y >= h-4 {
					return
				}
				c.Text(0, y, ln, st.Faint, w)
				y++
			}
		}
	}
	faint("inferred: ", d.Inferred)
	// Keep at least 4 table rows: diagnosis gets what is left.
	diagMax := max(1, h-y-6)
	used := 0
	for _, s := range d.Diagnosis {
		lines := wrap(s, w-2)
		for i, ln := range lines {
			if used >= diagMax {
				break
			}
			bullet := "  "
			if i == 0 {
				bullet = "• "
			}
			c.Text(0, y, bullet, st.Warn, -1)
			c.Text(2, y, ln, st.Text, -1)
			y++
			used++
		}
	}
	if d.Caveat != "" && len(d.Diagnosis) > 0 && y < h-4 {
		for _, ln := range wrap(d.Caveat, w) {
			c.Text(0, y, ln, st.Faint, -1)
			y++
		}
	}
	faint("note: ", d.Notes)
	if len(d.Rows) == 0 {
		return c, l
	}
	y++
	// the worst cell's location names the block: no column of its own
	cols := []column{{"rule", 9, false}, {"layers", 7, false}, {"heads", 7, false},
		{"batch", 5, false}, {"mass", 9, true}, {"cells", 7, true}, {"max", 7, true}, {"worst", 24, false}, {"offsets", 12, false}}
	// Narrow terminals drop the least needed columns first.
	for width(cols) > w && len(cols) > 6 {
		drop := map[string]bool{"offsets": true, "cells": true, "batch": true}
		for i := len(cols) - 1; i >= 0; i-- {
			if drop[cols[i].title] {
				cols = append(cols[:i], cols[i+1:]...)
				break
			}
		}
	}
	if extra := w - width(cols); extra > 0 {
		cols[len(cols)-1].w += extra
	}
	drawRow(c, 0, y, cols, func(col column) string { return col.title }, st.Faint)
	y++
	l.TableY = y
	l.Visible = min(len(d.Rows), max(1, h-y))
	l.Start = scrollStart(sel, len(d.Rows), l.Visible)
	for i := 0; i < l.Visible; i++ {
		r := d.Rows[l.Start+i]
		style := st.Text
		if l.Start+i == sel {
			style = st.Selected
		}
		drawRow(c, 0, y+i, cols, func(col column) string {
			switch col.title {
			case "rule":
				return r.Rule
			case "block":
				return r.Block
			case "layers":
				return r.Layers
			case "heads":
				return r.Heads
			case "batch":
				return r.Batches
			case "mass":
				return FormatValue(r.Mass)
			case "cells":
				return strconv.FormatInt(r.Cells, 10)
			case "max":
				return FormatValue(r.Max)
			case "worst":
				return r.Worst
			case "offsets":
				return r.Offsets
			}
			return ""
		}, style)
		if l.Start+i != sel && (r.Rule != "") {
			c.Text(0, y+i, Ellipsize(r.Rule, cols[0].w), st.Bad, cols[0].w)
		}
	}
	if len(d.Rows) > l.Visible {
		c.Text(max(0, w-12), l.TableY-1, fmt.Sprintf("%d–%d of %d", l.Start+1, l.Start+l.Visible, len(d.Rows)), st.Faint, -1)
	}
	return c, l
}

func width(cols []column) int {
	n := 0
	for _, c := range cols {
		n += c.w + 1
	}
	return n
}

func drawRow(c *Canvas, x, y int, cols []column, text func(column) string, st Style) {
	var b strings.Builder
	for i, col := range cols {
		if i > 0 {
			b.WriteByte(' ')
		}
		if col.right {
			b.WriteString(padLeft(text(col), col.w))
		} else {
			b.WriteString(padRight(text(col), col.w))
		}
	}
	c.Text(x, y, b.String(), st, -1)
}
