package views

import (
	"fmt"
	"math"
	"sort"
	"strconv"
	"strings"
)

// TraceMethod is one explanation method's shares of the input tokens.
type TraceMethod struct {
	Name string
	// Shares per input position (NaN = not available).
	Shares []float64
	// Normalised says the shares sum to 1 (rollout on self-attention): they
	// are shown as percentages as they are. Otherwise (flow, gradient
	// relevance, rollout through cross-attention: values that can be tiny,
	// as the relevance from a dL/dA of a whole loss, or above 1) each is
	// shown as a percentage of the method's total, and the note line states
	// that total.
	Normalised bool
	// Note says what the shares mean or why they are missing.
	Note string
}

// shareSums returns the largest and the total of the shares that are not
// NaN, and how many there are.
func shareSums(s []float64) (top, total float64, n int) {
	for _, v := range s {
		if !math.IsNaN(v) {
			top = math.Max(top, v)
			total += v
			n++
		}
	}
	return top, total, n
}

// Seen reports whether the query may see key p (it has no status).
func (d *TraceData) Seen(p int) bool { return p >= len(d.Status) || d.Status[p] == "" }

// Leaks reports whether the first method gives key p a share (above 1e-6):
// at a key the query may not see, a leak.
func (d *TraceData) Leaks(p int) bool {
	return len(d.Methods) > 0 && p < len(d.Methods[0].Shares) && d.Methods[0].Shares[p] > 1e-6
}

// VisibleSums returns, per method, the largest share and the total of the
// shares of the keys the query may see: what bars are scaled to and
// percentages of unnormalised shares are of.
func (d *TraceData) VisibleSums() (maxes, totals []float64) {
	maxes, totals = make([]float64, len(d.Methods)), make([]float64, len(d.Methods))
	for i, m := range d.Methods {
		vis := make([]float64, len(m.Shares))
		for p, v := range m.Shares {
			vis[p] = v
			if !d.Seen(p) {
				vis[p] = math.NaN()
			}
		}
		maxes[i], totals[i], _ = shareSums(vis)
	}
	return maxes, totals
}

// note is the method's note line: its own note, then for unnormalised
// shares their total (the wording of heed trace's header).
func (m TraceMethod) note() string {
	n := m.Note
	_, total, count := shareSums(m.Shares)
	if m.Normalised || count == 0 {
		return n
	}
	s := "shares are not normalised: they sum to " + strconv.FormatFloat(total, 'g', 4, 64) + "; % is of that total"
	if n != "" {
		return n + "; " + s
	}
	return s
}

// TraceData is the explanation of one output position.
type TraceData struct {
	Block      string
	Query      int
	QueryToken string
	// Predicted says what the model predicted at the query, in words ("" =
	// unknown).
	Predicted string
	// Status per input position: "" when the query may see it, else why
	// not ("future", "padding", "other document"); drawn instead of a bar.
	Status []string
	// Summary is one sentence on the top sources.
	Summary string
	// Side names the input tokens ("target", or "source" through cross-attention).
	Side    string
	Tokens  []string
	Methods []TraceMethod
	Note    string
}

// TraceOptions is the Trace screen's state.
type TraceOptions struct {
	// Selected is the highlighted input position.
	Selected int
	// ByShare sorts by the first method's share instead of position.
	ByShare bool
}

// TraceLayout maps lines to input positions.
type TraceLayout struct {
	TableY int
	Order  []int // positions in display order (visible ones)
}

// PosAt maps a canvas line to an input position.
func (l TraceLayout) PosAt(y int) (int, bool) {
	i := y - l.TableY
	if i < 0 || i >= len(l.Order) {
		return 0, false
	}
	return l.Order[i], true
}

// TraceOrder returns the input positions in display order.
func TraceOrder(d *TraceData, byShare bool) []int {
	order := make([]int, len(d.Tokens))
	for i := range order {
		order[i] = i
	}
	if byShare && len(d.Methods) > 0 {
		s := d.Methods[0].Shares
		at := func(i int) float64 {
			if i < len(s) && !math.IsNaN(s[i]) {
				return s[i]
			}
			return math.Inf(-1)
		}
		sort.SliceStable(order, func(a, b int) bool { return at(order[a]) > at(order[b]) })
	}
	return order
}

// eighths are the bar glyphs: a bar's length carries its value in any colour profile.
var eighths = []rune{' ', '▏', '▎', '▍', '▌', '▋', '▊', '▉', '█'}

func drawBar(c *Canvas, x, y, w int, t float64, st Style) {
	if math.IsNaN(t) || w <= 0 {
		return
	}
	t = math.Max(0, math.Min(1, t))
	n := int(math.Round(t * float64(w) * 8))
	for i := 0; i < w; i++ {
		e := min(8, max(0, n-8*i))
		if e == 0 {
			break
		}
		c.Set(x+i, y, eighths[e], st)
	}
}

