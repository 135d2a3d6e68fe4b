package views

import (
	"charm.land/lipgloss/v2"
	"github.com/charmbracelet/colorprofile"
)

// Styles is the one set of looks every renderer shares. Build it with
// NewStyles; it holds no state beyond its fields.
type Styles struct {
	// Profile is the colour profile the output is meant for. Below ANSI256
	// the heat maps draw one row a line with the glyph ramp instead of half
	// blocks; below ANSI the glyph ramp alone carries every value.
	Profile colorprofile.Profile
	// Dark is true for a dark terminal background.
	Dark bool
	// Colormap is oriented for the background (see Colormap.LowIsLight).
	Colormap Colormap

	Text, Faint, Title, Accent, Label, LabelHi, Selected, Warn, Bad, Good, Key, Bar, BarDim, Tab, TabActive Style

	// NaN is the colour of NaN cells (Tol's "bad data" grey).
	NaN Colour
	// Padding is the colour of padding keys on the Map (no mass on them).
	Padding Colour
}

// NewStyles returns the styles for a profile, a background and a colormap.
func NewStyles(p colorprofile.Profile, dark bool, cm Colormap) Styles {
	// the low end sits near the background in both themes, so that more
	// weight always means more ink: light-low maps turn round on a dark
	// background, dark-low ones (viridis, magma, cividis) on a light one
	if cm.LowIsLight == dark {
		cm = cm.Reversed()
	}
	s := Styles{Profile: p, Dark: dark, Colormap: cm, NaN: MustHex("#999999")}
	// Text colours: Paul Tol's "bright" scheme on dark backgrounds, his
	// "high-contrast" and "muted" members on light ones (SRON/EPS/TN/09-002).
	pick := func(light, dark string) Colour {
		if s.Dark {
			return MustHex(dark)
		}
		return MustHex(light)
	}
	s.Text = Style{}
	// every text colour reads at 4.5:1 or more on common backgrounds of its
	// theme (WCAG 2.x; TestTextContrast)
	s.Faint = Style{FG: pick("#6E6E6E", "#A0A0A0")}
	s.Title = Style{FG: pick("#004488", "#77AADD"), Attr: Bold}
	s.Accent = Style{FG: pick("#004488", "#66CCEE")}
	s.Label = Style{FG: pick("#505050", "#B0B0B0")}
	s.LabelHi = Style{Attr: Reverse | Bold}
	s.Selected = Style{Attr: Reverse}
	s.Warn = Style{FG: pick("#7A5F00", "#CCBB44"), Attr: Bold}
	s.Bad = Style{FG: pick("#A63D50", "#F7848F"), Attr: Bold}
	s.Good = Style{FG: pick("#117733", "#44BB99")}
	s.Key = Style{FG: pick("#004488", "#77AADD"), Attr: Bold}
	s.Bar = Style{FG: pick("#202020", "#E0E0E0"), BG: pick("#D8D8D8", "#303030")}
	s.BarDim = Style{FG: pick("#505050", "#A0A0A0"), BG: s.Bar.BG}
	s.Tab = Style{FG: pick("#505050", "#A0A0A0")}
	s.Padding = pick("#C9D4E6", "#2B3550")
	s.TabActive = Style{FG: pick("#004488", "#77AADD"), Attr: Bold | Underline}
	return s
}

// HasColour reports whether colours reach the terminal at all.
func (s Styles) HasColour() bool { return s.Profile >= colorprofile.ANSI }

// HalfBlocks reports whether heat maps draw two rows a line with half blocks
// (needs enough colours to tell the two halves apart).
func (s Styles) HalfBlocks() bool { return s.Profile >= colorprofile.ANSI256 }

// Lip returns st as a lipgloss style, for bubbles components.
func (st Style) Lip() lipgloss.Style {
	l := lipgloss.NewStyle()
	if st.FG.IsSet() {
		l = l.Foreground(st.FG.RGBA())
	}
	if st.BG.IsSet() {
		l = l.Background(st.BG.RGBA())
	}
	if st.Attr&Bold != 0 {
		l = l.Bold(true)
	}
	if st.Attr&Faint != 0 {
		l = l.Faint(true)
	}
	if st.Attr&Underline != 0 {
		l = l.Underline(true)
	}
	if st.Attr&Reverse != 0 {
		l = l.Reverse(true)
	}
	if st.Attr&Italic != 0 {
		l = l.Italic(true)
	}
	return l
}

// contrast returns black or white, whichever reads better on bg.
func contrast(bg Colour) Colour {
	if bg.IsSet() && bg.Luma() > 0.35 {
		return RGB(0, 0, 0)
	}
	return RGB(255, 255, 255)
}
