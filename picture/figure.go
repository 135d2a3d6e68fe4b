package picture

import (
	"bytes"
	"fmt"
	"image"
	"image/draw"
	"math"
	"strconv"
	"strings"

	"github.com/heed-dev/heed/views"
	"golang.org/x/image/font/sfnt"
	"golang.org/x/image/vector"
)

// A Figure is a picture laid out in pixels rather than in terminal cells:
// rectangles and text at any size and angle, for the plots of the Map, the
// Trace, the Survey and Compare (MapFigure, TraceFigure, SurveyFigure).
// Text is drawn with the Go Mono outlines the package embeds, scaled and
// rotated as paths, so a PNG and an SVG of a figure show the same thing and
// neither needs a font on the viewer's machine.
type Figure struct {
	W, H  int
	Page  views.Colour
	items []figItem
	// lines of text in drawing order, for the SVG's <desc>
	text []string
}

// Anchor is where a text's pen position sits along the text.
type Anchor uint8

// Anchors of a text run: its start, its middle or its end at (x, y).
const (
	Start Anchor = iota
	Middle
	End
)

type figItem struct {
	// a rectangle (text == "") or a text run
	x, y, w, h float64
	c          views.Colour
	outline    bool // a 1 px frame instead of a fill
	text       string
	size       float64 // pixels per em
	angle      float64 // degrees, counter-clockwise as seen
	anchor     Anchor
	face       Face
}

// Advance is the width of one column of Go Mono text at size px per em
// (1229/2048 em, its one advance).
func Advance(size float64) float64 { return size * 1229 / 2048 }

// TextWidth is the width of s at size px: Go Mono is monospaced, a wide
// rune takes two columns.
func TextWidth(s string, size float64) float64 {
	return float64(views.StringWidth(s)) * Advance(size)
}

// NewFigure returns an empty w x h figure on the page colour of opt.
func NewFigure(w, h int, dark bool) *Figure {
	_, bg := Options{Dark: dark}.page()
	return &Figure{W: w, H: h, Page: bg}
}

// Rect fills a rectangle.
func (f *Figure) Rect(x, y, w, h float64, c views.Colour) {
	if w > 0 && h > 0 {
		f.items = append(f.items, figItem{x: x, y: y, w: w, h: h, c: c})
	}
}

// Frame draws the 1 px outline of a rectangle, inside it.
func (f *Figure) Frame(x, y, w, h float64, c views.Colour) {
	if w > 0 && h > 0 {
		f.items = append(f.items, figItem{x: x, y: y, w: w, h: h, c: c, outline: true})
	}
}

// TextStyle is how a text run is set: its size in pixels per em, its face
// and its colour.
type TextStyle struct {
	Size   float64
	Face   Face
	Colour views.Colour
}

// Text writes s with its baseline through (x, y), turned by angle degrees
// counter-clockwise about that point (90 reads upwards), anchored there by
// its start, middle or end, set in ts.
func (f *Figure) Text(s string, x, y, angle float64, anchor Anchor, ts TextStyle) {
	s = printable(s)
	if strings.TrimSpace(s) == "" {
		return
	}
	f.items = append(f.items, figItem{x: x, y: y, text: s, size: ts.Size, angle: angle, anchor: anchor, face: ts.Face, c: ts.Colour})
	f.text = append(f.text, s)
}

// printable replaces control runes (a token may hold any) with their
// visible stand-ins, as the views do.
func printable(s string) string {
	var b strings.Builder
	for _, r := range s {
		b.WriteRune(views.Printable(r))
	}
	return b.String()
}

// PlainText is the figure's text, one run a line, in drawing order.
func (f *Figure) PlainText() string { return strings.Join(f.text, "\n") }

// glyphPlace is one glyph of a text run: its outline and where its pen
// goes in the run's own units (pixels of FontSize, before scaling).
type glyphPlace struct {
	k     glyphKey
	pen   float64
	cells int
	found bool
}

// layout places the glyphs of a text run and returns the run's width in
// FontSize pixels.
func (g *glyphs) layout(it figItem) ([]glyphPlace, float64, error) {
	var out []glyphPlace
	pen := 0.0
	for _, r := range it.text {
		cells := views.StringWidth(string(r))
		if cells == 0 {
			continue
		}
		o, err := g.get(it.face, r)
		if err != nil {
			return nil, 0, err
		}
		out = append(out, glyphPlace{k: glyphKey{it.face, r}, pen: pen, cells: cells, found: o.found})
		pen += float64(cells * CellW)
	}
	return out, pen, nil
}

// transform is the affine map from a run's units to the figure: scale,
// shift by the anchor, rotate, translate.
type transform struct{ a, b, c, d, e, f float64 }

func (t transform) apply(x, y float64) (float64, float64) {
	return t.a*x + t.c*y + t.e, t.b*x + t.d*y + t.f
}

