package main

import (
	"bytes"
	"encoding/json"
	"encoding/xml"
	"image/png"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"

	"github.com/heed-dev/heed/internal/testpy"
	"github.com/heed-dev/heed/picture"
)

// numpyForbidden asks numpy which cells of one head carry mass although the
// causal rule forbids them (k > q, weight > heed's default tolerance 1e-6),
// as a list of keys per query row. shift_bad.npz's axes are "layer batch
// head query key" (its metadata).
func numpyForbidden(t *testing.T, file string, layer, batch, head int) [][]int {
	t.Helper()
	py := testpy.Require(t, "numpy")
	out, err := exec.Command(py, "-c", `
import json, sys, numpy as np
a = np.load(sys.argv[1])["decoder/attn"][int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4])]
q, k = np.indices(a.shape)
bad = (k > q) & (a > 1e-6)
print(json.dumps([np.nonzero(row)[0].tolist() for row in bad]))
`, file, strconv.Itoa(layer), strconv.Itoa(batch), strconv.Itoa(head)).CombinedOutput()
	if err != nil {
		t.Fatalf("numpy: %v: %s", err, out)
	}
	var rows [][]int
	if err := json.Unmarshal(out, &rows); err != nil {
		t.Fatalf("numpy output %q: %v", out, err)
	}
	return rows
}

// TestRenderForbiddenCellsMatchNumpy: in a plain-text Map (no colour, so the
// glyph ramp and '!' carry everything), the cells marked forbidden-with-mass
// are exactly those numpy finds in the file.
func TestRenderForbiddenCellsMatchNumpy(t *testing.T) {
	file := filepath.Join(casesDir, "shift_bad.npz")
	want := numpyForbidden(t, file, 1, 1, 2)
	out := filepath.Join(t.TempDir(), "map.txt")
	if msg, code := run(t, "render", file, "--at", "decoder:L1:H2:B1", "-o", out); code != 0 {
		t.Fatalf("render: exit %d: %s", code, msg)
	}
	data, err := os.ReadFile(out)
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(string(data), "\n")
	if !strings.HasPrefix(lines[0], "# heed render decoder:L1:H2:B1") || !strings.Contains(lines[1], "decoder:L1:H2:B1") {
		t.Fatalf("marker and title: %q %q", lines[0], lines[1])
	}
	// The key labels start the grid's first column; query rows are
	// "<index> <token> <cells>".
	g0 := -1
	rowRE := regexp.MustCompile(`^ *(\d+) \S+ +`)
	rows := map[int]string{}
	for _, l := range lines[2:] {
		if g0 < 0 && strings.TrimSpace(l) != "" {
			g0 = len(l) - len(strings.TrimLeft(l, " "))
			continue
		}
		if m := rowRE.FindStringSubmatch(l); m != nil && g0 >= 0 {
			q, _ := strconv.Atoi(m[1])
			rows[q] = l
		}
	}
	if len(rows) != len(want) {
		t.Fatalf("%d query rows drawn, numpy has %d:\n%s", len(rows), len(want), data)
	}
	// Columns per key, from the first forbidden cell of row 0.
	first := strings.IndexByte(rows[0], '!')
	if len(want[0]) == 0 || first < g0 || (first-g0)%want[0][0] != 0 {
		t.Fatalf("row 0: first '!' at %d, grid at %d, numpy %v:\n%s", first, g0, want[0], data)
	}
	mag := (first - g0) / want[0][0]
	for q, keys := range want {
		runes := []rune(rows[q])
		var got []int
		for x := g0; x < len(runes); x += mag {
			if runes[x] == '!' {
				got = append(got, (x-g0)/mag)
			}
		}
		if strings.Count(rows[q], "!") != mag*len(keys) || !slices.Equal(got, keys) {
			t.Errorf("row %d: forbidden keys %v, numpy %v: %q", q, got, keys, rows[q])
		}
	}
}

