package views

import (
	"fmt"
	"strconv"
)

// HeadChange is how much one head differs between two exports.
type HeadChange struct {
	Layer, Head int
	// TV is the mean over query rows of the total variation distance
	// 0.5 * sum_k |A - B| (in [0, 1] for probability rows; common practice).
	TV float64
	// MaxAbs is the largest |A - B| and (Q, K) where it is.
	MaxAbs float64
	Q, K   int
}

// CompareData is what the Compare screen shows.
type CompareData struct {
	NameA, NameB string
	Block        string
	Layer, Head  int
	// Diff is |A - B| of the current head (Measure "|A−B|"); its Describe
	// should give both values.
	Diff *MapData
	// Heads, most changed first (may be partial while computing).
	Heads    []HeadChange
	Done     bool
	Progress string
	// Explain says what TV measures (shown under the table when there is
	// room, else in short in its title).
	Explain string
}

// CompareLayout is where the map and the table went.
type CompareLayout struct {
	Map                    MapLayout
	MapX, MapY             int
	TableX, TableY, TableH int
	Start                  int
}

// HeadAt maps a canvas position in the table to an index of Heads.
func (l CompareLayout) HeadAt(x, y int) (int, bool) {
	i := y - l.TableY
	if x < l.TableX || i < 0 || i >= l.TableH {
		return 0, false
	}
	return l.Start + i, true
}

const compareTableW = 38

// Compare draws the difference map of the current head and the table of
// the heads that changed most, row sel selected.
func Compare(d *CompareData, w, h int, opt MapOptions, sel int, st Styles) (*Canvas, CompareLayout) {
	c := NewCanvas(w, h)
	var l CompareLayout
	x := c.Text(0, 0, fmt.Sprintf("Compare · %s L%d H%d · ", d.Block, d.Layer, d.Head), st.Title, -1)
	x += c.Text(x, 0, "A "+d.NameA, st.Text, max(0, (w-x)/2-2))
	c.Text(x, 0, "  B "+d.NameB, st.Text, -1)
	mapW, mapH := w, h-1
	side := w >= 100
	if side {
		mapW = w - compareTableW - 1
		l.TableX, l.TableY = mapW+1, 3
		l.TableH = max(0, h-l.TableY)
	} else {
		rows := min(len(d.Heads), 5, max(0, h/3-1))
		mapH = h - 1 - rows - 2
		l.TableX, l.TableY = 0, 1+mapH+2
		l.TableH = rows
	}
	l.MapX, l.MapY = 0, 1
	if d.Diff != nil && mapH > 0 {
		mc, ml := RenderMap(d.Diff, mapW, mapH, opt, st)
		c.Blit(l.MapX, l.MapY, mc)
		l.Map = ml
	}
	ty := l.TableY - 1
	head := "most changed heads"
	if !d.Done {
		head += " · " + d.Progress
	}
	c.Text(l.TableX, ty-1, head, st.Title, -1)
	cols := []column{{"head", 9, false}, {"TV", 7, true}, {"max|Δ|", 7, true}, {"at", 11, false}}
	drawRow(c, l.TableX, ty, cols, func(col column) string { return col.title }, st.Faint)
	l.TableH = min(l.TableH, max(0, h-l.TableY))
	if d.Explain != "" {
		if side {
			lines := wrap("TV: "+d.Explain, compareTableW)
			if len(lines)+3 < l.TableH {
				l.TableH -= len(lines) + 1
				for i, ln := range lines {
					c.Text(l.TableX, h-len(lines)+i, ln, st.Faint, -1)
				}
			}
		} else {
			c.Text(l.TableX+StringWidth(head)+2, ty-1, "TV: 0 = same rows, 1 = no key in common", st.Faint, -1)
		}
	}
	vis := min(len(d.Heads), l.TableH)
	l.Start = scrollStart(sel, len(d.Heads), vis)
	for i := 0; i < vis; i++ {
		hc := d.Heads[l.Start+i]
		style := st.Text
		if l.Start+i == sel {
			style = st.Selected
		}
		drawRow(c, l.TableX, l.TableY+i, cols, func(col column) string {
			switch col.title {
			case "head":
				return "L" + strconv.Itoa(hc.Layer) + " H" + strconv.Itoa(hc.Head)
			case "TV":
				return FormatValue(hc.TV)
			case "max|Δ|":
				return FormatValue(hc.MaxAbs)
			case "at":
				return fmt.Sprintf("q%d k%d", hc.Q, hc.K)
			}
			return ""
		}, style)
	}
	return c, l
}
