package views

import (
	"fmt"
	"math"
	"math/rand"
	"reflect"
	"runtime"
	"slices"
	"strings"
	"testing"

	"github.com/charmbracelet/colorprofile"
	"github.com/charmbracelet/x/exp/golden"
	"github.com/heed-dev/heed/loader"
)

// Golden tests: go test ./views -update rewrites testdata/<TestName>/*.golden.
// Every case pins its colour profile, background and size.

func styles(t testing.TB, p colorprofile.Profile, dark bool, cm string) Styles {
	t.Helper()
	c, ok := ColormapByName(cm)
	if !ok {
		t.Fatalf("no colormap %q", cm)
	}
	return NewStyles(p, dark, c)
}

type mapCase struct {
	name    string
	d       func() *MapData
	w, h    int
	opt     MapOptions
	profile colorprofile.Profile
	dark    bool
	cm      string
}

func TestMap(t *testing.T) {
	leak16 := func() *MapData { return causalMap(16, 1, demoTokens) }
	padded := func() *MapData { return paddedMap(16, 4, demoTokens) }
	clean16 := func() *MapData { return causalMap(16, 0, demoTokens) }
	big := func() *MapData {
		d := causalMap(300, 0, nil)
		d.Weights[10*300+200] = 0.5 // one leaking cell far above the diagonal
		return d
	}
	nanRow := func() *MapData {
		d := causalMap(16, 0, demoTokens)
		for k := 0; k < 16; k++ {
			d.Weights[5*16+k] = float32(math.NaN())
		}
		return d
	}
	sink := func() *MapData {
		d := causalMap(16, 0, demoTokens)
		for q := 1; q < 16; q++ {
			d.Weights[q*16] += 2
		}
		d.VMax, d.VMaxNoSink = MatrixMax(16, 16, d.Weights)
		return d
	}
	cases := []mapCase{
		{"leak_truecolor_80x21", leak16, 80, 21, MapOptions{CursorQ: 3, CursorK: 4}, colorprofile.TrueColor, true, "dawn"},
		{"leak_ascii_80x21", leak16, 80, 21, MapOptions{CursorQ: 3, CursorK: 4}, colorprofile.ASCII, true, "dawn"},
		{"padding_truecolor_80x21", padded, 80, 21, MapOptions{CursorQ: 8, CursorK: 13}, colorprofile.TrueColor, true, "dawn"},
		{"padding_ascii_80x21", padded, 80, 21, MapOptions{CursorQ: 8, CursorK: 13}, colorprofile.ASCII, true, "dawn"},
		{"leak_notty_80x21", leak16, 80, 21, MapOptions{CursorQ: 3, CursorK: 4}, colorprofile.NoTTY, true, "dawn"},
		{"leak_ansi16_80x21", leak16, 80, 21, MapOptions{CursorQ: 3, CursorK: 4}, colorprofile.ANSI, true, "dawn"},
		{"clean_256_light_80x21", clean16, 80, 21, MapOptions{CursorQ: 15, CursorK: 0}, colorprofile.ANSI256, false, "viridis"},
		{"clean_magma_log_80x21", clean16, 80, 21, MapOptions{CursorQ: 8, CursorK: 2, Scale: Log}, colorprofile.TrueColor, true, "magma"},
		{"big_fit_mean_80x21", big, 80, 21, MapOptions{}, colorprofile.TrueColor, true, "cividis"},
		{"big_fit_max_ascii_80x21", big, 80, 21, MapOptions{Agg: AggMax, CursorQ: 10, CursorK: 200}, colorprofile.ASCII, true, "dawn"},
		{"big_zoom3_ascii_80x21", big, 80, 21, MapOptions{Zoom: 3, CursorQ: 10, CursorK: 200}, colorprofile.ASCII, true, "dawn"},
		{"big_zoom_max_ascii_200x57", big, 200, 57, MapOptions{Zoom: 20, CursorQ: 299, CursorK: 299}, colorprofile.ASCII, true, "dawn"},
		{"nan_row_ascii_80x21", nanRow, 80, 21, MapOptions{CursorQ: 5, CursorK: 1}, colorprofile.ASCII, true, "dawn"},
		{"sink_shown_ascii_80x21", sink, 80, 21, MapOptions{CursorQ: 9, CursorK: 8}, colorprofile.ASCII, true, "dawn"},
		{"sink_hidden_ascii_80x21", sink, 80, 21, MapOptions{CursorQ: 9, CursorK: 8, HideSink: true}, colorprofile.ASCII, true, "dawn"},
		{"too_small", leak16, 10, 4, MapOptions{}, colorprofile.ASCII, true, "dawn"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			c, _ := RenderMap(tc.d(), tc.w, tc.h, tc.opt, styles(t, tc.profile, tc.dark, tc.cm))
			if c.W != tc.w || c.H != tc.h {
				t.Fatalf("canvas %dx%d, want %dx%d", c.W, c.H, tc.w, tc.h)
			}
			golden.RequireEqual(t, c.Render(tc.profile))
		})
	}
}