// svgText parses an SVG render: its title, its <desc>, and its text runs
// (aria-label -> transform).
func svgText(t *testing.T, data []byte) (title, desc string, runs map[string]string) {
	t.Helper()
	dec := xml.NewDecoder(bytes.NewReader(data))
	runs = map[string]string{}
	var in string
	for {
		tok, err := dec.Token()
		if err != nil {
			break
		}
		switch e := tok.(type) {
		case xml.StartElement:
			in = e.Name.Local
			if e.Name.Local == "g" {
				var label, tf string
				for _, a := range e.Attr {
					switch a.Name.Local {
					case "aria-label":
						label = a.Value
					case "transform":
						tf = a.Value
					}
				}
				if label != "" {
					runs[label] = tf
				}
			}
		case xml.CharData:
			switch in {
			case "title":
				title += string(e)
			case "desc":
				desc += string(e)
			}
		case xml.EndElement:
			in = ""
		}
	}
	return title, desc, runs
}

// TestRenderFigures: the PNG and SVG of every screen are at most
// picture.MaxFigureWidth wide, carry the location in their title and
// marker, show no cursor glyph, and label the Map's keys with whole tokens
// turned to read upwards.
func TestRenderFigures(t *testing.T) {
	bad, good := filepath.Join(casesDir, "shift_bad.npz"), filepath.Join(casesDir, "shift_good.npz")
	dir := t.TempDir()
	for _, tc := range []struct {
		screen string
		files  []string
		shown  string
		want   []string
	}{
		{"map", []string{bad}, "decoder:L0:H1:B0:q4:k4", []string{"query (target token, row)", "key (target token, position)", "attention weight"}},
		{"compare", []string{good, bad}, "decoder:L0:H1:B0:q4:k4", []string{"|A−B| of the attention weights"}},
		{"trace", []string{good}, "decoder:L0:H1:B0:q4", []string{"rollout", "flow", "grad"}},
		{"survey", []string{bad}, "decoder:L0:H1:B0", []string{"head", "layer", "entropy (nats)"}},
		{"findings", []string{bad}, "decoder:L0:H1:B0", nil},
	} {
		for _, ext := range []string{"png", "svg"} {
			out := filepath.Join(dir, tc.screen+"."+ext)
			args := append(append([]string{"render"}, tc.files...), "--at", "decoder:L0:H1:q4", "--screen", tc.screen, "-o", out)
			if msg, code := run(t, args...); code != 0 {
				t.Fatalf("%s %s: exit %d: %s", tc.screen, ext, code, msg)
			}
			data := mustRead(t, out)
			if ext == "png" {
				img, err := png.Decode(bytes.NewReader(data))
				if err != nil {
					t.Fatalf("%s: image/png: %v", tc.screen, err)
				}
				if b := img.Bounds(); b.Dx() > picture.MaxFigureWidth {
					t.Errorf("%s: PNG %d px wide, want at most %d", tc.screen, b.Dx(), picture.MaxFigureWidth)
				}
				meta, err := picture.PNGText(data)
				if err != nil || !strings.HasPrefix(meta["Software"], "heed render "+tc.shown+" "+tc.screen) || !strings.Contains(meta["Title"], tc.shown) {
					t.Errorf("%s: PNG tEXt %v %v, want %s", tc.screen, meta, err, tc.shown)
				}
				continue
			}
			title, desc, runs := svgText(t, data)
			if !strings.Contains(title, tc.shown) {
				t.Errorf("%s: SVG title %q, want %s", tc.screen, title, tc.shown)
			}
			for _, w := range tc.want {
				if _, ok := runs[w]; !ok {
					t.Errorf("%s: no text run %q", tc.screen, w)
				}
			}
			for r := range runs {
				if strings.ContainsAny(r, "+▼") {
					t.Errorf("%s: text run %q looks like a cursor", tc.screen, r)
				}
			}
			switch tc.screen {
			case "map":
				// shift_bad's target tokens label the keys, one run each, turned
				turned := 0
				for r, tf := range runs {
					if strings.Contains(tf, "rotate(-90)") && regexp.MustCompile(` \d+$`).MatchString(r) {
						turned++
					}
				}
				if turned < 8 {
					t.Errorf("map: %d key labels turned to read upwards; runs %v", turned, runs)
				}
			case "findings":
				if !strings.Contains(desc, "shifted by +1") {
					t.Errorf("findings: desc lacks the finding: %q", desc)
				}
			}
		}
	}
}

