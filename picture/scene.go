// Package picture turns a views.Canvas (the cell grid every heed screen is
// drawn into) into a picture: PNG, SVG, or text with or without ANSI colour.
//
// A picture is the terminal screen drawn with the Go Mono font embedded in
// the binary (golang.org/x/image/font/gofont), so it comes out the same on
// every machine: each cell is CellW x CellH pixels, its background a
// rectangle, its glyph the font's outline. Block elements (U+2580-U+259F,
// the half blocks of the heat maps and the colour bar) are drawn as exact
// rectangles, as terminal emulators draw them, so that heat-map pixels tile
// without seams; so are the light box-drawing lines, so that they join. A glyph Go Mono lacks is drawn as an empty box.
//
// PNG and SVG are built from the same list of rectangles and glyphs, so the
// two formats show the same thing.
//
// A Figure (figure.go) is laid out in pixels instead: the plots of the Map,
// the Trace and the Survey (MapFigure, TraceFigure, SurveyFigure) drawn from
// the views' data, with text scaled and rotated as outlines. picture imports
// views and nothing above it.
package picture

import (
	"github.com/heed-dev/heed/views"
)

// Options are the choices of a picture beyond the canvas.
type Options struct {
	// Dark selects the page colours for cells in the terminal's default
	// colours (views.NoColour): the canvas should have been drawn with
	// views.NewStyles(..., dark, ...) to match.
	Dark bool
	// Title and Description go into the file's metadata (PNG tEXt "Title"
	// and "Description", SVG <title>; the SVG <desc> also holds the
	// screen's text).
	Title, Description string
	// Marker identifies the file as heed's (PNG tEXt "Software", SVG
	// comment); it defaults to MarkerPrefix.
	Marker string
}

// Page colours for the terminal's default foreground and background.
var (
	lightBG = views.RGB(0xff, 0xff, 0xff)
	lightFG = views.RGB(0x1a, 0x1a, 0x1a)
	darkBG  = views.RGB(0x1c, 0x1c, 0x1c)
	darkFG  = views.RGB(0xe4, 0xe4, 0xe4)
)

func (o Options) page() (fg, bg views.Colour) {
	if o.Dark {
		return darkFG, darkBG
	}
	return lightFG, lightBG
}

// rect is a filled rectangle in pixels.
type rect struct {
	x, y, w, h int
	c          views.Colour
}

// glyphOp is one glyph at a pen position (x, baseline y) in pixels.
type glyphOp struct {
	face  Face
	r     rune
	x, y  int
	cells int // 1, or 2 for a wide rune
	c     views.Colour
	found bool
}

// scene is a canvas as rectangles over a page colour, then glyphs.
type scene struct {
	w, h   int // pixels
	page   views.Colour
	rects  []rect
	glyphs []glyphOp
	// outlines used, for the SVG's <defs>
	g *glyphs
}

// resolve gives the colours a cell is drawn with and its face.
func resolve(st views.Style, defFG, defBG views.Colour) (fg, bg views.Colour, face Face) {
	fg, bg = st.FG, st.BG
	if !fg.IsSet() {
		fg = defFG
	}
	if !bg.IsSet() {
		bg = defBG
	}
	if st.Attr&views.Reverse != 0 {
		fg, bg = bg, fg
	}
	if st.Attr&views.Faint != 0 {
		fg = views.Blend(fg, bg, 0.45)
	}
	switch b, i := st.Attr&views.Bold != 0, st.Attr&views.Italic != 0; {
	case b && i:
		face = BoldItalic
	case b:
		face = Bold
	case i:
		face = Italic
	}
	return fg, bg, face
}

// frac converts eighths of a cell to pixels.
func frac(n, size int) int { return (n*size + 4) / 8 }

// blockParts describes a block element (U+2580-U+259F) as rectangles in
// eighths of a cell (x0, y0, x1, y1), or a shade level for ░▒▓.
func blockParts(r rune) (parts [][4]int, shade float64, ok bool) {
	switch {
	case r == 0x2580:
		return [][4]int{{0, 0, 8, 4}}, 0, true
	case r >= 0x2581 && r <= 0x2588: // lower n eighths, 0x2588 full block
		n := int(r - 0x2580)
		return [][4]int{{0, 8 - n, 8, 8}}, 0, true
	case r >= 0x2589 && r <= 0x258f: // left 7/8 .. 1/8
		n := 8 - int(r-0x2588)
		return [][4]int{{0, 0, n, 8}}, 0, true
	case r == 0x2590:
		return [][4]int{{4, 0, 8, 8}}, 0, true
	case r >= 0x2591 && r <= 0x2593:
		return nil, float64(r-0x2590) / 4, true
	case r == 0x2594:
		return [][4]int{{0, 0, 8, 1}}, 0, true
	case r == 0x2595:
		return [][4]int{{7, 0, 8, 8}}, 0, true
	case r >= 0x2596 && r <= 0x259f:
		// quadrants: upper left 1, upper right 2, lower left 4, lower right 8
		bits := [...]int{4, 8, 1, 1 | 4 | 8, 1 | 8, 1 | 2 | 4, 1 | 2 | 8, 2, 2 | 4, 2 | 4 | 8}[r-0x2596]
		q := [4][4]int{{0, 0, 4, 4}, {4, 0, 8, 4}, {0, 4, 4, 8}, {4, 4, 8, 8}}
		for i := 0; i < 4; i++ {
			if bits&(1<<i) != 0 {
				parts = append(parts, q[i])
			}
		}
		return parts, 0, true
	}
	return nil, 0, false
}