func runTransform(it figItem, width float64) transform {
	s := it.size / FontSize
	shift := 0.0
	switch it.anchor {
	case Middle:
		shift = -width / 2
	case End:
		shift = -width
	}
	th := -it.angle * math.Pi / 180 // y points down: counter-clockwise as seen is negative
	cos, sin := math.Cos(th), math.Sin(th)
	// x' = R (s (x + shift), s y) + (X, Y)
	return transform{a: s * cos, b: s * sin, c: -s * sin, d: s * cos,
		e: it.x + s*shift*cos, f: it.y + s*shift*sin}
}

// Image rasterises the figure with x/image/vector (pure Go: the same pixels
// on every machine).
func (f *Figure) Image() (*image.RGBA, error) {
	g, err := newGlyphs()
	if err != nil {
		return nil, err
	}
	img := image.NewRGBA(image.Rect(0, 0, f.W, f.H))
	draw.Draw(img, img.Bounds(), image.NewUniform(rgba(f.Page)), image.Point{}, draw.Src)
	px := func(v float64) int { return int(math.Round(v)) }
	for _, it := range f.items {
		if it.text == "" {
			x0, y0, x1, y1 := px(it.x), px(it.y), px(it.x+it.w), px(it.y+it.h)
			src := image.NewUniform(rgba(it.c))
			if !it.outline {
				draw.Draw(img, image.Rect(x0, y0, x1, y1), src, image.Point{}, draw.Src)
				continue
			}
			for _, r := range []image.Rectangle{image.Rect(x0, y0, x1, y0+1), image.Rect(x0, y1-1, x1, y1),
				image.Rect(x0, y0, x0+1, y1), image.Rect(x1-1, y0, x1, y1)} {
				draw.Draw(img, r, src, image.Point{}, draw.Src)
			}
			continue
		}
		if err := f.rasterText(img, g, it); err != nil {
			return nil, err
		}
	}
	return img, nil
}

// rasterText draws one text run: every glyph's outline, transformed, into
// one rasteriser over the run's bounding box.
func (f *Figure) rasterText(img *image.RGBA, g *glyphs, it figItem) error {
	places, width, err := g.layout(it)
	if err != nil {
		return err
	}
	t := runTransform(it, width)
	// the run's box in run units: the pen line from the ascent to the descent
	minX, minY, maxX, maxY := math.Inf(1), math.Inf(1), math.Inf(-1), math.Inf(-1)
	for _, p := range [][2]float64{{-2, -FontSize}, {width + 2, -FontSize}, {-2, 6}, {width + 2, 6}} {
		x, y := t.apply(p[0], p[1])
		minX, minY, maxX, maxY = math.Min(minX, x), math.Min(minY, y), math.Max(maxX, x), math.Max(maxY, y)
	}
	x0, y0 := int(math.Floor(minX)), int(math.Floor(minY))
	x1, y1 := int(math.Ceil(maxX)), int(math.Ceil(maxY))
	box := image.Rect(x0, y0, x1, y1).Intersect(img.Bounds())
	if box.Empty() {
		return nil
	}
	z := vector.NewRasterizer(x1-x0, y1-y0)
	pt := func(x, y float64) (float32, float32) {
		X, Y := t.apply(x, y)
		return float32(X - float64(x0)), float32(Y - float64(y0))
	}
	for _, p := range places {
		if !p.found {
			// a rune Go Mono lacks: an empty box, as on the terminal pictures
			w := float64(p.cells*CellW) - 3
			rectPath(z, pt, p.pen+1.5, -Baseline+3, w, CellH-6, 1)
			continue
		}
		open := false
		for _, sg := range g.cache[p.k].segs {
			a := sg.Args
			q := func(i int) (float32, float32) { return pt(p.pen+float64(fx(a[i].X)), float64(fx(a[i].Y))) }
			switch sg.Op {
			case sfnt.SegmentOpMoveTo:
				if open {
					z.ClosePath()
				}
				z.MoveTo(q(0))
				open = true
			case sfnt.SegmentOpLineTo:
				z.LineTo(q(0))
			case sfnt.SegmentOpQuadTo:
				ax, ay := q(0)
				bx, by := q(1)
				z.QuadTo(ax, ay, bx, by)
			case sfnt.SegmentOpCubeTo:
				ax, ay := q(0)
				bx, by := q(1)
				cx, cy := q(2)
				z.CubeTo(ax, ay, bx, by, cx, cy)
			}
		}
		if open {
			z.ClosePath()
		}
	}
	mask := image.NewAlpha(image.Rect(0, 0, x1-x0, y1-y0))
	z.Draw(mask, mask.Bounds(), image.Opaque, image.Point{})
	draw.DrawMask(img, box, image.NewUniform(rgba(it.c)), image.Point{}, mask, box.Min.Sub(image.Pt(x0, y0)), draw.Over)
	return nil
}

