package picture

import (
	"fmt"
	"math"

	"github.com/heed-dev/heed/views"
)

// MapFigureOptions say what a Map figure shows besides the matrix.
type MapFigureOptions struct {
	// Title is the first line, in bold: the location (BLOCK:L..:H..).
	Title string
	// Lines say what is shown, under the title.
	Lines []string
	// Note, when set, is drawn in the accent colour under them: the
	// positions left out and how to page to them.
	Note string
	// The window shown: queries [Q0, Q1) and keys [K0, K1), at most
	// MaxLabelled each.
	Q0, Q1, K0, K1 int
	// CursorQ and CursorK are the location's query and key: their labels
	// are bold (no mark on the matrix). -1: none.
	CursorQ, CursorK int
	// QueryAxis and KeyAxis title the axes; Measure names the colour
	// ("attention weight").
	QueryAxis, KeyAxis, Measure string
	// RuleName names the mask rule in the legend ("causal"), "" = generic.
	RuleName string
	Styles   views.Styles
}

// MapFigure draws a window of one head's matrix as a plot: one square a
// cell (the colormap for allowed cells, the alarm colour for a forbidden
// cell that carries weight, nothing where the mask forbids and nothing
// leaks), query labels on the left and key labels under the matrix turned
// to read upwards, a colour bar with the measure and its range (0 to the
// head's largest weight, as on the Map), and a legend of the marks in view.
// Cells come from views.Downsample at one cell a pixel, the data the Map
// screen draws.
func MapFigure(d *views.MapData, o MapFigureOptions) (*Figure, error) {
	q0, q1 := max(0, o.Q0), min(d.Q, o.Q1)
	k0, k1 := max(0, o.K0), min(d.K, o.K1)
	nq, nk := q1-q0, k1-k0
	if nq <= 0 || nk <= 0 {
		return nil, fmt.Errorf("picture: empty window q %d-%d k %d-%d of a %d x %d matrix", o.Q0, o.Q1, o.K0, o.K1, d.Q, d.K)
	}
	if nq > MaxLabelled || nk > MaxLabelled {
		return nil, fmt.Errorf("picture: window of %d x %d cells, at most %d a side", nq, nk, MaxLabelled)
	}
	k := newInk(o.Styles)
	px := views.Downsample(d, q0, k0, nq, nk, 1, views.AggMax)

	// cells of 4 to 28 px, the matrix within about 1150 x 1000 px
	cell := math.Floor(math.Min(1150/float64(nk), 1000/float64(nq)))
	cell = math.Max(4, math.Min(28, cell))
	font := math.Max(8, math.Min(13, math.Floor(cell*0.75)))
	every := int(math.Ceil((font + 2) / cell)) // a label every n positions

	shown := func(i, from, cur int) bool { return (i-from)%every == 0 || i == cur }
	qLabelW, kLabelH := 0.0, 0.0
	for q := q0; q < q1; q++ {
		if shown(q, q0, o.CursorQ) {
			qLabelW = math.Max(qLabelW, TextWidth(label(d.QueryTokens, q), font))
		}
	}
	for kk := k0; kk < k1; kk++ {
		if shown(kk, k0, o.CursorK) {
			kLabelH = math.Max(kLabelH, TextWidth(label(d.KeyTokens, kk), font))
		}
	}
	gridW, gridH := cell*float64(nk), cell*float64(nq)
	gridX := margin + 22 + qLabelW + 8

	// the width: the plot, the colour bar and its labels
	const barW = 16
	barX := gridX + gridW + 28
	tickW := 0.0
	for _, v := range []float64{0, float64(d.VMax)} {
		tickW = math.Max(tickW, TextWidth(views.FormatValue(v), smallSize))
	}
	w := math.Ceil(barX + barW + 7 + tickW + 8 + lineSize + 4 + margin)
	w = math.Min(MaxFigureWidth, math.Max(w, 640))

	// lay out the header on a scratch figure to learn its height
	f := NewFigure(int(w), 1, o.Styles.Dark)
	top := header(f, k, o.Title, o.Lines, o.Note, w-2*margin)
	gridY := top + 10

	// cells, runs of one colour merged along a row
	vmax := float32(d.VMax)
	has := map[string]bool{}
	for r := 0; r < nq; r++ {
		y := gridY + float64(r)*cell
		var run views.Colour
		start := -1
		flush := func(end int) {
			if start >= 0 && run.IsSet() {
				f.Rect(gridX+float64(start)*cell, y, float64(end-start)*cell, cell, run)
			}
		}
		for c := 0; c <= nk; c++ {
			var col views.Colour
			if c < nk {
				wt, forbid, _ := px.At(r, c)
				kind := px.Kind[r*px.Cols+c]
				switch {
				case wt != wt:
					col, has["nan"] = k.st.NaN, true
				case forbid > 0:
					col, has["leak"] = k.st.Colormap.Alarm, true
				case kind == views.KindMasked:
					col, has["masked"] = views.NoColour, true
				case kind == views.KindPadding:
					col, has["padding"] = k.st.Padding, true
				default:
					col = k.st.Colormap.At(views.ScaleValue(wt, vmax, views.Linear))
				}
			}
			if c == nk || col != run || start < 0 {
				flush(c)
				run, start = col, c
			}
		}
	}
	f.Frame(gridX-1, gridY-1, gridW+2, gridH+2, k.rule)

	// a label in bold title colour at the cursor's row or column
	labelStyle := func(i, cursor int) TextStyle {
		if i == cursor {
			return TextStyle{font, Bold, k.title}
		}
		return TextStyle{font, Regular, k.label}
	}
	// query labels, right-aligned beside their rows
	for q := q0; q < q1; q++ {
		if shown(q, q0, o.CursorQ) {
			y := gridY + (float64(q-q0)+0.5)*cell + 0.35*font
			f.Text(label(d.QueryTokens, q), gridX-6, y, 0, End, labelStyle(q, o.CursorQ))
		}
	}
	// key labels under their columns, reading upwards
	for kk := k0; kk < k1; kk++ {
		if shown(kk, k0, o.CursorK) {
			x := gridX + (float64(kk-k0)+0.5)*cell + 0.35*font
			f.Text(label(d.KeyTokens, kk), x, gridY+gridH+6, 90, End, labelStyle(kk, o.CursorK))
		}
	}
	// axis titles
	f.Text(o.QueryAxis, margin+lineSize, gridY+gridH/2, 90, Middle, TextStyle{lineSize, Bold, k.text})
	axisY := gridY + gridH + 6 + kLabelH + 8 + lineSize
	f.Text(o.KeyAxis, gridX+gridW/2, axisY, 0, Middle, TextStyle{lineSize, Bold, k.text})

	// the colour bar beside the matrix
	measure := o.Measure
	if measure == "" {
		measure = d.Measure
	}
	barH := math.Max(120, math.Min(gridH, 360))
	colourBar(f, k, barX, gridY, barW, barH, barScale{name: measure, lo: 0, hi: float64(d.VMax)})

	// the legend of the marks in view
	var sw []swatch
	rule := "the mask"
	if o.RuleName != "" {
		rule = "the " + o.RuleName + " rule"
	}
	sw = append(sw, swatch{c: k.st.Colormap.Alarm, text: fmt.Sprintf("forbidden by %s yet %s > %s (a leak)", rule, measure, views.FormatWeight(d.Tol))})
	if has["masked"] {
		sw = append(sw, swatch{framed: true, text: "forbidden by " + rule + ", no weight"})
	}
	if has["padding"] {
		sw = append(sw, swatch{c: k.st.Padding, text: "padding key"})
	}
	if has["nan"] {
		sw = append(sw, swatch{c: k.st.NaN, text: "NaN"})
	}
	if !has["leak"] {
		sw = sw[1:]
	}
	y := axisY + 14
	if len(sw) > 0 {
		y = legend(f, k, gridX, y+12, w-gridX-margin, sw)
	}
	f.H = int(math.Ceil(y + margin))
	return f, nil
}