func TestSurvey(t *testing.T) {
	vals := make([]float64, 6*12)
	for l := 0; l < 6; l++ {
		for h := 0; h < 12; h++ {
			vals[l*12+h] = float64(l*12+h) / 71 * math.Log(16)
		}
	}
	partial := append([]float64(nil), vals...)
	for i := 40; i < len(partial); i++ {
		partial[i] = math.NaN()
	}
	wide := make([]float64, 40*32)
	for i := range wide {
		wide[i] = float64(i%7) / 6
	}
	d := func(v []float64, layers, heads int) *SurveyData {
		return &SurveyData{Block: "decoder", Layers: layers, Heads: heads, Stat: "entropy", Unit: "nats", Hint: "low = focused",
			Values: v, Details: []Field{{"entropy", "1.234"}, {"confidence", "0.5123"}, {"sink", "0.1000"}, {"distance", "2.500"}},
			Note: "statistics of 1 example"}
	}
	// 12 x 12 heads, one leaking 1e-3 per row (L7 H5) beside one leaking
	// 0.5 (L2 H1): linear, the small one is the lowest colour; the mark
	// shows both whatever the statistic
	leaky := func(log bool) *SurveyData {
		v := make([]float64, 144)
		marks := make([]bool, 144)
		v[7*12+5], v[2*12+1] = 1e-3, 0.5
		marks[7*12+5], marks[2*12+1] = true, true
		x := d(v, 12, 12)
		x.Stat, x.Unit, x.Hint, x.Marks, x.Log = "leak mass", "per row", "0 = clean", marks, log
		return x
	}
	pending := func(x *SurveyData) *SurveyData { x.Pending = true; return x }
	numbers := d(vals, 6, 12)
	numbers.Numbers = true
	numbers.Marks = make([]bool, 72)
	numbers.Marks[2*12+5] = true
	list := d(vals, 6, 12)
	list.Order = make([]int, 72)
	for i := range list.Order {
		list.Order[i] = 71 - i
	}
	big := make([]float64, 64*64)
	for i := range big {
		big[i] = float64((i/64)*(i%64)%17) / 16
	}
	cases := []struct {
		name        string
		d           *SurveyData
		w, h, l, hd int
		p           colorprofile.Profile
	}{
		{"full_truecolor_80x21", d(vals, 6, 12), 80, 21, 2, 5, colorprofile.TrueColor},
		{"full_ascii_80x21", d(vals, 6, 12), 80, 21, 2, 5, colorprofile.ASCII},
		{"partial_ansi256_80x21", pending(d(partial, 6, 12)), 80, 21, 0, 0, colorprofile.ANSI256},
		{"scroll_ascii_80x21", d(wide, 40, 32), 80, 21, 30, 31, colorprofile.ASCII},
		{"scroll_ascii_200x57", d(wide, 40, 32), 200, 57, 30, 31, colorprofile.ASCII},
		{"leak_marks_truecolor_80x21", leaky(false), 80, 21, 7, 5, colorprofile.TrueColor},
		{"leak_marks_ascii_80x21", leaky(false), 80, 21, 7, 5, colorprofile.ASCII},
		{"leak_log_ascii_80x21", leaky(true), 80, 21, 7, 5, colorprofile.ASCII},
		{"numbers_ascii_100x21", numbers, 100, 21, 2, 5, colorprofile.ASCII},
		{"list_ascii_80x21", list, 80, 21, 2, 5, colorprofile.ASCII},
		{"pairs_64x64_ansi256_80x40", d(big, 64, 64), 80, 40, 40, 33, colorprofile.ANSI256},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			c, _ := Survey(tc.d, tc.w, tc.h, tc.l, tc.hd, styles(t, tc.p, true, "dawn"))
			golden.RequireEqual(t, c.Render(tc.p))
		})
	}
}

