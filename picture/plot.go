package picture

import (
	"math"
	"strconv"
	"strings"

	"github.com/heed-dev/heed/views"
)

// Sizes of the figures, in pixels.
const (
	// MaxFigureWidth is the widest a figure gets: it fits a slide or a
	// page at full resolution.
	MaxFigureWidth = 1600
	margin         = 24
	titleSize      = 18
	lineSize       = 13
	smallSize      = 12
)

// MaxLabelled is the most positions a Map or Trace figure shows with a
// label each; beyond it the caller pages (a window of positions).
const MaxLabelled = 256

// ink holds the colours a figure draws with, from the views' styles.
type ink struct {
	st                        views.Styles
	text, faint, title, label views.Colour
	bad, accent, rule         views.Colour
	page                      views.Colour
}

func newInk(st views.Styles) ink {
	fg, bg := Options{Dark: st.Dark}.page()
	or := func(c, d views.Colour) views.Colour {
		if c.IsSet() {
			return c
		}
		return d
	}
	k := ink{st: st, text: fg, page: bg, faint: or(st.Faint.FG, fg), title: or(st.Title.FG, fg),
		label: or(st.Label.FG, fg), bad: or(st.Bad.FG, fg), accent: or(st.Accent.FG, fg)}
	k.rule = views.Blend(bg, fg, 0.3)
	return k
}

// header draws the title (the location, bold) and the lines under it from
// the top of f, wrapped to width w; it returns the y below them.
func header(f *Figure, k ink, title string, lines []string, note string, w float64) float64 {
	y := float64(margin) + titleSize
	for _, ln := range wrapText(title, w, titleSize) {
		f.Text(ln, margin, y, 0, Start, TextStyle{titleSize, Bold, k.title})
		y += titleSize + 6
	}
	for _, l := range lines {
		for _, ln := range wrapText(l, w, lineSize) {
			f.Text(ln, margin, y, 0, Start, TextStyle{lineSize, Regular, k.text})
			y += lineSize + 6
		}
	}
	if note != "" {
		for _, ln := range wrapText(note, w, lineSize) {
			f.Text(ln, margin, y, 0, Start, TextStyle{lineSize, Bold, k.accent})
			y += lineSize + 6
		}
	}
	return y
}

// wrapText breaks s into lines of at most w pixels at size, between words.
func wrapText(s string, w, size float64) []string {
	cols := max(8, int(w/Advance(size)))
	var out []string
	for _, para := range strings.Split(s, "\n") {
		line := ""
		for _, word := range strings.Fields(para) {
			switch {
			case line == "":
				line = word
			case views.StringWidth(line)+1+views.StringWidth(word) <= cols:
				line += " " + word
			default:
				out = append(out, line)
				line = word
			}
			for views.StringWidth(line) > cols { // a word longer than a line
				r := []rune(line)
				out = append(out, string(r[:cols]))
				line = string(r[cols:])
			}
		}
		if line != "" {
			out = append(out, line)
		}
	}
	return out
}

// label is a position's label: its token (cut to 14 columns) and its
// index, the index nearest the plot.
func label(toks []string, i int) string {
	idx := strconv.Itoa(i)
	if i < 0 || i >= len(toks) || toks[i] == "" {
		return idx
	}
	return views.Ellipsize(toks[i], 14) + " " + idx
}

// barScale is what a colour bar says: the name of what the colour means,
// the values at its low and high ends, and whether it runs over the
// logarithm (then, with hi > 0, its ticks are views.LogDecades below hi).
type barScale struct {
	name     string
	lo, hi   float64
	logScale bool
}

// colourBar draws a vertical colour bar of the colormap at (x, y), w x h,
// high values on top, with ticks at sc's low end, middle and high end, and
// sc's name beside it, turned to read upwards. It returns the x right of
// it.
func colourBar(f *Figure, k ink, x, y, w, h float64, sc barScale) float64 {
	name, lo, hi, logScale := sc.name, sc.lo, sc.hi, sc.logScale
	steps := int(h)
	for i := 0; i < steps; i++ {
		t := 1 - (float64(i)+0.5)/float64(steps)
		f.Rect(x, y+float64(i), w, 1, k.st.Colormap.At(t))
	}
	f.Frame(x, y, w, h, k.rule)
	ticks := []float64{hi, (lo + hi) / 2, lo}
	if logScale && hi > 0 {
		ticks = []float64{hi, hi * math.Pow(10, -views.LogDecades/2.0), hi * math.Pow(10, -views.LogDecades)}
	}
	tw := 0.0
	for i, v := range ticks {
		ty := y + h*float64(i)/2
		f.Rect(x+w, ty-0.5, 4, 1, k.faint)
		s := views.FormatValue(v)
		f.Text(s, x+w+7, ty+0.35*smallSize, 0, Start, TextStyle{smallSize, Regular, k.text})
		tw = math.Max(tw, TextWidth(s, smallSize))
	}
	nx := x + w + 7 + tw + 8 + lineSize
	f.Text(name, nx-0.3*lineSize, y+h/2, 90, Middle, TextStyle{lineSize, Regular, k.text})
	return nx + 4
}

// swatch is one entry of a legend: a filled square (or a framed one for
// "nothing drawn") and what it means.
type swatch struct {
	c      views.Colour
	framed bool
	text   string
}

// legend draws swatches in a row from (x, y), wrapping at width w; it
// returns the y below it.
func legend(f *Figure, k ink, x, y, w float64, sw []swatch) float64 {
	x0 := x
	for _, s := range sw {
		need := 14 + 6 + TextWidth(s.text, smallSize) + 18
		if x > x0 && x+need > x0+w {
			x, y = x0, y+22
		}
		if s.framed {
			f.Frame(x, y-11, 13, 13, k.faint)
		} else {
			f.Rect(x, y-11, 13, 13, s.c)
		}
		f.Text(s.text, x+19, y, 0, Start, TextStyle{smallSize, Regular, k.text})
		x += need
	}
	return y + 10
}
