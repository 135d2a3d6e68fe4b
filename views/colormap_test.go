package views

import (
	"bufio"
	"os/exec"
	"strings"
	"testing"
)

// TestColormapEnds checks each table's ends against the colours the
// colormaps are known by (viridis #440154 -> #fde725, magma #000004 ->
// #fcfdbf, cividis #00224e -> #fee838: from memory, they are the first and
// last entries of the published tables rounded to 8 bits), and Tol's
// iridescent ends (#fefbe9 -> #46353a, SRON/EPS/TN/09-002).
func TestColormapEnds(t *testing.T) {
	want := map[string][2]string{
		"viridis": {"#440154", "#fde725"}, "magma": {"#000004", "#fcfdbf"},
		"cividis": {"#00224e", "#fee838"}, "dawn": {"#fefbe9", "#46353a"},
	}
	for _, c := range Colormaps() {
		w, ok := want[c.Name]
		if !ok {
			t.Fatalf("colormap %s has no reference", c.Name)
		}
		if lo, hi := c.At(0).Hex(), c.At(1).Hex(); lo != w[0] || hi != w[1] {
			t.Errorf("%s: ends %s %s, want %s %s", c.Name, lo, hi, w[0], w[1])
		}
		if c.Alarm == c.At(0) || c.Source == "" {
			t.Errorf("%s: alarm colour or source missing", c.Name)
		}
	}
}

// TestColormapsAgainstMatplotlib compares all 256 entries with matplotlib's
// own colormaps (the reference implementation of viridis, magma, cividis),
// when /usr/bin/python3 has matplotlib.
func TestColormapsAgainstMatplotlib(t *testing.T) {
	script := `
import matplotlib
from matplotlib import colormaps
for n in ["viridis", "cividis", "magma"]:
    cm = colormaps[n]
    print(n, " ".join(matplotlib.colors.to_hex(cm(i)) for i in range(256)))
`
	out, err := exec.Command("/usr/bin/python3", "-c", script).Output()
	if err != nil {
		t.Skipf("matplotlib not available in /usr/bin/python3 (apt-get install python3-matplotlib): %v", err)
	}
	sc := bufio.NewScanner(strings.NewReader(string(out)))
	sc.Buffer(nil, 1<<20)
	seen := 0
	for sc.Scan() {
		f := strings.Fields(sc.Text())
		c, ok := ColormapByName(f[0])
		if !ok || len(f) != 257 {
			t.Fatalf("bad line for %s", f[0])
		}
		for i := 0; i < 256; i++ {
			if got := c.At(float64(i) / 255).Hex(); got != f[i+1] {
				t.Errorf("%s[%d] = %s, matplotlib %s", f[0], i, got, f[i+1])
			}
		}
		seen++
	}
	if seen != 3 {
		t.Fatalf("compared %d colormaps, want 3", seen)
	}
}

func TestIridescentOnDark(t *testing.T) {
	c, _ := ColormapByName("dawn")
	dark := NewStyles(0, true, c)
	light := NewStyles(0, false, c)
	if dark.Colormap.At(0).Luma() > dark.Colormap.At(1).Luma() {
		t.Error("on a dark background low values should be the dark end")
	}
	if light.Colormap.At(0).Luma() < light.Colormap.At(1).Luma() {
		t.Error("on a light background low values should be the light end")
	}
}