func findingsFixture() *FindingsData {
	return &FindingsData{
		Done: true,
		Rows: []FindingRow{
			{Block: "decoder", Rule: "causal", Layers: "0-1", Heads: "all 4", Batches: "0", Mass: 14.2, Max: 0.31, Cells: 120, Rows: 120, Worst: "L1 H2 B0 q3 k4", Offsets: "+1 ×120"},
			{Block: "decoder", Rule: "nan_rows", Layers: "1", Heads: "0", Batches: "0", Mass: 2, Cells: 0, Rows: 2, Worst: "L1 H0 B0 q0", Offsets: ""},
		},
		Diagnosis: []string{"Causal mask shifted by +1: every query also sees the next key, in all 4 heads of layers 0 and 1.",
			"Real query rows are NaN in layer 1 (fully masked rows)."},
		Caveat: "This is evidence to confirm by re-evaluating the model, not a verdict.",
		Notes:  []string{"padding rows of batch item 1 are NaN (benign)"},
	}
}

func TestFindings(t *testing.T) {
	many := findingsFixture()
	for i := 0; i < 30; i++ {
		many.Rows = append(many.Rows, FindingRow{Block: "decoder", Rule: "window", Layers: "2", Heads: "1", Batches: "0", Mass: 0.1, Cells: 3, Rows: 3, Worst: "L2 H1 B0 q9 k1"})
	}
	cases := []struct {
		name string
		d    *FindingsData
		w, h int
		sel  int
		p    colorprofile.Profile
	}{
		{"leak_truecolor_80x21", findingsFixture(), 80, 21, 0, colorprofile.TrueColor},
		{"leak_ascii_80x21", findingsFixture(), 80, 21, 1, colorprofile.ASCII},
		{"leak_ascii_200x57", findingsFixture(), 200, 57, 0, colorprofile.ASCII},
		{"clean_ascii_80x21", &FindingsData{Done: true}, 80, 21, 0, colorprofile.ASCII},
		{"running_ascii_80x21", &FindingsData{Progress: "40%"}, 80, 21, 0, colorprofile.ASCII},
		{"scroll_ascii_80x21", many, 80, 21, 25, colorprofile.ASCII},
		{"notjudged_ascii_80x21", &FindingsData{Done: true, NotJudged: []string{"decoder: mask: kind unknown: no metadata said it. To judge it: say the kind: --kind causal|bidirectional|cross, or meta blocks.decoder.kind"},
			Notes: []string{"decoder: axes guessed from the rank as \"layer head query key\" (no metadata, no --axes); if the array is [batch, head, query, key], pass --axes \"batch head query key\""}}, 80, 21, 0, colorprofile.ASCII},
		{"inferred_truecolor_80x21", &FindingsData{Done: true, Inferred: []string{"decoder: causal mask: 12 of 12 sampled heads have exact zeros after each query's position"}}, 80, 21, 0, colorprofile.TrueColor},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			c, _ := Findings(tc.d, tc.w, tc.h, tc.sel, styles(t, tc.p, true, "dawn"))
			golden.RequireEqual(t, c.Render(tc.p))
		})
	}
}

func traceFixture() *TraceData {
	// Rollout of the worked example in docs/methods.md (Abnar & Zuidema
	// 2020, eq. 1, derived there): query 1 -> [0.325, 0.675]; flow of the
	// same example -> [0.35, 0.75], not normalised: they sum to 1.1, so the
	// view shows 0.35/1.1 = 31.8% and 0.75/1.1 = 68.2%.
	return &TraceData{Block: "decoder", Query: 1, QueryToken: " cat", Side: "target", Tokens: []string{"<s>", " cat"},
		Methods: []TraceMethod{{Name: "rollout", Shares: []float64{0.325, 0.675}, Normalised: true}, {Name: "flow", Shares: []float64{0.35, 0.75}}}}
}

// traceUnnormalised is a target position explained by source tokens
// through cross-attention, where no method's shares sum to 1 (the demo's
// case: its gradient relevance, from the dL/dA of a whole loss, is of the
// order of 1e-5, and rollout through cross-attention sums above 1).
// Percentages of each method's total, worked by hand:
//
//	rollout [1.5, 3, 0.5, 1]     sum 6:     1.5/6 = 25.0%, 3/6 = 50.0%, 0.5/6 = 8.3%, 1/6 = 16.7%
//	grad    [2e-6, 5e-6, 1e-6, 0] sum 8e-6: 25.0%, 62.5%, 12.5%, 0.0%
//
// Bars are scaled to each method's largest share: rollout 1/2, 1, 1/6, 1/3
// of the bar; grad 2/5, 1, 1/5, 0.
func traceUnnormalised() *TraceData {
	return &TraceData{Block: "cross", Query: 5, QueryToken: "-", Side: "source", Tokens: []string{"the", "fourth", "of", "july"},
		Methods: []TraceMethod{
			{Name: "rollout", Shares: []float64{1.5, 3, 0.5, 1}},
			{Name: "flow", Note: "defined for self-attention stacks only"},
			{Name: "grad", Shares: []float64{2e-6, 5e-6, 1e-6, 0}},
		}}
}

