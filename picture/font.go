package picture

import (
	"fmt"
	"sync"

	"golang.org/x/image/font/gofont/gomono"
	"golang.org/x/image/font/gofont/gomonobold"
	"golang.org/x/image/font/gofont/gomonobolditalic"
	"golang.org/x/image/font/gofont/gomonoitalic"
	"golang.org/x/image/font/sfnt"
	"golang.org/x/image/math/fixed"
)

// Geometry of one terminal cell in a picture, in pixels. Go Mono at 15 px
// advances exactly 9 px (1229/2048 em), and a 2:1 cell makes the half-block
// pixels of the heat maps square.
const (
	CellW    = 9
	CellH    = 18
	FontSize = 15
	// Baseline is the baseline's distance from the top of a cell: Go Mono's
	// ascent at 15 px is 14.17 px.
	Baseline = 14
	// Pad is the margin around the grid.
	Pad = 8
)

// Face selects one of the four Go Mono faces.
type Face uint8

// The faces of Go Mono embedded in the binary (golang.org/x/image/font/gofont).
const (
	Regular Face = iota
	Bold
	Italic
	BoldItalic
)

var faceNames = [...]string{"r", "b", "i", "bi"}

// fonts parses the embedded Go Mono faces once; they are read-only after.
var fonts = sync.OnceValues(func() ([4]*sfnt.Font, error) {
	var out [4]*sfnt.Font
	for i, ttf := range [][]byte{gomono.TTF, gomonobold.TTF, gomonoitalic.TTF, gomonobolditalic.TTF} {
		f, err := sfnt.Parse(ttf)
		if err != nil {
			return out, fmt.Errorf("picture: parse embedded Go Mono: %w", err)
		}
		out[i] = f
	}
	return out, nil
})

// outline is a glyph as path segments in pixels relative to the pen
// position on the baseline, y down.
type outline struct {
	segs  sfnt.Segments
	found bool
}

// glyphs loads outlines, caching them per face and rune. Not safe for
// concurrent use: each picture builds its own.
type glyphs struct {
	fonts [4]*sfnt.Font
	buf   sfnt.Buffer
	cache map[glyphKey]outline
}

type glyphKey struct {
	face Face
	r    rune
}

func newGlyphs() (*glyphs, error) {
	f, err := fonts()
	if err != nil {
		return nil, err
	}
	return &glyphs{fonts: f, cache: map[glyphKey]outline{}}, nil
}

// get returns the outline of r in face; found is false when Go Mono has no
// glyph for r (the caller draws a box instead).
func (g *glyphs) get(face Face, r rune) (outline, error) {
	k := glyphKey{face, r}
	if o, ok := g.cache[k]; ok {
		return o, nil
	}
	f := g.fonts[face]
	idx, err := f.GlyphIndex(&g.buf, r)
	if err != nil {
		return outline{}, fmt.Errorf("picture: glyph %U: %w", r, err)
	}
	var o outline
	if idx != 0 {
		segs, err := f.LoadGlyph(&g.buf, idx, fixed.I(FontSize), nil)
		if err != nil {
			return outline{}, fmt.Errorf("picture: glyph %U: %w", r, err)
		}
		// LoadGlyph's segments live in buf until the next call: copy.
		o = outline{segs: append(sfnt.Segments(nil), segs...), found: true}
	}
	g.cache[k] = o
	return o, nil
}

func fx(v fixed.Int26_6) float32 { return float32(v) / 64 }
