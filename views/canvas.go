package views

import (
	"bytes"
	"fmt"
	"image/color"
	"math"
	"strconv"
	"strings"

	"github.com/charmbracelet/colorprofile"
	"github.com/mattn/go-runewidth"
)

// Colour is a 24-bit sRGB colour, or NoColour for the terminal's default.
type Colour uint32

// NoColour is the terminal's default foreground or background.
const NoColour Colour = 0

const colourSet = 1 << 24

// RGB returns the colour with the given channels.
func RGB(r, g, b uint8) Colour {
	return colourSet | Colour(r)<<16 | Colour(g)<<8 | Colour(b)
}

// MustHex parses "#RRGGBB"; it panics on anything else (for constants).
func MustHex(s string) Colour {
	if len(s) != 7 || s[0] != '#' {
		panic("views: bad hex colour " + s)
	}
	v, err := strconv.ParseUint(s[1:], 16, 32)
	if err != nil {
		panic("views: bad hex colour " + s)
	}
	return colourSet | Colour(v)
}

// IsSet reports whether c is a colour rather than the terminal default.
func (c Colour) IsSet() bool { return c&colourSet != 0 }

// Channels returns the red, green and blue channels (0 for NoColour).
func (c Colour) Channels() (r, g, b uint8) {
	return uint8(c >> 16), uint8(c >> 8), uint8(c)
}

// Hex returns "#rrggbb", or "" for NoColour.
func (c Colour) Hex() string {
	if !c.IsSet() {
		return ""
	}
	r, g, b := c.Channels()
	return fmt.Sprintf("#%02x%02x%02x", r, g, b)
}

// RGBA returns the colour as an image/color value (nil for NoColour), for
// lipgloss and image encoders.
func (c Colour) RGBA() color.Color {
	if !c.IsSet() {
		return nil
	}
	r, g, b := c.Channels()
	return color.RGBA{R: r, G: g, B: b, A: 255}
}

// Luma is the relative luminance of c in [0, 1] (ITU-R BT.709 weights on
// linearised sRGB, as in WCAG 2's relative-luminance definition).
func (c Colour) Luma() float64 {
	r, g, b := c.Channels()
	lin := func(v uint8) float64 {
		x := float64(v) / 255
		if x <= 0.04045 {
			return x / 12.92
		}
		return pow24((x + 0.055) / 1.055)
	}
	return 0.2126*lin(r) + 0.7152*lin(g) + 0.0722*lin(b)
}

// Attr is a set of text attributes.
type Attr uint8

// Text attributes.
const (
	Bold Attr = 1 << iota
	Faint
	Underline
	Reverse
	Italic
)

// Style is the look of a run of cells.
type Style struct {
	FG, BG Colour
	Attr   Attr
}

// Cell is one terminal cell. Ch == 0 marks the right half of a wide rune
// written in the cell before it.
type Cell struct {
	Ch rune
	Style
}

// Canvas is a grid of cells, row-major. It is the intermediate form of every
// view: String renders it for a terminal, other packages draw it as a picture.
type Canvas struct {
	W, H  int
	Cells []Cell
}

// NewCanvas returns a w x h canvas of blank cells in the default style.
func NewCanvas(w, h int) *Canvas {
	if w < 0 {
		w = 0
	}
	if h < 0 {
		h = 0
	}
	c := &Canvas{W: w, H: h, Cells: make([]Cell, w*h)}
	for i := range c.Cells {
		c.Cells[i].Ch = ' '
	}
	return c
}

// At returns the cell at (x, y); out of range gives a blank cell.
func (c *Canvas) At(x, y int) Cell {
	if x < 0 || y < 0 || x >= c.W || y >= c.H {
		return Cell{Ch: ' '}
	}
	return c.Cells[y*c.W+x]
}

// Set puts a cell at (x, y); out of range is ignored.
func (c *Canvas) Set(x, y int, ch rune, st Style) {
	if x < 0 || y < 0 || x >= c.W || y >= c.H {
		return
	}
	c.Cells[y*c.W+x] = Cell{Ch: ch, Style: st}
}

// Fill sets the style (and glyph ch) of a rectangle.
func (c *Canvas) Fill(x, y, w, h int, ch rune, st Style) {
	for yy := y; yy < y+h; yy++ {
		for xx := x; xx < x+w; xx++ {
			c.Set(xx, yy, ch, st)
		}
	}
}

