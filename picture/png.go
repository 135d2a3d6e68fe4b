package picture

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"image"
	"image/color"
	"image/draw"
	"image/png"
	"math"

	"github.com/heed-dev/heed/views"
	"golang.org/x/image/font/sfnt"
	"golang.org/x/image/vector"
)

func rgba(c views.Colour) color.RGBA {
	r, g, b := c.Channels()
	return color.RGBA{R: r, G: g, B: b, A: 255}
}

// Image draws the canvas as an RGBA image of (2*Pad + W*CellW) x
// (2*Pad + H*CellH) pixels.
func Image(c *views.Canvas, opt Options) (*image.RGBA, error) {
	s, err := build(c, opt)
	if err != nil {
		return nil, err
	}
	return s.raster(), nil
}

type maskKey struct {
	face  Face
	r     rune
	cells int
}

type mask struct {
	a   *image.Alpha
	off image.Point // top-left of the mask relative to the pen position
}

func (s *scene) raster() *image.RGBA {
	img := image.NewRGBA(image.Rect(0, 0, s.w, s.h))
	draw.Draw(img, img.Bounds(), image.NewUniform(rgba(s.page)), image.Point{}, draw.Src)
	for _, r := range s.rects {
		draw.Draw(img, image.Rect(r.x, r.y, r.x+r.w, r.y+r.h), image.NewUniform(rgba(r.c)), image.Point{}, draw.Src)
	}
	masks := map[maskKey]mask{}
	for _, g := range s.glyphs {
		k := maskKey{g.face, g.r, g.cells}
		m, ok := masks[k]
		if !ok {
			m = s.mask(g)
			masks[k] = m
		}
		if m.a == nil {
			continue
		}
		b := m.a.Bounds().Add(image.Pt(g.x, g.y).Add(m.off))
		draw.DrawMask(img, b, image.NewUniform(rgba(g.c)), image.Point{}, m.a, image.Point{}, draw.Over)
	}
	return img
}

// mask rasterises one glyph with x/image/vector (pure Go, so the same on
// every machine) or, for a glyph the font lacks, an empty box.
func (s *scene) mask(g glyphOp) mask {
	if !g.found {
		w := g.cells * CellW
		a := image.NewAlpha(image.Rect(0, 0, w, CellH))
		x0, y0, x1, y1 := 1, 3, w-2, CellH-3
		for x := x0; x <= x1; x++ {
			a.SetAlpha(x, y0, color.Alpha{A: 255})
			a.SetAlpha(x, y1, color.Alpha{A: 255})
		}
		for y := y0; y <= y1; y++ {
			a.SetAlpha(x0, y, color.Alpha{A: 255})
			a.SetAlpha(x1, y, color.Alpha{A: 255})
		}
		return mask{a: a, off: image.Pt(0, -Baseline)}
	}
	o := s.g.cache[glyphKey{g.face, g.r}]
	if len(o.segs) == 0 {
		return mask{}
	}
	bb := o.segs.Bounds()
	x0, y0 := int(math.Floor(float64(fx(bb.Min.X)))), int(math.Floor(float64(fx(bb.Min.Y))))
	x1, y1 := int(math.Ceil(float64(fx(bb.Max.X)))), int(math.Ceil(float64(fx(bb.Max.Y))))
	if x1 <= x0 || y1 <= y0 {
		return mask{}
	}
	z := vector.NewRasterizer(x1-x0, y1-y0)
	dx, dy := float32(-x0), float32(-y0)
	for _, sg := range o.segs {
		a := sg.Args
		switch sg.Op {
		case sfnt.SegmentOpMoveTo:
			z.MoveTo(fx(a[0].X)+dx, fx(a[0].Y)+dy)
		case sfnt.SegmentOpLineTo:
			z.LineTo(fx(a[0].X)+dx, fx(a[0].Y)+dy)
		case sfnt.SegmentOpQuadTo:
			z.QuadTo(fx(a[0].X)+dx, fx(a[0].Y)+dy, fx(a[1].X)+dx, fx(a[1].Y)+dy)
		case sfnt.SegmentOpCubeTo:
			z.CubeTo(fx(a[0].X)+dx, fx(a[0].Y)+dy, fx(a[1].X)+dx, fx(a[1].Y)+dy, fx(a[2].X)+dx, fx(a[2].Y)+dy)
		}
	}
	z.ClosePath()
	a := image.NewAlpha(image.Rect(0, 0, x1-x0, y1-y0))
	z.Draw(a, a.Bounds(), image.Opaque, image.Point{})
	return mask{a: a, off: image.Pt(x0, y0)}
}

