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
	// Scope says what the values are over ("all batch items", "batch item 2").
	Scope string
	// Values is layer-major, Layers x Heads; NaN = not known (drawn blank).
	Values []float64
	// Pending says the statistics are still being computed (the blank
	// cells are "not yet", not "not defined").
	Pending bool
	// Lo and Hi fix the colour scale; when Lo >= Hi they come from Values.
	Lo, Hi float64
	// Log colours by log10 of the value over LogDecades below Hi, so that
	// small values (a leak of one cell) stand apart from 0.
	Log bool
	// Marks flags heads that carry forbidden mass (any amount); a mark is
	// drawn on them whatever the statistic. nil: none.
	Marks []bool
	// Numbers writes each head's value in its cell.
	Numbers bool
	// Order, when set, draws a ranked list of heads (layer-major indices, in
	// this order) instead of the grid.
	Order []int
	// Details describe the head under the cursor.
	Details []Field
	// Note is shown under the grid (progress, warnings).
	Note string
}

// SurveyLayout is where the grid (or the list) went, for mouse clicks.
type SurveyLayout struct {
	GridX, GridY, CellW int
	L0, H0              int // first visible layer and head
	Rows, Cols          int // visible layers and heads
	// Pair is true when each line holds two layers (upper and lower half).
	Pair bool
	// ListY, ListStart and ListRows place the ranked list (Order) when drawn.
	List                       bool
	ListY, ListStart, ListRows int
	order                      []int
	heads                      int
}

// HeadAt maps a canvas position to a head.
func (l SurveyLayout) HeadAt(x, y int) (layer, head int, ok bool) {
	if l.List {
		i := y - l.ListY
		if i < 0 || i >= l.ListRows || l.ListStart+i >= len(l.order) || l.heads == 0 {
			return 0, 0, false
		}
		j := l.order[l.ListStart+i]
		return j / l.heads, j % l.heads, true
	}
	if x < l.GridX || y < l.GridY || l.CellW == 0 {
		return 0, 0, false
	}
	r, c := y-l.GridY, (x-l.GridX)/l.CellW
	if l.Pair {
		r *= 2
	}
	if r >= l.Rows || c >= l.Cols {
		return 0, 0, false
	}
	return l.L0 + r, l.H0 + c, true
}

// GlyphMark marks a head with forbidden mass on the Survey.
const GlyphMark = '!'

// surveyHead is one head of the grid: its layer and its index in the layer.
type surveyHead struct{ layer, head int }

// Scale is the range the colours run over: Lo..Hi when set, else the finite
// values' (one wide when they are all one value, 0..1 when there are none).
func (d *SurveyData) Scale() ValueRange {
	if d.Lo < d.Hi {
		return ValueRange{d.Lo, d.Hi}
	}
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, v := range d.Values {
		if !math.IsNaN(v) && !math.IsInf(v, 0) {
			lo, hi = math.Min(lo, v), math.Max(hi, v)
		}
	}
	if lo > hi {
		return ValueRange{0, 1}
	}
	if lo == hi {
		return ValueRange{lo, lo + 1}
	}
	return ValueRange{lo, hi}
}

// Frac places v on the colour scale [0, 1] over r (on a log scale, LogDecades
// decades below r.Hi).
func (d *SurveyData) Frac(v float64, r ValueRange) float64 {
	lo, hi := r.Lo, r.Hi
	if math.IsNaN(v) {
		return 0
	}
	if d.Log {
		if !(v > 0) || !(hi > 0) {
			return 0
		}
		return math.Max(0, math.Min(1, 1+math.Log10(v/hi)/LogDecades))
	}
	return math.Max(0, math.Min(1, (v-lo)/(hi-lo)))
}

// Marked reports whether head i (layer*Heads + head) carries a mark.
func (d *SurveyData) Marked(i int) bool { return i < len(d.Marks) && d.Marks[i] }

