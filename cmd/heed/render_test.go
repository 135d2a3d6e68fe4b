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
	"strconv"
	"strings"
	"testing"

	"github.com/charmbracelet/x/ansi"
	"github.com/heed-dev/heed/picture"
)

func heedPython() string {
	if p := os.Getenv("HEED_PYTHON"); p != "" {
		return p
	}
	return "/usr/bin/python3"
}

// numpyForbidden asks numpy which cells of one head carry mass although the
// causal rule forbids them (k > q, weight > heed's default tolerance 1e-6),
// as a list of keys per query row. shift_bad.npz's axes are "layer batch
// head query key" (its metadata).
func numpyForbidden(t *testing.T, file string, layer, batch, head int) [][]int {
	t.Helper()
	py := heedPython()
	if err := exec.Command(py, "-c", "import numpy").Run(); err != nil {
		t.Skipf("skipping: %s cannot import numpy (Debian's python3-numpy; set HEED_PYTHON)", py)
	}
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
		if strings.Count(rows[q], "!") != mag*len(keys) || !equalInts(got, keys) {
			t.Errorf("row %d: forbidden keys %v, numpy %v: %q", q, got, keys, rows[q])
		}
	}
}

func equalInts(a, b []int) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
}

// TestRenderFormatsAgree: the PNG and the SVG are the colour text render's
// cells, CellW x CellH pixels each plus the margin.
func TestRenderFormatsAgree(t *testing.T) {
	file := filepath.Join(casesDir, "shift_bad.npz")
	dir := t.TempDir()
	at := "decoder:L0:H1:q4"
	shown := "decoder:L0:H1:B0:q4:k4" // the block has two batch items: the title names the item, and the cursor's cell
	for _, ext := range []string{"png", "svg", "txt"} {
		args := []string{"render", file, "--at", at, "-o", filepath.Join(dir, "m."+ext)}
		if ext == "txt" {
			args = append(args, "--color")
		}
		if msg, code := run(t, args...); code != 0 {
			t.Fatalf("render %s: exit %d: %s", ext, code, msg)
		}
	}
	txt, _ := os.ReadFile(filepath.Join(dir, "m.txt"))
	lines := strings.Split(strings.TrimSuffix(string(txt), "\n"), "\n")[1:]
	if !strings.Contains(string(txt), "\x1b[") {
		t.Error("--color text has no escape sequences")
	}
	cols := 0
	for _, l := range lines {
		cols = max(cols, ansi.StringWidth(l))
	}
	wantW, wantH := 2*picture.Pad+cols*picture.CellW, 2*picture.Pad+len(lines)*picture.CellH

	pngData, _ := os.ReadFile(filepath.Join(dir, "m.png"))
	img, err := png.Decode(bytes.NewReader(pngData))
	if err != nil {
		t.Fatalf("image/png: %v", err)
	}
	if b := img.Bounds(); b.Dx() != wantW || b.Dy() != wantH {
		t.Errorf("PNG %dx%d, want %dx%d (%d x %d cells)", b.Dx(), b.Dy(), wantW, wantH, cols, len(lines))
	}
	meta, err := picture.PNGText(pngData)
	if err != nil || !strings.HasPrefix(meta["Software"], "heed render "+shown+" map") || !strings.Contains(meta["Title"], shown) {
		t.Errorf("PNG tEXt %v %v", meta, err)
	}

	svgData, _ := os.ReadFile(filepath.Join(dir, "m.svg"))
	var root struct {
		XMLName xml.Name
		Width   string `xml:"width,attr"`
		Height  string `xml:"height,attr"`
		Title   string `xml:"title"`
		Desc    string `xml:"desc"`
	}
	if err := xml.Unmarshal(svgData, &root); err != nil {
		t.Fatalf("encoding/xml: %v", err)
	}
	if root.XMLName.Local != "svg" || root.Width != strconv.Itoa(wantW) || root.Height != strconv.Itoa(wantH) {
		t.Errorf("SVG %s %sx%s, want svg %dx%d", root.XMLName.Local, root.Width, root.Height, wantW, wantH)
	}
	if !strings.Contains(root.Title, shown) || !strings.Contains(root.Desc, "■ leak") {
		t.Errorf("SVG title %q, desc lacks the legend", root.Title)
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