// TestTraceUnnormalisedPercent reads the percentages and note lines of the
// rendered unnormalised case back and compares them with the hand-worked
// values above (and the flow example's 31.8% / 68.2%).
func TestTraceUnnormalisedPercent(t *testing.T) {
	st := styles(t, colorprofile.ASCII, true, "dawn")
	c, l := Trace(traceUnnormalised(), 80, 21, TraceOptions{}, st)
	lines := strings.Split(c.Plain(), "\n")
	for _, want := range []string{
		"rollout: shares are not normalised: they sum to 6; % is of that total",
		"grad: shares are not normalised: they sum to 8e-06; % is of that total",
		"flow: defined for self-attention stacks only",
		`0 "the": rollout 1.5 · flow – · grad 2e-06`, // the selected token's values, 4 significant digits
	} {
		if !strings.Contains(c.Plain(), want) {
			t.Errorf("no line %q:\n%s", want, c.Plain())
		}
	}
	want := [][]string{{"25.0%", "–", "25.0%"}, {"50.0%", "–", "62.5%"}, {"8.3%", "–", "12.5%"}, {"16.7%", "–", "0.0%"}}
	if len(l.Order) != 4 {
		t.Fatalf("%d rows shown, want 4", len(l.Order))
	}
	for i, p := range l.Order {
		var got []string
		for _, f := range strings.Fields(lines[l.TableY+i]) {
			if strings.HasSuffix(f, "%") || f == "–" {
				got = append(got, f)
			}
		}
		if strings.Join(got, " ") != strings.Join(want[p], " ") {
			t.Errorf("position %d: %v, want %v\n%s", p, got, want[p], lines[l.TableY+i])
		}
	}
	// Bars scaled to the largest share: with grad alone on the screen, each
	// row's bar (in eighths of a cell) over the longest is 2/5, 1, 1/5, 0,
	// within the rounding of a bar to eighths.
	g := traceUnnormalised()
	g.Methods = g.Methods[2:]
	c, l = Trace(g, 80, 21, TraceOptions{}, st)
	lines = strings.Split(c.Plain(), "\n")
	full := barEighths(lines[l.TableY+1])
	for p, ratio := range []float64{0.4, 1, 0.2, 0} {
		got := barEighths(lines[l.TableY+p])
		if full == 0 || math.Abs(float64(got)-ratio*float64(full)) > 1 {
			t.Errorf("position %d: bar of %d eighths, want %.2f of %d\n%s", p, got, ratio, full, c.Plain())
		}
	}
	small, _ := Trace(traceFixture(), 80, 21, TraceOptions{}, st)
	for _, w := range []string{"31.8%", "68.2%", "32.5%", "67.5%", "flow: shares are not normalised: they sum to 1.1"} {
		if !strings.Contains(small.Plain(), w) {
			t.Errorf("worked example: no %q\n%s", w, small.Plain())
		}
	}
}

// barEighths is the length of the bar glyphs in a line, in eighths of a cell.
func barEighths(line string) int {
	n := 0
	for _, r := range line {
		for i, e := range eighths {
			if i > 0 && r == e {
				n += i
			}
		}
	}
	return n
}

