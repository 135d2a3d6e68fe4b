package views

//go:generate sh -c "/usr/bin/python3 gen_colormaps.py > colormap_data.go && gofmt -w colormap_data.go"

import (
	"math"
	"slices"
	"strings"
	"sync"
)

// Colormap maps a value in [0, 1] to a colour. Every colormap heed offers is
// perceptually uniform in lightness and published with its data.
type Colormap struct {
	// Name is how the user picks it (--colormap NAME, the colormap key).
	Name string
	// Source cites where the data comes from.
	Source string
	// Alarm is the colour of forbidden cells that carry mass: chosen outside
	// the colormap's path so that it cannot be read as a weight.
	Alarm Colour
	// LowIsLight is true when the colormap's low end is its light end; Styles
	// turns such a map around on dark backgrounds so that low values fade
	// into the background.
	LowIsLight bool
	lut        [256]Colour
}

// At returns the colour of t in [0, 1] (clamped; NaN gives the low end).
func (c *Colormap) At(t float64) Colour {
	if !(t > 0) {
		return c.lut[0]
	}
	if t >= 1 {
		return c.lut[255]
	}
	return c.lut[int(t*255+0.5)]
}

// Reversed returns the colormap with its ends swapped.
func (c Colormap) Reversed() Colormap {
	r := c
	for i := range c.lut {
		r.lut[i] = c.lut[255-i]
	}
	r.LowIsLight = !c.LowIsLight
	return r
}

// newColormap builds a 256-entry lookup table from stops evenly spaced over
// [0, 1], interpolating linearly in sRGB between neighbouring stops (how the
// published tables are meant to be sampled).
func newColormap(name, source string, alarm Colour, lowIsLight bool, stops [][3]float64) Colormap {
	c := Colormap{Name: name, Source: source, Alarm: alarm, LowIsLight: lowIsLight}
	n := len(stops)
	for i := range c.lut {
		x := float64(i) / 255 * float64(n-1)
		j := int(x)
		if j >= n-1 {
			j = n - 2
		}
		f := x - float64(j)
		var rgb [3]uint8
		for ch := 0; ch < 3; ch++ {
			v := stops[j][ch]*(1-f) + stops[j+1][ch]*f
			rgb[ch] = uint8(math.Round(math.Max(0, math.Min(1, v)) * 255))
		}
		c.lut[i] = RGB(rgb[0], rgb[1], rgb[2])
	}
	return c
}

func hexStops(hex ...string) [][3]float64 {
	out := make([][3]float64, len(hex))
	for i, h := range hex {
		c := MustHex(h)
		r, g, b := c.Channels()
		out[i] = [3]float64{float64(r) / 255, float64(g) / 255, float64(b) / 255}
	}
	return out
}

// Alarm colours come from Paul Tol's "vibrant" qualitative scheme (P. Tol,
// "Colour Schemes", SRON technical note SRON/EPS/TN/09-002, issue 3.2, 2021),
// designed to stay distinct for colour-blind readers; each colormap gets the
// member farthest from its own path.
var (
	tolVibrantOrange  = MustHex("#EE7733")
	tolVibrantMagenta = MustHex("#EE3377")
	tolVibrantCyan    = MustHex("#33BBEE")
)

// iridescentHex is Paul Tol's sequential "iridescent" scheme (same technical
// note, fig. 18): 23 colours, colour-blind safe, with a linear lightness
// ramp, to be interpolated linearly. heed's default colormap.
var iridescentHex = []string{
	"#FEFBE9", "#FCF7D5", "#F5F3C1", "#EAF0B5", "#DDECBF", "#D0E7CA", "#C2E3D2", "#B5DDD8",
	"#A8D8DC", "#9BD2E1", "#8DCBE4", "#81C4E7", "#7BBCE7", "#7EB2E4", "#88A5DD", "#9398D2",
	"#9B8AC4", "#9D7DB2", "#9A709E", "#906388", "#805770", "#684957", "#46353A",
}

// Colormaps returns every colormap heed offers, the default first. Each call
// returns fresh values: callers may keep and modify them.
func Colormaps() []Colormap { return slices.Clone(colormaps()) }

// colormapSpecs are the colormaps heed offers, the default first, built
// by colormaps on first use: not in every process (a flag's help that lists
// their names is made at every start, from the names alone).
var colormapSpecs = []struct {
	name, source string
	alarm        Colour
	lowIsLight   bool
	stops        func() [][3]float64
}{
	{"dawn", "P. Tol, Colour Schemes, SRON/EPS/TN/09-002 (2021), the sequential scheme of 23 colours from cream to dark brown",
		tolVibrantOrange, true, func() [][3]float64 { return hexStops(iridescentHex...) }},
	{"viridis", "S. van der Walt & N. Smith (2015), matplotlib viridis, 256-entry table (CC0)",
		tolVibrantMagenta, false, func() [][3]float64 { return viridisData[:] }},
	{"cividis", "J. R. Nuñez, C. R. Anderton & R. S. Renslow (2018), PLOS ONE 13(7): e0199239, 256-entry table",
		tolVibrantMagenta, false, func() [][3]float64 { return cividisData[:] }},
	{"magma", "S. van der Walt & N. Smith (2015), matplotlib magma, 256-entry table (CC0)",
		tolVibrantCyan, false, func() [][3]float64 { return magmaData[:] }},
}

var colormaps = sync.OnceValue(func() []Colormap {
	cms := make([]Colormap, len(colormapSpecs))
	for i, s := range colormapSpecs {
		cms[i] = newColormap(s.name, s.source, s.alarm, s.lowIsLight, s.stops())
	}
	return cms
})

// DefaultColormap is the name of the colour-blind-safe default.
const DefaultColormap = "dawn"

// ColormapNames lists the names Colormaps returns, in order.
func ColormapNames() []string {
	names := make([]string, len(colormapSpecs))
	for i, s := range colormapSpecs {
		names[i] = s.name
	}
	return names
}

// ColormapByName returns the named colormap (case-insensitive).
func ColormapByName(name string) (Colormap, bool) {
	if strings.EqualFold(name, "iridescent") {
		name = "dawn" // its name before December 2026, taken for one version
	}
	for _, c := range colormaps() {
		if strings.EqualFold(c.Name, name) {
			return c, true
		}
	}
	return Colormap{}, false
}

// Ramp is the glyph ramp that carries a value without colour: from empty
// (exactly zero) to dense. Each glyph is one column wide in every terminal.
const Ramp = " .:-=+*%#@"

// Glyphs used when colour cannot tell a cell apart.
const (
	// GlyphForbidden marks a forbidden cell that carries mass.
	GlyphForbidden = '!'
	// GlyphNaN marks a cell that is NaN (or a row that is).
	GlyphNaN = '?'
	// GlyphHalf is the upper half block: its foreground is the upper of two
	// rows, its background the lower.
	GlyphHalf = '▀'
	// GlyphLowHalf draws the lower pixel alone (the upper one is masked).
	GlyphLowHalf = '▄'
	// GlyphPadding marks padding keys where no colour can.
	GlyphPadding = '░'
	// GlyphZero is an allowed cell of weight 0 in the glyph ramp, distinct
	// from the blank of a masked cell.
	GlyphZero = '·'
)

// RampGlyph returns the ramp glyph of t in [0, 1]: ' ' only for t <= 0, the
// densest glyph for t >= 1.
func RampGlyph(t float64) byte {
	if !(t > 0) {
		return Ramp[0]
	}
	n := len(Ramp) - 1
	i := 1 + int(t*float64(n))
	if i > n {
		i = n
	}
	return Ramp[i]
}