// rectPath adds the outline of a rectangle, lw wide, as two nested
// contours of opposite direction (the non-zero rule leaves the inside
// empty).
func rectPath(z *vector.Rasterizer, pt func(x, y float64) (float32, float32), x, y, w, h, lw float64) {
	poly := func(ps ...[2]float64) {
		z.MoveTo(pt(ps[0][0], ps[0][1]))
		for _, p := range ps[1:] {
			z.LineTo(pt(p[0], p[1]))
		}
		z.ClosePath()
	}
	poly([2]float64{x, y}, [2]float64{x + w, y}, [2]float64{x + w, y + h}, [2]float64{x, y + h})
	poly([2]float64{x + lw, y + lw}, [2]float64{x + lw, y + h - lw}, [2]float64{x + w - lw, y + h - lw}, [2]float64{x + w - lw, y + lw})
}

// PNG encodes the figure as PNG with the tEXt chunks of Options (as PNG
// does for a canvas).
func (f *Figure) PNG(opt Options) ([]byte, error) {
	img, err := f.Image()
	if err != nil {
		return nil, err
	}
	return encodePNG(img, opt)
}

func fnum(v float64) string { return strconv.FormatFloat(v, 'f', -1, 64) }

// fnum2 rounds to 1/100 px: enough for any screen, and stable text.
func fnum2(v float64) string { return fnum(math.Round(v*100) / 100) }

// SVG writes the figure as an SVG 1.1 document: rectangles, and each text
// run as a group (aria-label: its text) of <use>s of glyph outlines
// defined once, under one transform that scales, rotates and places it.
func (f *Figure) SVG(opt Options) ([]byte, error) {
	g, err := newGlyphs()
	if err != nil {
		return nil, err
	}
	type run struct {
		it     figItem
		places []glyphPlace
		width  float64
	}
	runs := make([]run, 0, len(f.items))
	for _, it := range f.items {
		r := run{it: it}
		if it.text != "" {
			if r.places, r.width, err = g.layout(it); err != nil {
				return nil, err
			}
		}
		runs = append(runs, r)
	}
	var b bytes.Buffer
	svgHead(&b, f.W, f.H, opt, f.PlainText())
	b.WriteString("<defs>\n")
	defined := map[glyphKey]bool{}
	for _, r := range runs {
		for _, p := range r.places {
			if !p.found || defined[p.k] {
				continue
			}
			defined[p.k] = true
			if d := pathData(g.cache[p.k].segs); d != "" {
				fmt.Fprintf(&b, `<path id="%s" d="%s"/>`+"\n", glyphID(p.k), d)
			}
		}
	}
	b.WriteString("</defs>\n")
	fmt.Fprintf(&b, `<rect id="page" x="0" y="0" width="%d" height="%d" fill="%s"/>`+"\n", f.W, f.H, f.Page.Hex())
	for _, r := range runs {
		it := r.it
		if it.text == "" {
			if it.outline {
				fmt.Fprintf(&b, `<rect x="%s" y="%s" width="%s" height="%s" fill="none" stroke="%s" stroke-width="1" shape-rendering="crispEdges"/>`+"\n",
					fnum2(it.x+0.5), fnum2(it.y+0.5), fnum2(it.w-1), fnum2(it.h-1), it.c.Hex())
				continue
			}
			fmt.Fprintf(&b, `<rect x="%s" y="%s" width="%s" height="%s" fill="%s" shape-rendering="crispEdges"/>`+"\n",
				fnum2(it.x), fnum2(it.y), fnum2(it.w), fnum2(it.h), it.c.Hex())
			continue
		}
		shift := 0.0
		switch it.anchor {
		case Middle:
			shift = -r.width / 2
		case End:
			shift = -r.width
		}
		tf := "translate(" + fnum2(it.x) + " " + fnum2(it.y) + ")"
		if it.angle != 0 {
			tf += " rotate(" + fnum2(-it.angle) + ")"
		}
		if s := it.size / FontSize; s != 1 {
			tf += " scale(" + strconv.FormatFloat(s, 'f', 4, 64) + ")"
		}
		if shift != 0 {
			tf += " translate(" + fnum2(shift) + " 0)"
		}
		b.WriteString(`<g class="text" aria-label="`)
		xmlText(&b, it.text)
		fmt.Fprintf(&b, `" transform="%s" fill="%s">`, tf, it.c.Hex())
		for _, p := range r.places {
			if !p.found {
				fmt.Fprintf(&b, `<rect class="missing-glyph" x="%s" y="%d" width="%d" height="%d" fill="none" stroke="%s" stroke-width="1"/>`,
					fnum2(p.pen+1.5), -Baseline+3, p.cells*CellW-3, CellH-6, it.c.Hex())
				continue
			}
			if len(g.cache[p.k].segs) == 0 {
				continue
			}
			fmt.Fprintf(&b, `<use xlink:href="#%s" x="%s"/>`, glyphID(p.k), fnum2(p.pen))
		}
		b.WriteString("</g>\n")
	}
	b.WriteString("</svg>\n")
	return b.Bytes(), nil
}

// EncodeFigure produces the bytes of a figure as PNG or SVG.
func EncodeFigure(f *Figure, format Format, opt Options) ([]byte, error) {
	switch format {
	case FormatPNG:
		return f.PNG(opt)
	case FormatSVG:
		return f.SVG(opt)
	}
	return nil, fmt.Errorf("picture: a figure is PNG or SVG, not %q", format)
}
