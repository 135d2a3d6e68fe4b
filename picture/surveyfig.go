package picture

import (
	"fmt"
	"math"
	"strconv"
	"strings"

	"github.com/heed-dev/heed/views"
)

// SurveyFigureOptions say what a Survey figure shows besides the data.
type SurveyFigureOptions struct {
	// Title is the first line, in bold: the location (BLOCK:L..:H..).
	Title string
	// Layer, Head: the location's head, whose labels are bold (no mark on
	// the grid); -1: none.
	Layer, Head int
	Styles      views.Styles
}

// SurveyFigure draws one statistic of every head as a layers x heads grid
// (one square a head, its value written in it when there is room), with
// the heads that carry forbidden mass framed in the alarm colour, the
// axes labelled and a colour bar with the statistic and its range.
func SurveyFigure(d *views.SurveyData, o SurveyFigureOptions) (*Figure, error) {
	if d.Layers <= 0 || d.Heads <= 0 || len(d.Values) != d.Layers*d.Heads {
		return nil, fmt.Errorf("picture: survey of %d x %d heads with %d values", d.Layers, d.Heads, len(d.Values))
	}
	k := newInk(o.Styles)
	cell := math.Floor(math.Min(1100/float64(d.Heads), 800/float64(d.Layers)))
	cell = math.Max(10, math.Min(64, cell))
	numbers := cell >= 48
	labelFont := math.Max(8, math.Min(13, math.Floor(cell*0.75)))
	every := int(math.Ceil((2*Advance(labelFont)*float64(len(strconv.Itoa(d.Heads))) + 4) / cell))
	everyL := int(math.Ceil((labelFont + 2) / cell))

	sc := d.Scale()
	lo, hi := sc.Lo, sc.Hi
	nan := false
	for _, v := range d.Values {
		nan = nan || math.IsNaN(v) || math.IsInf(v, 0)
	}
	name := d.Stat
	if d.Unit != "" {
		name += " (" + d.Unit + ")"
	}
	gridW, gridH := cell*float64(d.Heads), cell*float64(d.Layers)
	layerW := TextWidth("L"+strconv.Itoa(d.Layers-1), labelFont)
	gridX := margin + lineSize + 10 + layerW + 8
	const barW = 16
	barX := gridX + gridW + 28
	tickW := math.Max(TextWidth(views.FormatValue(lo), smallSize), TextWidth(views.FormatValue(hi), smallSize))
	w := math.Ceil(math.Min(MaxFigureWidth, math.Max(640, barX+barW+7+tickW+8+lineSize+4+margin)))

	f := NewFigure(int(w), 1, o.Styles.Dark)
	what := fmt.Sprintf("%s of every head of %s, layers × heads", strings.ToUpper(name[:1])+name[1:], d.Block)
	if d.Scope != "" {
		what += ", " + d.Scope
	}
	if d.Hint != "" {
		what += "; " + d.Hint
	}
	lines := []string{what + "."}
	if d.Note != "" {
		lines = append(lines, d.Note)
	}
	top := header(f, k, o.Title, lines, "", w-2*margin)
	// head indices over the columns, the axis title over them
	f.Text("head", gridX+gridW/2, top+lineSize, 0, Middle, TextStyle{lineSize, Bold, k.text})
	gridY := top + lineSize + 10 + labelFont + 8
	for h := 0; h < d.Heads; h++ {
		if h%every != 0 && h != o.Head {
			continue
		}
		face, c := Regular, k.label
		if h == o.Head {
			face, c = Bold, k.title
		}
		f.Text(strconv.Itoa(h), gridX+(float64(h)+0.5)*cell, gridY-6, 0, Middle, TextStyle{labelFont, face, c})
	}
	f.Text("layer", margin+lineSize, gridY+gridH/2, 90, Middle, TextStyle{lineSize, Bold, k.text})
	alarm := k.st.Colormap.Alarm
	marked := false
	for l := 0; l < d.Layers; l++ {
		y := gridY + float64(l)*cell
		if l%everyL == 0 || l == o.Layer {
			face, c := Regular, k.label
			if l == o.Layer {
				face, c = Bold, k.title
			}
			f.Text("L"+strconv.Itoa(l), gridX-8, y+cell/2+0.35*labelFont, 0, End, TextStyle{labelFont, face, c})
		}
		for h := 0; h < d.Heads; h++ {
			i := l*d.Heads + h
			x := gridX + float64(h)*cell
			v := d.Values[i]
			if math.IsNaN(v) || math.IsInf(v, 0) {
				continue
			}
			col := k.st.Colormap.At(d.Frac(v, sc))
			f.Rect(x, y, cell, cell, col)
			if numbers {
				ink := views.RGB(0, 0, 0)
				if col.Luma() < 0.18 {
					ink = views.RGB(255, 255, 255)
				}
				f.Text(views.FormatValue(v), x+cell/2, y+cell/2+0.35*smallSize, 0, Middle, TextStyle{smallSize, Regular, ink})
			}
		}
	}
	// marks over the cells: the frame of a head with forbidden mass
	for i := range d.Values {
		if d.Marked(i) {
			marked = true
			x, y := gridX+float64(i%d.Heads)*cell, gridY+float64(i/d.Heads)*cell
			f.Frame(x, y, cell, cell, alarm)
			f.Frame(x+1, y+1, cell-2, cell-2, alarm)
			if cell >= 18 {
				f.Frame(x+2, y+2, cell-4, cell-4, alarm)
			}
		}
	}
	f.Frame(gridX-1, gridY-1, gridW+2, gridH+2, k.rule)
	bar := name
	if d.Log {
		bar += ", log scale"
	}
	barH := math.Max(120, math.Min(gridH, 360))
	if d.Log {
		colourBar(f, k, barX, gridY, barW, barH, barScale{name: bar, lo: hi * math.Pow(10, -views.LogDecades), hi: hi, logScale: true})
	} else {
		colourBar(f, k, barX, gridY, barW, barH, barScale{name: bar, lo: lo, hi: hi})
	}
	y := gridY + math.Max(gridH, barH) + 14
	var sw []swatch
	if marked {
		sw = append(sw, swatch{c: alarm, text: "framed: the head puts weight on cells its mask forbids (any amount)"})
	}
	if nan {
		sw = append(sw, swatch{framed: true, text: "blank: not defined for that head"})
	}
	if len(sw) > 0 {
		y = legend(f, k, gridX, y+12, w-gridX-margin, sw)
	}
	f.H = int(math.Ceil(y + margin))
	return f, nil
}