func TestTrace(t *testing.T) {
	long := &TraceData{Block: "decoder", Query: 15, QueryToken: " slept", Side: "target", Tokens: demoTokens,
		Methods: []TraceMethod{{Name: "rollout", Shares: make([]float64, 16), Normalised: true}, {Name: "grad", Shares: make([]float64, 16)}}}
	for i := range long.Tokens {
		long.Methods[0].Shares[i] = float64(i+1) / 136
		long.Methods[1].Shares[i] = math.NaN()
	}
	long.Methods[1].Note = "needs decoder/grad in the export"
	// the query at position 9 of 16: keys after it are future, one of them
	// reached by a leak; with what the model predicted and a summary
	answered := &TraceData{Block: "decoder", Query: 9, QueryToken: " was", Side: "target", Tokens: demoTokens,
		Predicted: `" warm", p 0.62 (logits)`, Summary: `by rollout, query 9 " was" draws most on " was" (9, 31%), " It" (8, 20%): 51% together`,
		Status:  make([]string, 16),
		Methods: []TraceMethod{{Name: "rollout", Shares: make([]float64, 16), Normalised: true}}}
	for i := range answered.Tokens {
		if i > 9 {
			answered.Status[i] = "future"
		} else {
			answered.Methods[0].Shares[i] = float64(i+1) / 56
		}
	}
	answered.Methods[0].Shares[10] = 0.02 // leaked
	cases := []struct {
		name string
		d    *TraceData
		w, h int
		opt  TraceOptions
		p    colorprofile.Profile
	}{
		{"small_truecolor_80x21", traceFixture(), 80, 21, TraceOptions{Selected: 1}, colorprofile.TrueColor},
		{"small_ascii_80x21", traceFixture(), 80, 21, TraceOptions{Selected: 1}, colorprofile.ASCII},
		{"long_byshare_ascii_80x12", long, 80, 12, TraceOptions{Selected: 3, ByShare: true}, colorprofile.ASCII},
		{"long_ascii_200x57", long, 200, 57, TraceOptions{Selected: 3}, colorprofile.ASCII},
		{"unnormalised_ascii_80x21", traceUnnormalised(), 80, 21, TraceOptions{Selected: 1}, colorprofile.ASCII},
		{"unnormalised_byshare_truecolor_80x21", traceUnnormalised(), 80, 21, TraceOptions{Selected: 1, ByShare: true}, colorprofile.TrueColor},
		{"answered_ascii_100x24", answered, 100, 24, TraceOptions{Selected: 9}, colorprofile.ASCII},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			c, _ := Trace(tc.d, tc.w, tc.h, tc.opt, styles(t, tc.p, true, "dawn"))
			golden.RequireEqual(t, c.Render(tc.p))
		})
	}
}

func TestCompare(t *testing.T) {
	a := causalMap(16, 1, demoTokens)
	b := causalMap(16, 0, demoTokens)
	diff := make([]float32, 256)
	for i := range diff {
		diff[i] = float32(math.Abs(float64(a.Weights[i] - b.Weights[i])))
	}
	d := NewMapData(16, 16, diff)
	d.Rule = causalRule
	d.QueryTokens, d.KeyTokens = demoTokens, demoTokens
	d.Measure = "|A−B|"
	d.Describe = func(q, k int) string {
		return "A " + FormatWeight(a.Weights[q*16+k]) + " B " + FormatWeight(b.Weights[q*16+k])
	}
	cd := &CompareData{NameA: "before.npz", NameB: "after.npz", Block: "decoder", Layer: 0, Head: 1, Diff: d, Done: true,
		Heads: []HeadChange{{0, 1, 0.31, 0.45, 0, 1}, {1, 0, 0.2, 0.3, 2, 3}, {0, 0, 0, 0, 0, 0}}}
	for _, tc := range []struct {
		name string
		w, h int
		p    colorprofile.Profile
	}{{"narrow_ascii_80x21", 80, 21, colorprofile.ASCII}, {"wide_ascii_200x57", 200, 57, colorprofile.ASCII}, {"wide_truecolor_120x30", 120, 30, colorprofile.TrueColor}} {
		t.Run(tc.name, func(t *testing.T) {
			c, _ := Compare(cd, tc.w, tc.h, MapOptions{CursorQ: 0, CursorK: 1}, 0, styles(t, tc.p, true, "dawn"))
			golden.RequireEqual(t, c.Render(tc.p))
		})
	}
}

func TestBars(t *testing.T) {
	for _, p := range []colorprofile.Profile{colorprofile.TrueColor, colorprofile.ASCII} {
		t.Run(p.String(), func(t *testing.T) {
			st := styles(t, p, true, "dawn")
			tabs := Tabs(80, []string{"Survey", "Map", "Findings"}, 1, "run7.npz", st)
			bar := Status(80, []Field{{"block", "decoder"}, {"L", "3"}, {"H", "7"}, {"B", "0"}}, "copied decoder:L3:H7:B0:q12", st.Good, st)
			golden.RequireEqual(t, tabs.Render(p)+"\n"+bar.Render(p))
		})
	}
}

// TestDownsampleKeepsLeak: one leaking cell in a 1024 x 1024 head stays
// visible at every zoom, with mean or max weights.
func TestDownsampleKeepsLeak(t *testing.T) {
	n := 1024
	d := causalMap(n, 0, nil)
	d.Weights[100*n+900] = 1e-3
	st := styles(t, colorprofile.ASCII, true, "dawn")
	for _, agg := range []Agg{AggMean, AggMax} {
		for zoom := 0; zoom < 12; zoom++ {
			opt := MapOptions{Zoom: zoom, CursorQ: 100, CursorK: 900, Agg: agg}
			c, l := RenderMap(d, 200, 57, opt, st)
			if !strings.ContainsRune(c.Plain(), GlyphForbidden) {
				t.Errorf("agg %v zoom %d (block %d): the leaking cell is not marked", agg, zoom, l.Block)
			}
		}
	}
}