// TestRenderPagesLongSequences: a 300-token export's Map and Trace show 64
// positions ending at the query, and say so; --from/--to pick others.
func TestRenderPagesLongSequences(t *testing.T) {
	py := testpy.Require(t, "numpy")
	dir := t.TempDir()
	file := filepath.Join(dir, "long.npz")
	if out, err := exec.Command(py, "../../tui/testdata/make_export.py", file, "--leak", "--seq", "300").CombinedOutput(); err != nil {
		t.Fatalf("make_export.py: %v: %s", err, out)
	}
	const how = " shown; --from/--to pick the positions"
	for _, tc := range []struct {
		args []string
		note string
	}{
		{[]string{"--at", "decoder:L1:H2:q200"}, "queries and keys 137–200 of 300" + how},
		{[]string{"--at", "decoder:L1:H2:q10"}, "queries and keys 0–63 of 300" + how},
		{[]string{"--at", "decoder:L1:H2:q200", "--from", "100", "--to", "149"}, "queries and keys 100–149 of 300" + how},
		{[]string{"--at", "decoder:L1:H2:q200", "--screen", "trace"}, "target tokens 137–200 of 300" + how},
	} {
		out := filepath.Join(dir, "fig.svg")
		if msg, code := run(t, append(append([]string{"render", file}, tc.args...), "-o", out)...); code != 0 {
			t.Fatalf("%v: exit %d: %s", tc.args, code, msg)
		}
		_, _, runs := svgText(t, mustRead(t, out))
		if _, ok := runs[tc.note]; !ok {
			t.Errorf("%v: no note %q", tc.args, tc.note)
		}
	}
	for _, args := range [][]string{
		{"--at", "decoder:L1:H2", "--from", "0", "--to", "299"}, // over 256 positions
		{"--at", "decoder:L1:H2", "--from", "300"},              // past the end
		{"--at", "decoder:L1:H2", "--from", "20", "--to", "10"}, // backwards
		{"--at", "decoder:L1:H2", "--from", "0", "--screen", "findings"},
	} {
		out := filepath.Join(dir, "bad.png")
		if msg, code := run(t, append(append([]string{"render", file}, args...), "-o", out)...); code != 2 {
			t.Errorf("%v: exit %d, want 2: %s", args, code, msg)
		}
		if _, err := os.Stat(out); err == nil {
			t.Errorf("%v: wrote %s", args, out)
			os.Remove(out)
		}
	}
	if msg, code := run(t, "render", file, "--at", "decoder:L1:H2", "--from", "0", "-o", filepath.Join(dir, "a.txt")); code != 2 {
		t.Errorf("--from with a text render: exit %d: %s", code, msg)
	}
}

func TestRenderScreens(t *testing.T) {
	dir := t.TempDir()
	bad, good := filepath.Join(casesDir, "shift_bad.npz"), filepath.Join(casesDir, "shift_good.npz")
	for _, tc := range []struct {
		screen string
		files  []string
		want   []string
	}{
		{"survey", []string{bad}, []string{"heed · survey · decoder:L1:H2", "entropy"}},
		{"findings", []string{bad}, []string{"heed · findings", "shifted by +1", "evidence to confirm"}},
		{"trace", []string{good}, []string{"heed · trace · decoder:L1:H2:B0:q5", "rollout"}},
		{"compare", []string{good, bad}, []string{"heed · compare", "|A−B|"}},
	} {
		out := filepath.Join(dir, tc.screen+".txt")
		args := append(append([]string{"render"}, tc.files...), "--at", "decoder:L1:H2:q5", "--screen", tc.screen, "-o", out)
		if msg, code := run(t, args...); code != 0 {
			t.Errorf("%s: exit %d: %s", tc.screen, code, msg)
			continue
		}
		data, _ := os.ReadFile(out)
		for _, w := range tc.want {
			if !strings.Contains(string(data), w) {
				t.Errorf("%s: no %q in\n%s", tc.screen, w, data)
			}
		}
	}
}

