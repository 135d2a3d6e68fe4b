package picture

import (
	"crypto/sha256"
	"encoding/hex"
	"encoding/xml"
	"image"
	"math"
	"strings"
	"testing"

	"github.com/charmbracelet/colorprofile"
	"github.com/heed-dev/heed/views"
)

func figStyles(t *testing.T) views.Styles {
	t.Helper()
	cm, ok := views.ColormapByName(views.DefaultColormap)
	if !ok {
		t.Fatal("no default colormap")
	}
	return views.NewStyles(colorprofile.TrueColor, false, cm)
}

// figureMap is a 6 x 6 causal head with one leaking cell (q 1, k 3), a
// token with a leading space (a word start) and one longer than a label.
func figureMap() *views.MapData {
	const n = 6
	w := make([]float32, n*n)
	for q := 0; q < n; q++ {
		for k := 0; k <= q; k++ {
			w[q*n+k] = 1 / float32(q+1)
		}
	}
	w[1*n+3] = 0.25
	d := views.NewMapData(n, n, w)
	toks := []string{"<s>", "The", " river", "bends", "extraordinarily-long", "."}
	d.QueryTokens, d.KeyTokens = toks, toks
	d.Measure = "attention weight"
	d.Tol = 1e-6
	d.Rule = func(q, k int) string {
		if k > q {
			return "causal"
		}
		return ""
	}
	return d
}

// svgRuns parses an SVG figure and returns its text runs (aria-label and
// transform of each text group).
func svgRuns(t *testing.T, b []byte) (root xmlNode, runs [][2]string) {
	t.Helper()
	if err := xml.Unmarshal(b, &root); err != nil {
		t.Fatalf("encoding/xml cannot parse the SVG: %v", err)
	}
	paths := map[string]bool{}
	root.walk(func(n *xmlNode) {
		switch n.XMLName.Local {
		case "path":
			paths[n.attr("id")] = true
		case "use":
			if !paths[strings.TrimPrefix(n.attr("href"), "#")] {
				t.Errorf("use of undefined glyph %q", n.attr("href"))
			}
		case "g":
			if n.attr("class") == "text" {
				runs = append(runs, [2]string{n.attr("aria-label"), n.attr("transform")})
			}
		}
	})
	return root, runs
}

// pixelSum is the golden checksum of a figure's pixels (amd64; see
// DEVELOPERS.md on fused multiply-adds elsewhere).
func pixelSum(t *testing.T, f *Figure) (*image.RGBA, []byte) {
	t.Helper()
	img, err := f.Image()
	if err != nil {
		t.Fatal(err)
	}
	if b := img.Bounds(); b.Dx() != f.W || b.Dy() != f.H || f.W > MaxFigureWidth {
		t.Errorf("image %v for a %d x %d figure (at most %d wide)", b, f.W, f.H, MaxFigureWidth)
	}
	s := sha256.Sum256(img.Pix)
	return img, []byte(hex.EncodeToString(s[:]) + "\n")
}