// Trace draws the input tokens as bars of their share, one column a method.
func Trace(d *TraceData, w, h int, opt TraceOptions, st Styles) (*Canvas, TraceLayout) {
	c := NewCanvas(w, h)
	var l TraceLayout
	x := c.Text(0, 0, fmt.Sprintf("Trace · %s · q %d", d.Block, d.Query), st.Title, -1)
	x += c.Text(x, 0, quoteTok(d.QueryToken), st.Text, 20)
	side := d.Side
	if side == "" {
		side = "input"
	}
	c.Text(x, 0, " · shares of the "+side+" tokens", st.Faint, -1)
	y := 1
	if d.Predicted != "" {
		c.Text(0, y, "predicted: "+d.Predicted, st.Accent, w)
		y++
	}
	if d.Summary != "" && y < h-3 {
		for _, ln := range wrap(d.Summary, w) {
			if y < h-4 {
				c.Text(0, y, ln, st.Text, w)
				y++
			}
		}
	}
	for _, m := range d.Methods {
		if n := m.note(); n != "" && y < h-3 {
			c.Text(0, y, m.Name+": "+n, st.Faint, w)
			y++
		}
	}
	if d.Note != "" && y < h-3 {
		c.Text(0, y, d.Note, st.Faint, w)
		y++
	}
	if len(d.Methods) == 0 || len(d.Tokens) == 0 {
		return c, l
	}
	// the selected token's shares as values, 4 significant digits (as heed
	// trace prints them): the percentages of a share far below its total,
	// as gradient relevance beside the identity term of R, read 0.0%
	if p := opt.Selected; p >= 0 && p < len(d.Tokens) {
		c.Text(0, y, shareValues(d, p), st.Faint, w)
	}
	y++
	posW := digits(len(d.Tokens) - 1)
	tokW := min(16, max(4, maxTokenWidth(d.Tokens, 16)+2))
	labelW := posW + 1 + tokW
	colW := (w - labelW - 1) / len(d.Methods)
	valW := 6
	barW := max(1, colW-valW-2)
	order := TraceOrder(d, opt.ByShare)
	c.Text(0, y, padLeft("#", posW)+" "+padRight("token", tokW), st.Faint, -1)
	// bars are scaled to each method's largest share among the keys the
	// query may see; percentages of unnormalised shares are of their total
	maxes, totals := d.VisibleSums()
	for i, m := range d.Methods {
		name := m.Name + " (bar: ÷ largest)"
		if StringWidth(name) > colW-1 {
			name = m.Name
		}
		c.Text(labelW+1+i*colW, y, Ellipsize(name, colW-1), st.Faint, -1)
	}
	if opt.ByShare {
		c.Text(max(0, w-18), y, "sorted by "+d.Methods[0].Name, st.Faint, -1)
	}
	y++
	l.TableY = y
	vis := max(0, h-y)
	sel := 0
	for i, p := range order {
		if p == opt.Selected {
			sel = i
		}
	}
	start := scrollStart(sel, len(order), vis)
	end := min(len(order), start+vis)
	l.Order = order[start:end]
	for i, p := range l.Order {
		yy := y + i
		style := st.Label
		if p == opt.Selected {
			style = st.LabelHi
		}
		c.Text(0, yy, padLeft(strconv.Itoa(p), posW)+" "+padRight(d.Tokens[p], tokW), style, labelW)
		if !d.Seen(p) {
			// a key the query may not see: what leaked there is not an
			// explanation, and 0 would read as "no influence"
			msg := d.Status[p] + ": not seen by this query"
			style := st.Faint
			if d.Leaks(p) {
				msg += fmt.Sprintf(" (yet %s %s reaches it: a leak)", d.Methods[0].Name, strconv.FormatFloat(d.Methods[0].Shares[p], 'g', 3, 64))
				style = st.Bad
			}
			c.Text(labelW+1, yy, msg, style, w-labelW-1)
			continue
		}
		for mi, m := range d.Methods {
			v := math.NaN()
			if p < len(m.Shares) {
				v = m.Shares[p]
			}
			bx := labelW + 1 + mi*colW
			t := 0.0
			if maxes[mi] > 0 {
				t = v / maxes[mi] // NaN stays NaN: no bar
			}
			barStyle := Style{FG: colourIf(st, st.Colormap.At(0.35+0.65*t))}
			if !st.HasColour() {
				barStyle = st.Text
			}
			drawBar(c, bx, yy, barW, t, barStyle)
			pct := v
			if !m.Normalised {
				pct = math.NaN()
				if totals[mi] > 0 {
					pct = v / totals[mi]
				}
			}
			c.Text(bx+barW+1, yy, padLeft(sharePct(pct), valW), st.Text, -1)
		}
	}
	return c, l
}

// shareValues is the readout of input position p: each method's share.
func shareValues(d *TraceData, p int) string {
	var b strings.Builder
	b.WriteString(strconv.Itoa(p) + quoteTok(d.Tokens[p]) + ":")
	for i, m := range d.Methods {
		v := "–"
		if p < len(m.Shares) && !math.IsNaN(m.Shares[p]) {
			v = strconv.FormatFloat(m.Shares[p], 'g', 4, 64)
		}
		if i > 0 {
			b.WriteString(" ·")
		}
		b.WriteString(" " + m.Name + " " + v)
	}
	return b.String()
}

// sharePct writes a fraction as a percentage with one decimal, "–" for NaN.
func sharePct(v float64) string {
	if math.IsNaN(v) {
		return "–"
	}
	return strconv.FormatFloat(v*100, 'f', 1, 64) + "%"
}