// TestCellAtRoundTrip: clicking where a cell is drawn selects that cell.
func TestCellAtRoundTrip(t *testing.T) {
	d := causalMap(300, 0, nil)
	for _, p := range []colorprofile.Profile{colorprofile.TrueColor, colorprofile.ASCII} {
		st := styles(t, p, true, "dawn")
		for zoom := 0; zoom < 8; zoom++ {
			l := LayoutMap(d, 120, 40, MapOptions{Zoom: zoom, CursorQ: 150, CursorK: 140}, st)
			for pr := 0; pr < l.PixRows; pr += 3 {
				for pc := 0; pc < l.PixCols; pc += 5 {
					x := l.GridX + pc*l.MagX
					y := l.GridY + (pr*l.MagY)/l.RowsPerLine
					q, k, ok := l.CellAt(x, y)
					wq, wk := l.Q0+pr*l.Block, l.K0+pc*l.Block
					if (pr*l.MagY)%l.RowsPerLine != 0 {
						// the lower half of a line: a click gives the upper pixel
						wq -= l.Block
					}
					if !ok || q != wq || k != wk {
						t.Fatalf("%v zoom %d: CellAt(%d,%d) = %d,%d,%v, want %d,%d", p, zoom, x, y, q, k, ok, wq, wk)
					}
				}
			}
			if 150 < l.Q0 || 150 >= l.Q0+l.PageRows() || 140 < l.K0 || 140 >= l.K0+l.PageCols() {
				t.Fatalf("%v zoom %d: cursor (150, 140) outside the window at (%d, %d) + (%d, %d)", p, zoom, l.Q0, l.K0, l.PageRows(), l.PageCols())
			}
		}
	}
}

func TestRampGlyph(t *testing.T) {
	if RampGlyph(0) != ' ' || RampGlyph(math.NaN()) != ' ' || RampGlyph(1) != '@' || RampGlyph(2) != '@' {
		t.Fatalf("ramp ends: %q %q %q", RampGlyph(0), RampGlyph(1), RampGlyph(2))
	}
	prev := strings.IndexByte(Ramp, RampGlyph(1e-9))
	if prev != 1 {
		t.Fatalf("smallest positive value gives %q, want %q", RampGlyph(1e-9), Ramp[1])
	}
	for i := 1; i <= 1000; i++ {
		g := strings.IndexByte(Ramp, RampGlyph(float64(i)/1000))
		if g < prev {
			t.Fatalf("ramp not monotonic at %v", float64(i)/1000)
		}
		prev = g
	}
}

// TestLuma checks the relative luminance against WCAG 2's definition: white
// 1, black 0, and #777777 has contrast 4.48:1 with white (the WCAG
// technique G18 example value, from memory), so L = 1.05/4.48 - 0.05.
func TestLuma(t *testing.T) {
	for _, tc := range []struct {
		c    string
		want float64
	}{{"#ffffff", 1}, {"#000000", 0}, {"#777777", 1.05/4.48 - 0.05}} {
		if got := MustHex(tc.c).Luma(); math.Abs(got-tc.want) > 2e-3 {
			t.Errorf("Luma(%s) = %v, want %v", tc.c, got, tc.want)
		}
	}
}

func TestCanvasText(t *testing.T) {
	c := NewCanvas(8, 1)
	n := c.Text(0, 0, "a\tb中文x", Style{}, -1)
	if got := c.Plain(); got != "a→b中文x" || n != 8 {
		t.Fatalf("Text = %q (%d columns)", got, n)
	}
	c = NewCanvas(4, 1)
	c.Text(0, 0, "ab中", Style{}, -1)
	c.Text(3, 0, "中", Style{}, -1)
	if got := c.Plain(); got != "ab中 " && got != "ab  " {
		t.Logf("clipped wide rune: %q", got)
	}
	if w := StringWidth("中\n"); w != 3 {
		t.Fatalf("StringWidth = %d, want 3", w)
	}
}

func BenchmarkMapRender(b *testing.B) {
	n := 1024
	d := causalMap(n, 0, nil)
	st := NewStyles(colorprofile.TrueColor, true, Colormaps()[0])
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		c, _ := RenderMap(d, 200, 60, MapOptions{CursorQ: 500, CursorK: 400}, st)
		_ = c.String()
	}
}