// boxArms describes the light box-drawing lines (U+2500-U+253C) as arms
// from the cell's centre: left, right, up, down. Drawn as rectangles they
// join across cells, which the font's glyphs (shorter than a cell) do not.
func boxArms(r rune) (arms [4]bool, ok bool) {
	const l, rt, u, d = 0, 1, 2, 3
	set := func(i ...int) [4]bool {
		var a [4]bool
		for _, k := range i {
			a[k] = true
		}
		return a
	}
	switch r {
	case 0x2500:
		return set(l, rt), true
	case 0x2502:
		return set(u, d), true
	case 0x250c:
		return set(rt, d), true
	case 0x2510:
		return set(l, d), true
	case 0x2514:
		return set(rt, u), true
	case 0x2518:
		return set(l, u), true
	case 0x251c:
		return set(u, d, rt), true
	case 0x2524:
		return set(u, d, l), true
	case 0x252c:
		return set(l, rt, d), true
	case 0x2534:
		return set(l, rt, u), true
	case 0x253c:
		return set(l, rt, u, d), true
	}
	return arms, false
}

// boxRects returns the rectangles of a light box-drawing cell at (px, py).
func boxRects(arms [4]bool, px, py int, c views.Colour) []rect {
	cx, cy := px+CellW/2, py+CellH/2
	var out []rect
	if arms[0] {
		out = append(out, rect{px, cy, cx - px + 1, 1, c})
	}
	if arms[1] {
		out = append(out, rect{cx, cy, px + CellW - cx, 1, c})
	}
	if arms[2] {
		out = append(out, rect{cx, py, 1, cy - py + 1, c})
	}
	if arms[3] {
		out = append(out, rect{cx, cy, 1, py + CellH - cy, c})
	}
	return out
}

// build lays out the canvas as a scene.
func build(c *views.Canvas, opt Options) (*scene, error) {
	g, err := newGlyphs()
	if err != nil {
		return nil, err
	}
	defFG, defBG := opt.page()
	s := &scene{w: 2*Pad + c.W*CellW, h: 2*Pad + c.H*CellH, page: defBG, g: g}
	// Each cell's background as two halves, so that the rows of half-block
	// heat maps merge into long rectangles.
	top := make([]views.Colour, c.W)
	bot := make([]views.Colour, c.W)
	var extra []rect
	for y := 0; y < c.H; y++ {
		py := Pad + y*CellH
		for x := 0; x < c.W; x++ {
			cell := c.At(x, y)
			fg, bg, face := resolve(cell.Style, defFG, defBG)
			top[x], bot[x] = bg, bg
			if cell.Ch == 0 { // right half of a wide rune: its background only
				continue
			}
			px := Pad + x*CellW
			cells := 1
			if x+1 < c.W && c.At(x+1, y).Ch == 0 {
				cells = 2
			}
			if parts, shade, ok := blockParts(cell.Ch); ok {
				switch {
				case shade > 0:
					top[x] = views.Blend(bg, fg, shade)
					bot[x] = top[x]
				case len(parts) == 1 && parts[0] == [4]int{0, 0, 8, 4}:
					top[x] = fg
				case len(parts) == 1 && parts[0] == [4]int{0, 4, 8, 8}:
					bot[x] = fg
				case len(parts) == 1 && parts[0] == [4]int{0, 0, 8, 8}:
					top[x], bot[x] = fg, fg
				default:
					for _, p := range parts {
						x0, y0, x1, y1 := frac(p[0], CellW), frac(p[1], CellH), frac(p[2], CellW), frac(p[3], CellH)
						extra = append(extra, rect{px + x0, py + y0, x1 - x0, y1 - y0, fg})
					}
				}
			} else if arms, ok := boxArms(cell.Ch); ok {
				extra = append(extra, boxRects(arms, px, py, fg)...)
			} else if cell.Ch != ' ' {
				o, err := g.get(face, cell.Ch)
				if err != nil {
					return nil, err
				}
				s.glyphs = append(s.glyphs, glyphOp{face: face, r: cell.Ch, x: px, y: py + Baseline, cells: cells, c: fg, found: o.found})
			}
			if cell.Style.Attr&views.Underline != 0 {
				extra = append(extra, rect{px, py + Baseline + 2, cells * CellW, 1, fg})
			}
		}
		s.rects = appendRuns(s.rects, top, bot, py, defBG)
	}
	s.rects = append(s.rects, extra...)
	return s, nil
}

// appendRuns adds the rectangles of one row of cells: runs of equal
// (top, bottom) colours, skipping the page colour.
func appendRuns(rs []rect, top, bot []views.Colour, py int, page views.Colour) []rect {
	half := CellH / 2
	n := len(top)
	for x := 0; x < n; {
		e := x + 1
		for e < n && top[e] == top[x] && bot[e] == bot[x] {
			e++
		}
		px, w := Pad+x*CellW, (e-x)*CellW
		if top[x] == bot[x] {
			if top[x] != page {
				rs = append(rs, rect{px, py, w, CellH, top[x]})
			}
		} else {
			if top[x] != page {
				rs = append(rs, rect{px, py, w, half, top[x]})
			}
			if bot[x] != page {
				rs = append(rs, rect{px, py + half, w, CellH - half, bot[x]})
			}
		}
		x = e
	}
	return rs
}
