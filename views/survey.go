package views

import (
	"fmt"
	"math"
	"strconv"
)

// SurveyData is one statistic of every head of a block.
type SurveyData struct {
	Block         string
	Layers, Heads int
	// Stat names the statistic, Unit its unit ("" for none), Hint says how to
	// read it (e.g. "low = focused").
	Stat, Unit, Hint string
	// Values is layer-major, Layers x Heads; NaN = not computed yet.
	Values []float64
	// Lo and Hi fix the colour scale; when Lo >= Hi they come from Values.
	Lo, Hi float64
	// Details describe the head under the cursor.
	Details []Field
	// Note is shown under the grid (progress, warnings).
	Note string
}

// SurveyLayout is where the grid went, for mouse clicks.
type SurveyLayout struct {
	GridX, GridY, CellW int
	L0, H0              int // first visible layer and head
	Rows, Cols          int // visible layers and heads
}

// HeadAt maps a canvas position to a head.
func (l SurveyLayout) HeadAt(x, y int) (layer, head int, ok bool) {
	if x < l.GridX || y < l.GridY || l.CellW == 0 {
		return 0, 0, false
	}
	r, c := y-l.GridY, (x-l.GridX)/l.CellW
	if r >= l.Rows || c >= l.Cols {
		return 0, 0, false
	}
	return l.L0 + r, l.H0 + c, true
}

func (d *SurveyData) scale() (lo, hi float64) {
	if d.Lo < d.Hi {
		return d.Lo, d.Hi
	}
	lo, hi = math.Inf(1), math.Inf(-1)
	for _, v := range d.Values {
		if !math.IsNaN(v) && !math.IsInf(v, 0) {
			lo, hi = math.Min(lo, v), math.Max(hi, v)
		}
	}
	if lo > hi {
		return 0, 1
	}
	if lo == hi {
		return lo, lo + 1
	}
	return lo, hi
}

// Survey draws the layers x heads grid with the cursor on (layer, head).
func Survey(d *SurveyData, w, h, layer, head int, st Styles) (*Canvas, SurveyLayout) {
	c := NewCanvas(w, h)
	var l SurveyLayout
	title := "Survey · " + d.Block + " · " + d.Stat
	if d.Unit != "" {
		title += " (" + d.Unit + ")"
	}
	x := c.Text(0, 0, title, st.Title, -1)
	if d.Hint != "" {
		c.Text(x, 0, "  "+d.Hint, st.Faint, -1)
	}
	if d.Layers <= 0 || d.Heads <= 0 {
		return c, l
	}
	labelW := 1 + digits(d.Layers-1)
	avail := w - labelW - 1
	switch {
	case 3*d.Heads <= avail:
		l.CellW = 3
	case 2*d.Heads <= avail:
		l.CellW = 2
	default:
		l.CellW = 1
	}
	l.GridX, l.GridY = labelW+1, 2
	footer := 5
	l.Rows = max(1, min(d.Layers, h-l.GridY-footer))
	l.Cols = max(1, min(d.Heads, avail/l.CellW))
	l.L0 = scrollStart(layer, d.Layers, l.Rows)
	l.H0 = scrollStart(head, d.Heads, l.Cols)
	lo, hi := d.scale()
	// head indices
	step := 1
	if l.CellW < 3 {
		step = niceStep(ceilDiv(digits(d.Heads)+1, l.CellW))
	}
	for hc := 0; hc < l.Cols; hc++ {
		hh := l.H0 + hc
		style := st.Faint
		if hh == head {
			style = st.LabelHi
		} else if hh%step != 0 {
			continue
		}
		s := strconv.Itoa(hh)
		if l.CellW >= 2 {
			s = padLeft(s, l.CellW-1)
		}
		c.Text(l.GridX+hc*l.CellW, 1, s, style, -1)
	}
	c.Text(0, 1, padLeft("H", labelW), st.Faint, -1)
	glyphs := max(1, l.CellW-1)
	for r := 0; r < l.Rows; r++ {
		ll := l.L0 + r
		style := st.Label
		if ll == layer {
			style = st.LabelHi
		}
		c.Text(0, l.GridY+r, padLeft("L"+strconv.Itoa(ll), labelW), style, -1)
		for hc := 0; hc < l.Cols; hc++ {
			hh := l.H0 + hc
			v := d.Values[ll*d.Heads+hh]
			t := 0.0
			if !math.IsNaN(v) {
				t = math.Max(0, math.Min(1, (v-lo)/(hi-lo)))
			}
			cur := ll == layer && hh == head
			x := l.GridX + hc*l.CellW
			for g := 0; g < glyphs; g++ {
				var ch rune
				var cell Style
				switch {
				case math.IsNaN(v):
					ch, cell = '·', st.Faint
				case st.HalfBlocks():
					col := st.Colormap.At(t)
					ch, cell = '█', Style{FG: col}
					if cur {
						ch, cell = '<', Style{FG: contrast(col), BG: col, Attr: Bold}
						if g == glyphs-1 && glyphs > 1 {
							ch = '>'
						}
					}
				default:
					ch = rune(RampGlyph(math.Max(t, 1e-9)))
					cell = Style{FG: colourIf(st, st.Colormap.At(t))}
				}
				if cur && !st.HalfBlocks() {
					cell.Attr |= Reverse | Bold
				}
				c.Set(x+g, l.GridY+r, ch, cell)
			}
		}
	}
	y := l.GridY + l.Rows + 1
	name := d.Stat
	x = drawLegendBar(c, 0, y, min(16, max(4, w/5)), name, lo, hi, st)
	for _, v := range d.Values {
		if math.IsNaN(v) {
			c.Text(x, y, "   · not computed yet", st.Faint, -1)
			break
		}
	}
	if d.Layers > l.Rows || d.Heads > l.Cols {
		c.Text(0, y-1, fmt.Sprintf("layers %d–%d of %d, heads %d–%d of %d", l.L0, l.L0+l.Rows-1, d.Layers, l.H0, l.H0+l.Cols-1, d.Heads), st.Faint, -1)
	}
	y++
	hd := fmt.Sprintf("L%d H%d", layer, head)
	x = c.Text(0, y, hd+"  ", st.Title, -1)
	used := drawFields(c, x, y, w-x, max(1, h-y-1), d.Details, st)
	for i, ln := range wrap(d.Note, w) {
		if yy := y + max(used, 1) + i; yy < h {
			c.Text(0, yy, ln, st.Faint, -1)
		}
	}
	return c, l
}
