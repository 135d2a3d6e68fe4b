package views

import (
	"testing"

	"github.com/charmbracelet/colorprofile"
)

// contrastRatio is WCAG 2.x's contrast ratio (L1 + 0.05) / (L2 + 0.05) of
// the relative luminances, lighter over darker (WCAG 2.1, definition of
// "contrast ratio"; success criterion 1.4.3 asks at least 4.5:1 for text).
func contrastRatio(a, b Colour) float64 {
	la, lb := a.Luma(), b.Luma()
	if la < lb {
		la, lb = lb, la
	}
	return (la + 0.05) / (lb + 0.05)
}

// Every text style's colour reads at 4.5:1 or more on the backgrounds
// terminals commonly use for the theme (black and the dark greys of common
// terminal themes; white and off-white: common practice, the values from
// memory), and on the status bar's own background.
func TestTextContrast(t *testing.T) {
	cm, _ := ColormapByName(DefaultColormap)
	for _, dark := range []bool{true, false} {
		st := NewStyles(colorprofile.TrueColor, dark, cm)
		bgs := []string{"#FFFFFF", "#F5F5F5", "#FDF6E3"}
		if dark {
			bgs = []string{"#000000", "#1E1E1E", "#282C34", "#2E3440"}
		}
		styles := map[string]Style{"Faint": st.Faint, "Title": st.Title, "Accent": st.Accent, "Label": st.Label,
			"Warn": st.Warn, "Bad": st.Bad, "Good": st.Good, "Key": st.Key, "Tab": st.Tab, "TabActive": st.TabActive}
		for name, s := range styles {
			for _, bg := range bgs {
				if r := contrastRatio(s.FG, MustHex(bg)); r < 4.5 {
					t.Errorf("dark=%v: %s %s on %s: contrast %.2f:1, want >= 4.5:1", dark, name, s.FG.Hex(), bg, r)
				}
			}
		}
		for name, s := range map[string]Style{"Bar": st.Bar, "BarDim": st.BarDim} {
			if r := contrastRatio(s.FG, s.BG); r < 4.5 {
				t.Errorf("dark=%v: %s %s on %s: contrast %.2f:1, want >= 4.5:1", dark, name, s.FG.Hex(), s.BG.Hex(), r)
			}
		}
	}
}

// In both themes the colour scale runs from near the background (weight 0)
// to far from it (the largest weight), whatever the colormap: more weight,
// more ink.
func TestScaleDirectionFollowsBackground(t *testing.T) {
	for _, cm := range Colormaps() {
		for _, dark := range []bool{true, false} {
			st := NewStyles(colorprofile.TrueColor, dark, cm)
			bg := MustHex("#FFFFFF")
			if dark {
				bg = MustHex("#000000")
			}
			lo, hi := contrastRatio(st.Colormap.At(0), bg), contrastRatio(st.Colormap.At(1), bg)
			if lo >= hi {
				t.Errorf("%s, dark=%v: weight 0 contrasts %.2f:1 with the background, the largest weight %.2f:1; want the largest to stand out", cm.Name, dark, lo, hi)
			}
		}
	}
}