// PNG draws the canvas and encodes it as PNG with tEXt chunks: "Software"
// (the marker that tells a previous heed render), "Title" and
// "Description" (keywords from the PNG specification, section 11.3.4.2).
func PNG(c *views.Canvas, opt Options) ([]byte, error) {
	img, err := Image(c, opt)
	if err != nil {
		return nil, err
	}
	return encodePNG(img, opt)
}

// encodePNG encodes img with the tEXt chunks of opt (PNG, Figure.PNG).
func encodePNG(img image.Image, opt Options) ([]byte, error) {
	var buf bytes.Buffer
	if err := (&png.Encoder{CompressionLevel: png.BestCompression}).Encode(&buf, img); err != nil {
		return nil, fmt.Errorf("picture: encode png: %w", err)
	}
	chunks := [][2]string{{"Software", opt.marker()}}
	if opt.Title != "" {
		chunks = append(chunks, [2]string{"Title", opt.Title})
	}
	if opt.Description != "" {
		chunks = append(chunks, [2]string{"Description", opt.Description})
	}
	return insertText(buf.Bytes(), chunks)
}

// marker is the render marker the files carry (MarkerPrefix by default).
func (o Options) marker() string {
	if o.Marker == "" {
		return MarkerPrefix
	}
	return o.Marker
}

var pngSig = []byte("\x89PNG\r\n\x1a\n")

// latin1 maps s to ISO 8859-1, as tEXt requires; other runes become '?'.
func latin1(s string) []byte {
	out := make([]byte, 0, len(s))
	for _, r := range s {
		switch {
		case r == '\n' || (r >= 0x20 && r <= 0x7e) || (r >= 0xa0 && r <= 0xff):
			out = append(out, byte(r))
		default:
			out = append(out, '?')
		}
	}
	return out
}

// insertText puts tEXt chunks right after IHDR (PNG specification, 5.3
// chunk layout: length, type, data, CRC-32 over type and data).
func insertText(p []byte, kv [][2]string) ([]byte, error) {
	if !bytes.HasPrefix(p, pngSig) || len(p) < 8+8+13+4 || string(p[12:16]) != "IHDR" {
		return nil, errors.New("picture: not a PNG with IHDR first")
	}
	ihdrEnd := 8 + 8 + int(binary.BigEndian.Uint32(p[8:12])) + 4
	var out bytes.Buffer
	out.Write(p[:ihdrEnd])
	for _, e := range kv {
		data := append(latin1(e[0]), 0)
		data = append(data, latin1(e[1])...)
		var hdr [8]byte
		binary.BigEndian.PutUint32(hdr[:4], uint32(len(data)))
		copy(hdr[4:], "tEXt")
		out.Write(hdr[:])
		out.Write(data)
		crc := crc32.NewIEEE()
		crc.Write(hdr[4:])
		crc.Write(data)
		var sum [4]byte
		binary.BigEndian.PutUint32(sum[:], crc.Sum32())
		out.Write(sum[:])
	}
	out.Write(p[ihdrEnd:])
	return out.Bytes(), nil
}

// PNGText returns the tEXt entries of a PNG (keyword -> text), reading the
// chunks up to the first IDAT.
func PNGText(p []byte) (map[string]string, error) {
	if !bytes.HasPrefix(p, pngSig) {
		return nil, errors.New("picture: not a PNG")
	}
	out := map[string]string{}
	for i := 8; i+12 <= len(p); {
		n := int(binary.BigEndian.Uint32(p[i : i+4]))
		typ := string(p[i+4 : i+8])
		if n < 0 || i+12+n > len(p) {
			return out, errors.New("picture: truncated PNG chunk")
		}
		if typ == "IDAT" || typ == "IEND" {
			break
		}
		if typ == "tEXt" {
			data := p[i+8 : i+8+n]
			if k := bytes.IndexByte(data, 0); k > 0 {
				out[string(data[:k])] = string(data[k+1:])
			}
		}
		i += 12 + n
	}
	return out, nil
}