func TestMapFigure(t *testing.T) {
	st := figStyles(t)
	d := figureMap()
	f, err := MapFigure(d, MapFigureOptions{Title: "decoder:L0:H1:q2:k1", Lines: []string{"Attention weight of a test head."},
		Q0: 0, Q1: 6, K0: 0, K1: 6, CursorQ: 2, CursorK: 1, QueryAxis: "query", KeyAxis: "key", RuleName: "causal", Styles: st})
	if err != nil {
		t.Fatal(err)
	}
	svg, err := f.SVG(Options{Title: "map", Marker: "heed render test"})
	if err != nil {
		t.Fatal(err)
	}
	golden(t, "map.svg", svg)
	img, sum := pixelSum(t, f)
	golden(t, "pixels.sha256", sum)

	_, runs := svgRuns(t, svg)
	byText := map[string]string{}
	for _, r := range runs {
		byText[r[0]] = r[1]
		// a cursor glyph of the terminal screens has no place in a figure
		if strings.ContainsAny(r[0], "+▼▶◀") {
			t.Errorf("text run %q looks like a cursor", r[0])
		}
	}
	// Every key label is one run of the whole token and its position,
	// turned to read upwards; query labels are the same runs, level.
	for k, tok := range d.KeyTokens {
		want := views.Ellipsize(tok, 14) + " " + string(rune('0'+k))
		tf, ok := byText[want]
		if !ok {
			t.Errorf("no text run %q (runs: %v)", want, runs)
			continue
		}
		if !strings.Contains(tf, "rotate(-90)") {
			t.Errorf("key label %q: transform %q, want a rotation", want, tf)
		}
	}
	if _, ok := byText["extraordinari… 4"]; !ok {
		t.Error("a long token is not cut to 14 columns with an ellipsis")
	}
	for _, want := range []string{"decoder:L0:H1:q2:k1", "attention weight", "0", "0.5000", "1.000", "query", "key",
		"forbidden by the causal rule yet attention weight > 1.00e-06 (a leak)"} {
		if _, ok := byText[want]; !ok {
			t.Errorf("no text run %q", want)
		}
	}
	if tf := byText["query"]; !strings.Contains(tf, "rotate(-90)") {
		t.Errorf("the query axis title is not turned: %q", tf)
	}
	// The leaking cell in the alarm colour, an allowed cell in the
	// colormap's colour of its weight (1/3 of the largest, 1), and a masked
	// cell left as the page.
	cellAt := func(q, k int) views.Colour {
		var gx, gy float64
		found := false
		// the grid starts where the first cell's colour is: find q 0 k 0 (weight 1,
		// the colormap's top) along the row of the first query label
		for y := 0; y < f.H && !found; y++ {
			for x := 0; x < f.W; x++ {
				if at(img, x, y) == st.Colormap.At(1) {
					gx, gy, found = float64(x), float64(y), true
					break
				}
			}
		}
		if !found {
			t.Fatal("no cell in the colour of weight 1")
		}
		cell := 28.0
		return at(img, int(gx+cell*(float64(k)+0.5)), int(gy+cell*(float64(q)+0.5)))
	}
	if got := cellAt(1, 3); got != st.Colormap.Alarm {
		t.Errorf("leaking cell %s, want the alarm colour %s", got.Hex(), st.Colormap.Alarm.Hex())
	}
	if got, want := cellAt(2, 1), st.Colormap.At(views.ScaleValue(1.0/3, 1, views.Linear)); got != want {
		t.Errorf("cell (2, 1): %s, want %s", got.Hex(), want.Hex())
	}
	if got := cellAt(0, 4); got != lightBG {
		t.Errorf("masked cell %s, want the page", got.Hex())
	}
}

func TestMapFigureWindow(t *testing.T) {
	st := figStyles(t)
	n := 300
	w := make([]float32, n*n)
	for i := range w {
		w[i] = float32(i%7) / 7
	}
	d := views.NewMapData(n, n, w)
	note := "queries and keys 236–299 of 300 shown; --from/--to pick the positions"
	f, err := MapFigure(d, MapFigureOptions{Title: "x", Note: note, Q0: 236, Q1: 300, K0: 236, K1: 300, CursorQ: -1, CursorK: -1, Styles: st})
	if err != nil {
		t.Fatal(err)
	}
	if f.W > MaxFigureWidth || f.H > MaxFigureWidth {
		t.Errorf("%d x %d px for 64 x 64 cells", f.W, f.H)
	}
	svg, err := f.SVG(Options{})
	if err != nil {
		t.Fatal(err)
	}
	_, runs := svgRuns(t, svg)
	found := false
	for _, r := range runs {
		found = found || r[0] == note
		if r[0] == "235" || r[0] == "300" {
			t.Errorf("label %q outside the window", r[0])
		}
	}
	if !found {
		t.Errorf("no run with the note %q", note)
	}
	if _, err := MapFigure(d, MapFigureOptions{Q0: 0, Q1: 300, K0: 0, K1: 300, Styles: st}); err == nil {
		t.Error("a 300 x 300 window was drawn; the most is MaxLabelled")
	}
}