// BenchmarkMapDraw is the Map with its pixels cached (a head seen before).
func BenchmarkMapDraw(b *testing.B) {
	n := 1024
	d := causalMap(n, 0, nil)
	st := NewStyles(colorprofile.TrueColor, true, Colormaps()[0])
	opt := MapOptions{CursorQ: 500, CursorK: 400}
	l := LayoutMap(d, 200, 60, opt, st)
	px := Downsample(d, l.Q0, l.K0, l.PixRows, l.PixCols, l.Block, opt.Agg)
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		_ = Map(d, px, l, opt, st).String()
	}
}

// Downsample reads the rules a row at a time when RowRuns is set: the
// pixels are the same as with Rule cell by cell, for max and mean, at
// several blocks, on a map that leaks one diagonal (so forbidden cells
// carry mass) with a NaN row.
func TestDownsampleRowRule(t *testing.T) {
	d := causalMap(37, 1, nil)
	d.Weights[5*37+3] = float32(math.NaN())
	byRow := *d
	byRow.RowRuns = func(q int) (ends []int32, rules []string) {
		for k := 0; k < d.K; k++ {
			r := d.Rule(q, k)
			if n := len(rules); n > 0 && rules[n-1] == r {
				ends[n-1] = int32(k + 1)
				continue
			}
			ends, rules = append(ends, int32(k+1)), append(rules, r)
		}
		return
	}
	for _, agg := range []Agg{AggMax, AggMean} {
		for _, block := range []int{1, 2, 5, 37} {
			n := (37 + block - 1) / block
			a := Downsample(d, 0, 0, n, n, block, agg)
			b := Downsample(&byRow, 0, 0, n, n, block, agg)
			if !reflect.DeepEqual(a.Rule, b.Rule) || !slices.Equal(a.Forbid, b.Forbid) ||
				fmt.Sprint(a.Weight) != fmt.Sprint(b.Weight) || !slices.Equal(a.Kind, b.Kind) {
				t.Errorf("agg %v block %d: RowRuns pixels differ from Rule's", agg, block)
			}
			if block == 1 && a.Forbid[0*37+1] == 0 {
				t.Errorf("block 1: the leaking cell (0, 1) is not marked")
			}
		}
	}
}

// A head held as float16 patterns (NewMapData16) draws exactly as the same
// head converted to float32 (NewMapData): the same colour scale, pixels and
// Map, cursor readout included. The patterns are random float16 values in
// [0, 1) with exact zeros, a NaN and a leak, in float16 and in bfloat16;
// their float32 values come from the loader's tables (checked against numpy
// and PyTorch in loader/convert_test.go).
func TestMapData16SameAsFloat32(t *testing.T) {
	for _, c := range []struct {
		dt       loader.DType
		one, nan uint16
	}{{loader.Float16, 0x3c00, 0x7e00}, {loader.BFloat16, 0x3f80, 0x7fc0}} {
		testMapData16(t, loader.RawTable(c.dt), c.one, c.nan)
	}
}

func testMapData16(t *testing.T, tab *[65536]float32, one, nan uint16) {
	n := 53
	rng := rand.New(rand.NewSource(5))
	raw := make([]uint16, n*n)
	for i := range raw {
		if i%n <= i/n+1 && rng.Intn(5) != 0 { // allowed keys, one diagonal too many
			raw[i] = uint16(rng.Intn(int(one)))
		}
	}
	raw[7*n+2] = nan
	w := make([]float32, len(raw))
	for i, p := range raw {
		w[i] = tab[p]
	}
	a, b := NewMapData(n, n, w), NewMapData16(n, n, raw, tab)
	a.Rule, b.Rule = causalRule, causalRule
	if a.VMax != b.VMax || a.VMaxNoSink != b.VMaxNoSink {
		t.Fatalf("scale: float32 %v %v, patterns %v %v", a.VMax, a.VMaxNoSink, b.VMax, b.VMaxNoSink)
	}
	st := NewStyles(colorprofile.TrueColor, true, Colormaps()[0])
	for _, opt := range []MapOptions{{CursorQ: 10, CursorK: 11}, {CursorQ: 40, CursorK: 3, Zoom: 2, Agg: AggMean}} {
		ca, _ := RenderMap(a, 120, 40, opt, st)
		cb, _ := RenderMap(b, 120, 40, opt, st)
		if ca.String() != cb.String() {
			t.Errorf("zoom %d: the Map of the patterns differs from the float32 one", opt.Zoom)
		}
	}
	if a.At(7, 2) == a.At(7, 2) || b.At(7, 2) == b.At(7, 2) || a.At(3, 1) != b.At(3, 1) {
		t.Errorf("At: float32 %v %v, patterns %v %v", a.At(7, 2), a.At(3, 1), b.At(7, 2), b.At(3, 1))
	}
}