// Text writes s at (x, y) in style st, clipped at maxW columns (maxW < 0:
// to the canvas edge), and returns the number of columns written. Control
// characters are shown as visible stand-ins, zero-width runes are dropped and
// a wide rune that would not fit is replaced by a space.
func (c *Canvas) Text(x, y int, s string, st Style, maxW int) int {
	if maxW < 0 || x+maxW > c.W {
		maxW = c.W - x
	}
	col := 0
	for _, r := range s {
		r = Printable(r)
		w := runewidth.RuneWidth(r)
		if w == 0 {
			continue
		}
		if col+w > maxW {
			if w == 2 && col < maxW {
				c.Set(x+col, y, ' ', st)
				col++
			}
			break
		}
		c.Set(x+col, y, r, st)
		if w == 2 {
			c.Set(x+col+1, y, 0, st)
		}
		col += w
	}
	return col
}

// Blit copies src onto c with its top-left corner at (x, y).
func (c *Canvas) Blit(x, y int, src *Canvas) {
	for yy := 0; yy < src.H; yy++ {
		for xx := 0; xx < src.W; xx++ {
			cell := src.Cells[yy*src.W+xx]
			c.Set(x+xx, y+yy, cell.Ch, cell.Style)
		}
	}
}

// Printable maps control characters to visible stand-ins so that a token
// such as "\n" or "\t" cannot break the layout.
func Printable(r rune) rune {
	switch {
	case r == '\n':
		return '↵'
	case r == '\t':
		return '→'
	case r == '\r':
		return '←'
	case r < 0x20 || r == 0x7f || (r >= 0x80 && r < 0xa0):
		return '·'
	case r == 0xfffd:
		return '?'
	}
	return r
}

// StringWidth is the number of terminal columns s takes once written with Text.
func StringWidth(s string) int {
	n := 0
	for _, r := range s {
		n += runewidth.RuneWidth(Printable(r))
	}
	return n
}

// String renders the canvas as lines of text with true-colour SGR sequences,
// joined by "\n" (no trailing newline). A terminal program downsamples them
// to its colour profile; use Render for a fixed profile.
func (c *Canvas) String() string {
	var b strings.Builder
	b.Grow(c.W*c.H*4 + c.H*16)
	var buf []byte
	for y := 0; y < c.H; y++ {
		if y > 0 {
			b.WriteByte('\n')
		}
		cur := Style{}
		row := c.Cells[y*c.W : (y+1)*c.W]
		for _, cell := range row {
			if cell.Ch == 0 {
				continue
			}
			if cell.Style != cur {
				buf = appendSGR(buf[:0], cell.Style)
				b.Write(buf)
				cur = cell.Style
			}
			b.WriteRune(cell.Ch)
		}
		if cur != (Style{}) {
			b.WriteString("\x1b[m")
		}
	}
	return b.String()
}

// Plain renders the canvas without any escape sequence.
func (c *Canvas) Plain() string {
	var b strings.Builder
	for y := 0; y < c.H; y++ {
		if y > 0 {
			b.WriteByte('\n')
		}
		for _, cell := range c.Cells[y*c.W : (y+1)*c.W] {
			if cell.Ch != 0 {
				b.WriteRune(cell.Ch)
			}
		}
	}
	return b.String()
}

// Render renders the canvas for the colour profile p, downsampling colours
// with colorprofile (TrueColor, ANSI256, ANSI; Ascii keeps only attributes;
// NoTTY gives plain text).
func (c *Canvas) Render(p colorprofile.Profile) string {
	if p == colorprofile.TrueColor {
		return c.String()
	}
	var out bytes.Buffer
	w := &colorprofile.Writer{Forward: &out, Profile: p}
	_, _ = w.WriteString(c.String())
	return out.String()
}

func appendSGR(buf []byte, st Style) []byte {
	buf = append(buf, "\x1b[0"...)
	if st.Attr&Bold != 0 {
		buf = append(buf, ";1"...)
	}
	if st.Attr&Faint != 0 {
		buf = append(buf, ";2"...)
	}
	if st.Attr&Italic != 0 {
		buf = append(buf, ";3"...)
	}
	if st.Attr&Underline != 0 {
		buf = append(buf, ";4"...)
	}
	if st.Attr&Reverse != 0 {
		buf = append(buf, ";7"...)
	}
	if st.FG.IsSet() {
		buf = appendRGB(buf, ";38;2;", st.FG)
	}
	if st.BG.IsSet() {
		buf = appendRGB(buf, ";48;2;", st.BG)
	}
	return append(buf, 'm')
}

// appendRGB appends an SGR true-colour parameter: the prefix (";38;2;" for
// the foreground, ";48;2;" for the background), then c's r;g;b.
func appendRGB(buf []byte, prefix string, c Colour) []byte {
	r, g, b := c.Channels()
	buf = append(buf, prefix...)
	buf = strconv.AppendUint(buf, uint64(r), 10)
	buf = append(buf, ';')
	buf = strconv.AppendUint(buf, uint64(g), 10)
	buf = append(buf, ';')
	return strconv.AppendUint(buf, uint64(b), 10)
}

func pow24(x float64) float64 { return math.Pow(x, 2.4) }
