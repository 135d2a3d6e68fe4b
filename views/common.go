package views

import (
	"math"
	"strings"
)

// Field is a named value shown in detail lines and the status bar.
type Field struct {
	Name, Value string
}

// wrap breaks s into lines of at most w columns at spaces.
func wrap(s string, w int) []string {
	if w <= 0 {
		return nil
	}
	var lines []string
	var cur strings.Builder
	n := 0
	for _, word := range strings.Fields(s) {
		ww := StringWidth(word)
		if n > 0 && n+1+ww > w {
			lines = append(lines, cur.String())
			cur.Reset()
			n = 0
		}
		if n > 0 {
			cur.WriteByte(' ')
			n++
		}
		cur.WriteString(word)
		n += ww
	}
	if n > 0 {
		lines = append(lines, cur.String())
	}
	return lines
}

// scrollStart returns the first visible index of n items in a window of
// size that keeps cur visible, roughly centred.
func scrollStart(cur, n, size int) int {
	if size <= 0 || n <= size {
		return 0
	}
	s := cur - size/2
	return max(0, min(s, n-size))
}

// padRight pads s with spaces to w columns (cutting with "…" when longer).
func padRight(s string, w int) string {
	s = Ellipsize(s, w)
	return s + strings.Repeat(" ", max(0, w-StringWidth(s)))
}

// padLeft right-aligns s in w columns.
func padLeft(s string, w int) string {
	s = Ellipsize(s, w)
	return strings.Repeat(" ", max(0, w-StringWidth(s))) + s
}

// FormatValue prints a statistic with 4 significant digits ("–" for NaN).
func FormatValue(v float64) string {
	if math.IsNaN(v) {
		return "–"
	}
	return FormatWeight(float32(v))
}

// drawFields writes "name value" pairs separated by gaps on lines from y,
// wrapping at w; it returns the number of lines used (at most maxLines).
func drawFields(c *Canvas, x, y, w, maxLines int, fields []Field, st Styles) int {
	line, col := 0, 0
	for _, f := range fields {
		n := StringWidth(f.Name) + 1 + StringWidth(f.Value)
		if col > 0 && col+3+n > w {
			line++
			col = 0
		}
		if line >= maxLines {
			return line
		}
		if col > 0 {
			col += 3
		}
		col += c.Text(x+col, y+line, f.Name, st.Faint, w-col)
		col += c.Text(x+col, y+line, " ", st.Text, w-col)
		col += c.Text(x+col, y+line, f.Value, Style{Attr: Bold}, w-col)
	}
	if col > 0 {
		line++
	}
	return line
}

// ValueRange is the span of values a colour scale runs over.
type ValueRange struct{ Lo, Hi float64 }

// legendScale is what a colour scale's legend says: the name of what the
// colours stand for and the values at its low and high ends.
type legendScale struct {
	name string
	ValueRange
}

// drawLegendBar writes "name lo [bar] hi", the bar barW cells wide, and
// returns the next x.
func drawLegendBar(c *Canvas, x, y, barW int, sc legendScale, st Styles) int {
	x += c.Text(x, y, sc.name+" ", st.Faint, -1)
	x += c.Text(x, y, FormatValue(sc.Lo)+" ", st.Text, -1)
	x = drawScaleBar(c, x, y, barW, st)
	x += c.Text(x, y, " "+FormatValue(sc.Hi), st.Text, -1)
	return x
}
