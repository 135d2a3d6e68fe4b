package picture

import (
	"fmt"
	"math"
	"strconv"

	"github.com/heed-dev/heed/views"
)

// TraceFigureOptions say what a Trace figure shows besides the data.
type TraceFigureOptions struct {
	// Title is the first line, in bold: the location.
	Title string
	// Note, when set, says which positions are left out and how to page.
	Note string
	// From, To: the input positions shown, [From, To), at most MaxLabelled.
	From, To int
	Styles   views.Styles
}

// TraceFigure draws the explanation of one query as bar charts side by
// side, one a method (rollout, flow, gradient relevance), one row an input
// token: the bar is the share over the method's largest share among the
// keys the query may see, the number its share (of the total, for shares
// that are not normalised); keys the query may not see are marked as such
// instead of drawn as 0, in the alarm colour when weight reached them. Over
// the bars: what the model predicted, the one-sentence summary and each
// method's normalisation, as on the Trace screen.
func TraceFigure(d *views.TraceData, o TraceFigureOptions) (*Figure, error) {
	from, to := max(0, o.From), min(len(d.Tokens), o.To)
	if len(d.Tokens) > 0 && to <= from {
		return nil, fmt.Errorf("picture: empty window %d-%d of %d positions", o.From, o.To, len(d.Tokens))
	}
	if to-from > MaxLabelled {
		return nil, fmt.Errorf("picture: window of %d positions, at most %d", to-from, MaxLabelled)
	}
	k := newInk(o.Styles)
	n := to - from
	rowH := 22.0
	if n > 0 {
		rowH = math.Max(12, math.Min(22, math.Floor(1000/float64(n))))
	}
	font := math.Min(13, rowH-5)

	side := d.Side
	if side == "" {
		side = "input"
	}
	labelW := TextWidth("token position", smallSize)
	for p := from; p < to; p++ {
		labelW = math.Max(labelW, TextWidth(label(d.Tokens, p), font))
	}
	nm := max(1, len(d.Methods))
	panelW := 380.0
	w := math.Min(MaxFigureWidth, float64(margin)+labelW+12+float64(nm)*panelW+float64(margin))
	panelW = (w - float64(margin) - labelW - 12 - float64(margin)) / float64(nm)

	f := NewFigure(int(w), 1, o.Styles.Dark)
	q := fmt.Sprintf("query %d", d.Query)
	if d.QueryToken != "" {
		q += " " + strconv.Quote(d.QueryToken)
	}
	lines := []string{fmt.Sprintf("Trace of %s in %s: how much each %s token contributes to it, by %d methods.", q, d.Block, side, len(d.Methods))}
	if d.Predicted != "" {
		lines = append(lines, "Predicted there: "+d.Predicted+".")
	}
	if d.Summary != "" {
		lines = append(lines, "In short: "+d.Summary+".")
	}
	if d.Note != "" {
		lines = append(lines, d.Note)
	}
	y := header(f, k, o.Title, lines, o.Note, w-2*margin) + 8

	// the methods' heads: name, normalisation, the bar's scale
	x0 := float64(margin) + labelW + 12
	maxes, totals := d.VisibleSums()
	headH := 0.0
	for i, m := range d.Methods {
		px := x0 + float64(i)*panelW
		f.Text(m.Name, px, y+lineSize, 0, Start, TextStyle{lineSize + 1, Bold, k.text})
		yy := y + lineSize + 6
		var words string
		switch {
		case len(m.Shares) == 0:
			words = ""
		case m.Normalised:
			words = "number: share in % (the shares sum to 100%)"
		default:
			words = "number: % of the total " + strconv.FormatFloat(totals[i], 'g', 4, 64)
		}
		if len(m.Shares) > 0 {
			words += "; bar: ÷ the largest, " + strconv.FormatFloat(maxes[i], 'g', 4, 64)
		}
		if m.Note != "" {
			if words != "" {
				words += "; "
			}
			words += m.Note
		}
		for _, ln := range wrapText(words, panelW-16, smallSize) {
			yy += smallSize + 4
			f.Text(ln, px, yy, 0, Start, TextStyle{smallSize, Regular, k.faint})
		}
		headH = math.Max(headH, yy-y)
	}
	y += headH + 10
	f.Text("token position", x0-12, y-4, 0, End, TextStyle{smallSize, Bold, k.text})

	// one row an input token; a run of keys the query may not see, where
	// nothing leaked, is one row
	zebra := views.Blend(k.page, k.text, 0.05)
	barW := panelW - 78
	row := 0
	for p := from; p < to; row++ {
		ry := y + float64(row)*rowH
		if row%2 == 1 {
			f.Rect(margin, ry, w-2*margin, rowH, zebra)
		}
		base := ry + rowH/2 + 0.35*font
		if !d.Seen(p) {
			e := p + 1
			if !d.Leaks(p) {
				for e < to && !d.Seen(e) && !d.Leaks(e) && d.Status[e] == d.Status[p] {
					e++
				}
			}
			lbl, msg := label(d.Tokens, p), d.Status[p]+": not seen by this query"
			col := k.faint
			if e > p+1 {
				lbl = fmt.Sprintf("%d–%d", p, e-1)
				msg = fmt.Sprintf("%s: %d positions not seen by this query", d.Status[p], e-p)
			}
			if d.Leaks(p) {
				msg += fmt.Sprintf(" (yet %s %s reaches it: a leak)", d.Methods[0].Name, strconv.FormatFloat(d.Methods[0].Shares[p], 'g', 3, 64))
				col = k.bad
			}
			f.Text(lbl, x0-12, base, 0, End, TextStyle{font, Regular, k.label})
			f.Text(msg, x0, base, 0, Start, TextStyle{font, Regular, col})
			p = e
			continue
		}
		face, c := Regular, k.label
		if p == d.Query {
			face, c = Bold, k.title
		}
		f.Text(label(d.Tokens, p), x0-12, base, 0, End, TextStyle{font, face, c})
		for i, m := range d.Methods {
			if len(m.Shares) > 0 {
				f.Rect(x0+float64(i)*panelW-1, ry, 1, rowH, k.rule) // the zero line
			}
			if p >= len(m.Shares) || math.IsNaN(m.Shares[p]) {
				continue
			}
			v := m.Shares[p]
			px := x0 + float64(i)*panelW
			t := 0.0
			if maxes[i] > 0 {
				t = math.Max(0, math.Min(1, v/maxes[i]))
			}
			if bw := t * barW; bw >= 0.5 {
				f.Rect(px, ry+2, bw, rowH-4, k.st.Colormap.At(0.35+0.65*t))
			}
			pct := v
			if !m.Normalised {
				pct = math.NaN()
				if totals[i] > 0 {
					pct = v / totals[i]
				}
			}
			s := "–"
			if !math.IsNaN(pct) {
				s = strconv.FormatFloat(pct*100, 'f', 1, 64) + "%"
			}
			f.Text(s, px+barW+6, base, 0, Start, TextStyle{font, Regular, k.text})
		}
		p++
	}
	bottom := y + float64(row)*rowH
	f.H = int(math.Ceil(bottom + margin))
	return f, nil
}
