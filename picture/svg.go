package picture

import (
	"bytes"
	"encoding/xml"
	"fmt"
	"strconv"
	"strings"

	"github.com/heed-dev/heed/views"
	"golang.org/x/image/font/sfnt"
)

// SVG draws the canvas as an SVG 1.1 document: a page rectangle, the cell
// backgrounds as rectangles (runs of equal colour merged), and each glyph as
// a <use> of its Go Mono outline defined once in <defs>, so the file needs
// no font on the viewer's machine. The <desc> holds the screen's text.
func SVG(c *views.Canvas, opt Options) ([]byte, error) {
	s, err := build(c, opt)
	if err != nil {
		return nil, err
	}
	var b bytes.Buffer
	svgHead(&b, s.w, s.h, opt, c.Plain())

	// Glyph outlines, once each.
	b.WriteString("<defs>\n")
	defined := map[glyphKey]bool{}
	for _, g := range s.glyphs {
		k := glyphKey{g.face, g.r}
		if !g.found || defined[k] {
			continue
		}
		defined[k] = true
		d := pathData(s.g.cache[k].segs)
		if d == "" {
			continue
		}
		fmt.Fprintf(&b, `<path id="%s" d="%s"/>`+"\n", glyphID(k), d)
	}
	b.WriteString("</defs>\n")

	fmt.Fprintf(&b, `<rect id="page" x="0" y="0" width="%d" height="%d" fill="%s"/>`+"\n", s.w, s.h, s.page.Hex())
	b.WriteString(`<g id="cells" shape-rendering="crispEdges">` + "\n")
	for _, r := range s.rects {
		fmt.Fprintf(&b, `<rect x="%d" y="%d" width="%d" height="%d" fill="%s"/>`+"\n", r.x, r.y, r.w, r.h, r.c.Hex())
	}
	b.WriteString("</g>\n")
	b.WriteString(`<g id="glyphs">` + "\n")
	for _, g := range s.glyphs {
		k := glyphKey{g.face, g.r}
		if !g.found {
			w := g.cells * CellW
			fmt.Fprintf(&b, `<rect class="missing-glyph" x="%s" y="%d" width="%d" height="%d" fill="none" stroke="%s" stroke-width="1"/>`+"\n",
				strconv.FormatFloat(float64(g.x)+1.5, 'f', -1, 64), g.y-Baseline+3, w-3, CellH-6, g.c.Hex())
			continue
		}
		if len(s.g.cache[k].segs) == 0 {
			continue
		}
		fmt.Fprintf(&b, `<use xlink:href="#%s" x="%d" y="%d" fill="%s"/>`+"\n", glyphID(k), g.x, g.y, g.c.Hex())
	}
	b.WriteString("</g>\n</svg>\n")
	return b.Bytes(), nil
}

func glyphID(k glyphKey) string { return fmt.Sprintf("g%s%x", faceNames[k.face], k.r) }

func xmlText(b *bytes.Buffer, s string) {
	// EscapeText also escapes newlines as &#xA;, which keeps them.
	_ = xml.EscapeText(b, []byte(s))
}

func num(v float32) string { return strconv.FormatFloat(float64(v), 'f', -1, 32) }

// pathData writes glyph segments as SVG path data, relative to the pen.
func pathData(segs sfnt.Segments) string {
	var b strings.Builder
	for _, sg := range segs {
		a := sg.Args
		switch sg.Op {
		case sfnt.SegmentOpMoveTo:
			if b.Len() > 0 {
				b.WriteString("Z")
			}
			fmt.Fprintf(&b, "M%s %s", num(fx(a[0].X)), num(fx(a[0].Y)))
		case sfnt.SegmentOpLineTo:
			fmt.Fprintf(&b, "L%s %s", num(fx(a[0].X)), num(fx(a[0].Y)))
		case sfnt.SegmentOpQuadTo:
			fmt.Fprintf(&b, "Q%s %s %s %s", num(fx(a[0].X)), num(fx(a[0].Y)), num(fx(a[1].X)), num(fx(a[1].Y)))
		case sfnt.SegmentOpCubeTo:
			fmt.Fprintf(&b, "C%s %s %s %s %s %s", num(fx(a[0].X)), num(fx(a[0].Y)), num(fx(a[1].X)), num(fx(a[1].Y)), num(fx(a[2].X)), num(fx(a[2].Y)))
		}
	}
	if b.Len() > 0 {
		b.WriteString("Z")
	}
	return b.String()
}

// svgHead writes what every SVG of heed starts with: the XML declaration,
// the render marker, the <svg> element of w x h, the title and a <desc>
// holding the description and the picture's text.
func svgHead(b *bytes.Buffer, w, h int, opt Options, text string) {
	marker := opt.marker()
	b.WriteString(`<?xml version="1.0" encoding="UTF-8"?>` + "\n")
	// XML comments may not contain "--".
	fmt.Fprintf(b, "<!-- %s -->\n", strings.ReplaceAll(marker, "--", "- -"))
	fmt.Fprintf(b, `<svg xmlns="http://www.w3.org/2000/svg" xmlns:xlink="http://www.w3.org/1999/xlink" version="1.1" width="%d" height="%d" viewBox="0 0 %d %d">`+"\n",
		w, h, w, h)
	title := opt.Title
	if title == "" {
		title = "heed"
	}
	b.WriteString("<title>")
	xmlText(b, title)
	b.WriteString("</title>\n<desc>")
	if opt.Description != "" {
		xmlText(b, opt.Description)
		b.WriteString("\n\n")
	}
	xmlText(b, text)
	b.WriteString("</desc>\n")
}