func traceFixture() *views.TraceData {
	nan := math.NaN()
	return &views.TraceData{Block: "decoder", Query: 2, QueryToken: " river", Side: "target",
		Predicted: `"bends" (the next input token; no logits exported)`,
		Summary:   `by rollout, query 2 " river" draws most on "<s>" (0, 50%)`,
		Tokens:    []string{"<s>", "The", " river", "bends", ".", "end"},
		Status:    []string{"", "", "", "future", "future", "future"},
		Methods: []views.TraceMethod{
			{Name: "rollout", Normalised: true, Shares: []float64{0.5, 0.2, 0.25, 0.05, 0, 0}},
			{Name: "flow", Shares: []float64{0.9, 0.4, 0.6, nan, nan, nan}},
			{Name: "grad", Note: "needs decoder/grad in the export"},
		}}
}

// figureGoldens compares f's SVG (titled name) with the golden name.svg and
// its pixels' checksum with pixels.sha256, and returns its image and the
// set of its text runs.
func figureGoldens(t *testing.T, f *Figure, name string) (*image.RGBA, map[string]bool) {
	t.Helper()
	svg, err := f.SVG(Options{Title: name})
	if err != nil {
		t.Fatal(err)
	}
	golden(t, name+".svg", svg)
	img, sum := pixelSum(t, f)
	golden(t, "pixels.sha256", sum)
	_, runs := svgRuns(t, svg)
	texts := map[string]bool{}
	for _, r := range runs {
		texts[r[0]] = true
	}
	return img, texts
}

func TestTraceFigure(t *testing.T) {
	st := figStyles(t)
	f, err := TraceFigure(traceFixture(), TraceFigureOptions{Title: "decoder:L0:H0:q2", From: 0, To: 6, Styles: st})
	if err != nil {
		t.Fatal(err)
	}
	_, texts := figureGoldens(t, f, "trace")
	for _, want := range []string{
		"decoder:L0:H0:q2",
		"50.0%", "20.0%", "25.0%", // rollout as it is (sums to 1)
		"47.4%", "21.1%", "31.6%", // flow as % of its total 1.9
		"future: not seen by this query (yet rollout 0.05 reaches it: a leak)",
		"4–5", "future: 2 positions not seen by this query",
		"needs decoder/grad in the export",
		" river 2",
	} {
		if !texts[want] {
			t.Errorf("no text run %q", want)
		}
	}
}

func TestSurveyFigure(t *testing.T) {
	st := figStyles(t)
	d := &views.SurveyData{Block: "decoder", Layers: 2, Heads: 3, Stat: "entropy", Unit: "nats", Hint: "low = focused",
		Values: []float64{1.5, 2, 2.5, 1, math.NaN(), 3}, Marks: []bool{false, false, false, false, false, true}}
	f, err := SurveyFigure(d, SurveyFigureOptions{Title: "decoder:L1:H2", Layer: 1, Head: 2, Styles: st})
	if err != nil {
		t.Fatal(err)
	}
	img, texts := figureGoldens(t, f, "survey")
	for _, want := range []string{"head", "layer", "L0", "L1", "0", "1", "2", "1.500", "3.000", "entropy (nats)",
		"blank: not defined for that head"} {
		if !texts[want] {
			t.Errorf("no text run %q", want)
		}
	}
	if n := countColour(img, img.Bounds(), st.Colormap.Alarm); n == 0 {
		t.Error("no frame in the alarm colour around the head with forbidden mass")
	}
}

// TestFigureRotatedText: text turned by 90 degrees covers a tall, narrow box,
// level text a wide, low one, of the same size.
func TestFigureRotatedText(t *testing.T) {
	box := func(angle float64) image.Rectangle {
		f := NewFigure(200, 200, false)
		f.Text("heed heed", 100, 100, angle, Middle, TextStyle{15, Regular, views.RGB(0, 0, 0)})
		img, err := f.Image()
		if err != nil {
			t.Fatal(err)
		}
		r := image.Rectangle{}
		for y := 0; y < 200; y++ {
			for x := 0; x < 200; x++ {
				if at(img, x, y) != lightBG {
					r = r.Union(image.Rect(x, y, x+1, y+1))
				}
			}
		}
		return r
	}
	level, up := box(0), box(90)
	if level.Dx() < 70 || level.Dy() > 16 {
		t.Errorf("level text covers %v", level)
	}
	near := func(a, b int) bool { return a-b <= 1 && b-a <= 1 } // antialiasing
	if !near(up.Dy(), level.Dx()) || !near(up.Dx(), level.Dy()) {
		t.Errorf("turned text covers %v, level %v: want the same box turned", up, level)
	}
}