// Survey draws the layers x heads grid (or the ranked list when d.Order is
// set) with the cursor on (layer, head).
func Survey(d *SurveyData, w, h, layer, head int, st Styles) (*Canvas, SurveyLayout) {
	c := NewCanvas(w, h)
	var l SurveyLayout
	title := "Survey · " + d.Block + " · " + d.Stat
	if d.Unit != "" {
		title += " (" + d.Unit + ")"
	}
	if d.Scope != "" {
		title += " · " + d.Scope
	}
	x := c.Text(0, 0, title, st.Title, -1)
	if d.Hint != "" {
		c.Text(x, 0, "  "+d.Hint, st.Faint, -1)
	}
	if d.Layers <= 0 || d.Heads <= 0 {
		return c, l
	}
	sc := d.Scale()
	lo, hi := sc.Lo, sc.Hi
	footer := 5
	var y int
	cur := surveyHead{layer, head}
	if d.Order != nil {
		l = surveyList(c, d, w, h-footer, cur, sc, st)
		y = l.ListY + l.ListRows + 1
	} else {
		l = surveyGrid(c, d, w, h-footer, cur, sc, st)
		rows := l.Rows
		if l.Pair {
			rows = ceilDiv(rows, 2)
		}
		y = l.GridY + rows + 1
		if d.Layers > l.Rows || d.Heads > l.Cols {
			c.Text(0, y-1, fmt.Sprintf("layers %d–%d of %d, heads %d–%d of %d", l.L0, l.L0+l.Rows-1, d.Layers, l.H0, l.H0+l.Cols-1, d.Heads), st.Faint, -1)
		}
	}
	name := d.Stat
	if d.Log {
		name += " (log)"
	}
	legendLo := lo
	if d.Log {
		legendLo = hi * math.Pow(10, -LogDecades)
	}
	x = drawLegendBar(c, 0, y, min(16, max(4, w/5)), legendScale{name, ValueRange{legendLo, hi}}, st)
	for _, v := range d.Values {
		if math.IsNaN(v) {
			what := "   blank: not defined for that head"
			if d.Pending {
				what = "   blank: not computed yet"
			}
			x += c.Text(x, y, what, st.Faint, -1)
			break
		}
	}
	for i := range d.Marks {
		if d.Marked(i) {
			x += c.Text(x, y, "   ", st.Text, -1)
			c.Set(x, y, GlyphMark, markStyle(st))
			c.Text(x+1, y, " forbidden mass (any amount)", st.Faint, -1)
			break
		}
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

// markStyle is the look of a leak mark: the colormap's alarm colour (a hue
// outside the colormap) behind it, so that it stands out from any cell.
func markStyle(st Styles) Style {
	if !st.HasColour() {
		return Style{Attr: Bold | Reverse}
	}
	return Style{FG: contrast(st.Colormap.Alarm), BG: st.Colormap.Alarm, Attr: Bold}
}

// surveyGrid draws the grid in the top h lines, with the cursor on cur and
// colours over sc.
func surveyGrid(c *Canvas, d *SurveyData, w, h int, cur surveyHead, sc ValueRange, st Styles) SurveyLayout {
	layer, head := cur.layer, cur.head
	var l SurveyLayout
	labelW := 1 + digits(d.Layers-1)
	avail := w - labelW - 1
	numW := 7 // "0.1234 " and a mark
	switch {
	case d.Numbers && numW*d.Heads <= avail:
		l.CellW = numW
	case d.Numbers:
		l.CellW = numW // scrolls across heads
	case 3*d.Heads <= avail:
		// wider cells when there is room (a few heads read better as
		// blocks than as thin bars), up to six columns
		l.CellW = min(6, avail/d.Heads)
	case 2*d.Heads <= avail:
		l.CellW = 2
	default:
		l.CellW = 1
	}
	l.GridX, l.GridY = labelW+1, 2
	lines := max(1, h-l.GridY)
	// two layers a line (upper and lower half block) when they do not fit
	// one a line and the terminal can colour both halves
	l.Pair = !d.Numbers && st.HalfBlocks() && d.Layers > lines
	l.Rows = max(1, min(d.Layers, lines))
	if l.Pair {
		l.Rows = max(1, min(d.Layers, 2*lines))
	}
	l.Cols = max(1, min(d.Heads, avail/l.CellW))
	l.L0 = scrollStart(layer, d.Layers, l.Rows)
	if l.Pair {
		l.L0 &^= 1
	}
	l.H0 = scrollStart(head, d.Heads, l.Cols)
	l.order, l.heads = nil, d.Heads
	// head indices
	step := 1
	if l.CellW < 3 {
		step = niceStep(ceilDiv(digits(d.Heads)+1, l.CellW))
	}
	curX0 := l.GridX + (head-l.H0)*l.CellW // the cursor's label, which others keep clear of
	curX1 := curX0 + len(strconv.Itoa(head))
	for hc := 0; hc < l.Cols; hc++ {
		hh := l.H0 + hc
		style := st.Faint
		if x0 := l.GridX + hc*l.CellW; hh == head {
			style = st.LabelHi
		} else if hh%step != 0 || (l.CellW < 3 && x0 < curX1+1 && x0+len(strconv.Itoa(hh)) > curX0-1) {
			continue
		}
		s := strconv.Itoa(hh)
		if l.CellW >= 3 {
			s = padLeft(s, l.CellW-1)
		}
		c.Text(l.GridX+hc*l.CellW, 1, s, style, -1)
	}
	c.Text(0, 1, padLeft("H", labelW), st.Faint, -1)
	colour := func(ll, hh int) (Colour, float64) {
		v := d.Values[ll*d.Heads+hh]
		t := d.Frac(v, sc)
		return st.Colormap.At(t), t
	}
	lines = l.Rows
	if l.Pair {
		lines = ceilDiv(l.Rows, 2)
	}
	for r := 0; r < lines; r++ {
		la := l.L0 + r
		if l.Pair {
			la = l.L0 + 2*r
		}
		lb := la + 1 // the lower half's layer in pair mode
		style := st.Label
		if la == layer || (l.Pair && lb == layer) {
			style = st.LabelHi
		}
		label := "L" + strconv.Itoa(la)
		if l.Pair {
			label = strconv.Itoa(la)
		}
		c.Text(0, l.GridY+r, padLeft(label, labelW), style, -1)
		for hc := 0; hc < l.Cols; hc++ {
			hh := l.H0 + hc
			x := l.GridX + hc*l.CellW
			if l.Pair {
				fg, _ := colour(la, hh)
				bg := NoColour
				if lb < d.Layers {
					bg, _ = colour(lb, hh)
				}
				cell := Style{FG: fg, BG: bg}
				ch := GlyphHalf
				switch {
				case hh == head && (la == layer || lb == layer):
					under := fg
					if lb == layer {
						under = bg
					}
					ch, cell = '◆', Style{FG: contrast(under), BG: under, Attr: Bold}
				case d.Marked(la*d.Heads+hh) || (lb < d.Layers && d.Marked(lb*d.Heads+hh)):
					ch, cell = GlyphMark, markStyle(st)
				case math.IsNaN(d.Values[la*d.Heads+hh]):
					ch, cell = ' ', Style{}
				}
				for g := 0; g < glyphsOf(l.CellW); g++ {
					c.Set(x+g, l.GridY+r, ch, cell)
				}
				continue
			}
			surveyCell(c, d, cellPlace{x, l.GridY + r, l.CellW}, surveyHead{la, hh}, la == layer && hh == head, sc, st)
		}
	}
	return l
}

// shortValue writes v in at most w columns: FormatValue's four significant
// digits when they fit, else fewer.
func shortValue(v float64, w int) string {
	s := FormatValue(v)
	for p := 3; StringWidth(s) > w && p >= 1; p-- {
		s = strconv.FormatFloat(v, 'g', p, 64)
	}
	return s
}

// glyphsOf is how many glyphs a cell of width cw draws: a cell of three
// columns or more keeps its last one as a gap, narrower cells have none (so
// that a dense grid reads as a heat map, not as stripes).
func glyphsOf(cw int) int {
	if cw >= 3 {
		return cw - 1
	}
	return cw
}

// cellPlace is where a cell of the grid goes: its first column x, its line
// y and its width w in columns (a gap column included when w >= 3).
type cellPlace struct{ x, y, w int }

// surveyCell draws head hd's cell at at; cur says the cursor is on it.
func surveyCell(c *Canvas, d *SurveyData, at cellPlace, hd surveyHead, cur bool, sc ValueRange, st Styles) {
	x, y, cw := at.x, at.y, at.w
	i := hd.layer*d.Heads + hd.head
	v := d.Values[i]
	t := d.Frac(v, sc)
	col := st.Colormap.At(t)
	mark := d.Marked(i)
	glyphs := glyphsOf(cw)
	if d.Numbers {
		s := padLeft(shortValue(v, glyphs-1), glyphs-1)
		cell := Style{}
		if st.HasColour() && !math.IsNaN(v) {
			cell = Style{FG: contrast(col), BG: col}
		}
		if cur {
			cell.Attr |= Reverse | Bold
		}
		c.Text(x, y, s, cell, glyphs-1)
		if mark {
			c.Set(x+glyphs-1, y, GlyphMark, markStyle(st))
		} else {
			c.Set(x+glyphs-1, y, ' ', cell)
		}
		return
	}
	for g := 0; g < glyphs; g++ {
		var ch rune
		var cell Style
		switch {
		case math.IsNaN(v):
			ch, cell = ' ', Style{}
			if cur {
				ch = '<'
				if g == glyphs-1 && glyphs > 1 {
					ch = '>'
				}
			}
		case st.HalfBlocks():
			ch, cell = '█', Style{FG: col}
			if cur {
				ch, cell = ' ', Style{FG: contrast(col), BG: col, Attr: Bold}
				switch {
				case g == 0:
					ch = '<'
				case g == glyphs-1:
					ch = '>'
				}
			}
		default:
			ch = rune(RampGlyph(math.Max(t, 1e-9)))
			cell = Style{FG: colourIf(st, col)}
		}
		if cur && !st.HalfBlocks() {
			cell.Attr |= Reverse | Bold
		}
		// the mark takes the last glyph (the only one in narrow cells, but
		// for the cursor's, which keeps its look)
		if mark && g == glyphs-1 && !(cur && glyphs == 1) {
			ch, cell = GlyphMark, markStyle(st)
			if cur {
				cell.Attr |= Reverse
			}
		}
		c.Set(x+g, y, ch, cell)
	}
}

// surveyList draws the heads in d.Order as a ranked list in the top h
// lines, with the cursor on hd and bars over sc.
func surveyList(c *Canvas, d *SurveyData, w, h int, hd surveyHead, sc ValueRange, st Styles) SurveyLayout {
	layer, head := hd.layer, hd.head
	l := SurveyLayout{List: true, ListY: 2, order: d.Order, heads: d.Heads}
	c.Text(0, 1, "  rank  layer  head  value", st.Faint, -1)
	l.ListRows = max(1, min(len(d.Order), h-l.ListY))
	cur := 0
	for i, j := range d.Order {
		if j == layer*d.Heads+head {
			cur = i
		}
	}
	l.ListStart = scrollStart(cur, len(d.Order), l.ListRows)
	barW := max(0, min(30, w-32))
	for r := 0; r < l.ListRows && l.ListStart+r < len(d.Order); r++ {
		i := l.ListStart + r
		j := d.Order[i]
		v := d.Values[j]
		s := fmt.Sprintf("%6d  %5d  %4d  %9s ", i+1, j/d.Heads, j%d.Heads, FormatValue(v))
		style := st.Text
		if i == cur {
			style = st.Selected
		}
		x := c.Text(0, l.ListY+r, s, style, -1)
		if d.Marked(j) {
			c.Set(x, l.ListY+r, GlyphMark, markStyle(st))
		}
		x += 2
		t := d.Frac(v, sc)
		n := int(math.Round(t * float64(barW)))
		if !(t > 0) {
			continue
		}
		for k := 0; k < max(n, 1); k++ {
			if st.HasColour() {
				c.Set(x+k, l.ListY+r, '█', Style{FG: st.Colormap.At(t)})
			} else {
				c.Set(x+k, l.ListY+r, '#', Style{})
			}
		}
	}
	return l
}