// A head large enough for NewMapData16 and Downsample to split it over the
// processors gives the same scale and pixels whatever the number of
// processors, and the same as the head converted to float32 (NewMapData):
// float16 patterns with negative values, NaN and +Inf (which the scale
// leaves out), and a causal mask given as row runs.
func TestLargeHeadInChunks(t *testing.T) {
	defer runtime.GOMAXPROCS(runtime.GOMAXPROCS(0))
	const q, k = 1100, 1000 // 1.1 M cells: over the size that is split
	tab := loader.RawTable(loader.Float16)
	rng := rand.New(rand.NewSource(9))
	raw := make([]uint16, q*k)
	for i := range raw {
		c := rng.Intn(1000)
		if (i/k)%7 != 0 {
			c += 20 // most rows without negative or non-finite values
		}
		switch {
		case c == 0:
			raw[i] = 0x7e00 // NaN
		case c == 1:
			raw[i] = 0x7c00 // +Inf
		case c < 20:
			raw[i] = 0x8000 | uint16(rng.Intn(0x3c00)) // negative
		case i%k <= i/k+1: // allowed, and one diagonal too many
			raw[i] = uint16(rng.Intn(0x3c00))
		}
	}
	raw[3*k+500] = 0x7c00 // +Inf alone in a row otherwise finite and positive
	w := make([]float32, len(raw))
	for i, p := range raw {
		w[i] = tab[p]
	}
	runs := func(row int) ([]int32, []string) {
		if row+1 >= k {
			return []int32{k}, []string{""}
		}
		return []int32{int32(row + 1), k}, []string{"", "causal"}
	}
	var px []*Pixels
	var scale [][2]float32
	for _, procs := range []int{1, 3} {
		runtime.GOMAXPROCS(procs)
		for _, d := range []*MapData{NewMapData(q, k, w), NewMapData16(q, k, raw, tab)} {
			d.RowRuns, d.Tol = runs, 1e-6
			scale = append(scale, [2]float32{d.VMax, d.VMaxNoSink})
			for _, agg := range []Agg{AggMean, AggMax} {
				// the whole head (split over the processors) and a zoomed window
				px = append(px, Downsample(d, 0, 0, 100, 100, 11, agg), Downsample(d, 5, 17, 40, 70, 3, agg))
			}
		}
	}
	for i := range scale {
		if scale[i] != scale[0] {
			t.Errorf("scale %d: %v, want %v", i, scale[i], scale[0])
		}
	}
	if scale[0][0] <= 0 || scale[0][0] > 1 {
		t.Errorf("scale %v: not the largest finite weight in [0, 1)", scale[0])
	}
	for i := 4; i < len(px); i++ {
		a, b := px[i%4], px[i]
		same := len(a.Weight) == len(b.Weight) && slices.Equal(a.Rule, b.Rule)
		for j := range a.Weight {
			same = same && (a.Weight[j] == b.Weight[j] || a.Weight[j] != a.Weight[j] && b.Weight[j] != b.Weight[j]) && a.Forbid[j] == b.Forbid[j]
		}
		if !same {
			t.Errorf("pixels %d differ from pixels %d", i, i%4)
		}
	}
}

// laneMax, the scale's four-lanes-a-word maximum, is the plain maximum of
// patterns below 0x8000 and flags (bit 15 of its OR) a pattern with the sign
// bit wherever it is, for every length and position.
func TestLaneMax(t *testing.T) {
	rng := rand.New(rand.NewSource(3))
	for n := 0; n < 70; n++ {
		for trial := 0; trial < 20; trial++ {
			xs := make([]uint16, n)
			for i := range xs {
				xs[i] = uint16(rng.Intn(0x8000))
			}
			neg := n > 0 && trial%2 == 1
			if neg {
				xs[rng.Intn(n)] |= 0x8000
			}
			mx, or := laneMax(xs)
			if got := or&0x8000 != 0; got != neg {
				t.Fatalf("n=%d %v: sign flagged %v, want %v", n, xs, got, neg)
			}
			if !neg && (n > 0 && mx != slices.Max(xs) || n == 0 && mx != 0) {
				t.Fatalf("n=%d %v: max %d", n, xs, mx)
			}
		}
	}
}