func TestRenderReplacesOnlyRenders(t *testing.T) {
	file := filepath.Join(casesDir, "shift_bad.npz")
	dir := t.TempDir()
	out := filepath.Join(dir, "pic.png")
	if msg, code := run(t, "render", file, "--at", "decoder:L0:H0", "-o", out); code != 0 {
		t.Fatalf("exit %d: %s", code, msg)
	}
	// a previous render is replaced
	if msg, code := run(t, "render", file, "--at", "decoder:L1:H3", "-o", out); code != 0 {
		t.Fatalf("replacing a render: exit %d: %s", code, msg)
	}
	if meta, _ := picture.PNGText(mustRead(t, out)); !strings.Contains(meta["Software"], "decoder:L1:H3") {
		t.Errorf("not replaced: %v", meta)
	}
	// someone's file is kept unless --force
	mine := filepath.Join(dir, "notes.txt")
	os.WriteFile(mine, []byte("my notes\n"), 0o644)
	msg, code := run(t, "render", file, "--at", "decoder:L0:H0", "-o", mine)
	if code != 2 {
		t.Errorf("foreign file: exit %d: %s", code, msg)
	}
	if string(mustRead(t, mine)) != "my notes\n" {
		t.Error("foreign file changed")
	}
	if msg, code := run(t, "render", file, "--at", "decoder:L0:H0", "-o", mine, "--force"); code != 0 {
		t.Errorf("--force: exit %d: %s", code, msg)
	}
	ents, _ := os.ReadDir(dir)
	for _, e := range ents {
		if strings.Contains(e.Name(), ".tmp-") {
			t.Errorf("temporary file %s left", e.Name())
		}
	}
}

func mustRead(t *testing.T, path string) []byte {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

func TestRenderBadInput(t *testing.T) {
	file := filepath.Join(casesDir, "shift_bad.npz")
	dir := t.TempDir()
	for _, args := range [][]string{
		{"render", file, "-o", filepath.Join(dir, "a.png")},                                     // no --at
		{"render", file, "--at", "decoder:L0:H0"},                                               // no -o
		{"render", file, "--at", "decoder:L0:H0", "-o", filepath.Join(dir, "a.jpg")},            // format
		{"render", file, "--at", "decoder:L0:H0", "-o", filepath.Join(dir, "a.png"), "--color"}, // --color on png
		{"render", file, "--at", "decoder:L9:H0", "-o", filepath.Join(dir, "a.png")},            // outside the block
		{"render", file, "--at", "encoder:L0:H0", "-o", filepath.Join(dir, "a.png")},            // no such block
		{"render", file, "--at", "decoder:L0:H0", "--screen", "x", "-o", filepath.Join(dir, "a.png")},
		{"render", file, "--at", "decoder:L0:H0", "--screen", "compare", "-o", filepath.Join(dir, "a.png")}, // one export
		{"render", filepath.Join(casesDir, "expected.json"), "--at", "decoder:L0:H0", "-o", filepath.Join(dir, "a.png")},
		{"render", file, "--at", "decoder:L0:H0", "-o", filepath.Join(dir, "missing", "a.png")},
	} {
		if msg, code := run(t, args...); code != 2 {
			t.Errorf("%v: exit %d, want 2: %s", args[2:], code, msg)
		}
	}
	if ents, _ := os.ReadDir(dir); len(ents) != 0 {
		t.Errorf("bad input left files: %v", ents)
	}
}
