package picture

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"encoding/xml"
	"flag"
	"image"
	"image/png"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"github.com/heed-dev/heed/internal/testpy"
	"github.com/heed-dev/heed/views"
	"golang.org/x/image/font"
	"golang.org/x/image/font/gofont/gomono"
	"golang.org/x/image/font/opentype"
	"golang.org/x/image/math/fixed"
)

var update = flag.Bool("update", false, "rewrite the golden files")

// golden compares got with testdata/<test name>/<name>, or rewrites it with -update.
func golden(t *testing.T, name string, got []byte) {
	t.Helper()
	path := filepath.Join("testdata", t.Name(), name)
	if *update {
		if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(path, got, 0o644); err != nil {
			t.Fatal(err)
		}
		return
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (run go test ./picture -update to create it)", err)
	}
	if !bytes.Equal(got, want) {
		t.Errorf("%s differs from the golden file (go test ./picture -update rewrites it after review):\ngot:\n%s\nwant:\n%s", path, got, want)
	}
}

var (
	red   = views.RGB(0xee, 0x33, 0x22)
	green = views.RGB(0x22, 0xaa, 0x44)
	blue  = views.RGB(0x11, 0x44, 0xcc)
)

// fixture is a hand-built canvas with one of each thing a picture draws:
// glyphs in the four faces, faint, underline and reverse text, half and
// full blocks, a quadrant, a shade, a wide rune and a rune Go Mono lacks.
func fixture() *views.Canvas {
	c := views.NewCanvas(12, 4)
	c.Text(0, 0, "heed Ag", views.Style{FG: blue, Attr: views.Bold}, -1)
	c.Set(8, 0, '▀', views.Style{FG: red, BG: green})
	c.Set(9, 0, '▀', views.Style{FG: red, BG: green})
	c.Set(10, 0, '█', views.Style{FG: red})
	c.Set(11, 0, '▄', views.Style{FG: red, BG: blue})
	c.Set(0, 1, '▚', views.Style{FG: red, BG: green})
	c.Set(1, 1, '▒', views.Style{FG: views.RGB(0, 0, 0), BG: views.RGB(200, 200, 200)})
	c.Text(2, 1, "ul", views.Style{Attr: views.Underline}, -1)
	c.Text(5, 1, "rev", views.Style{FG: green, Attr: views.Reverse}, -1)
	c.Text(9, 1, "dim", views.Style{Attr: views.Faint}, -1)
	c.Text(0, 2, "漢↵", views.Style{FG: red}, -1)
	c.Text(4, 2, "x", views.Style{Attr: views.Italic}, -1)
	c.Text(5, 2, "y", views.Style{Attr: views.Bold | views.Italic}, -1)
	c.Text(6, 2, "─┼│", views.Style{}, -1)
	c.Text(0, 3, "q 3 · 0.25", views.Style{}, -1)
	return c
}

func decode(t *testing.T, b []byte) image.Image {
	t.Helper()
	img, err := png.Decode(bytes.NewReader(b))
	if err != nil {
		t.Fatalf("image/png cannot decode the picture: %v", err)
	}
	return img
}

func at(img image.Image, x, y int) views.Colour {
	r, g, b, _ := img.At(x, y).RGBA()
	return views.RGB(uint8(r>>8), uint8(g>>8), uint8(b>>8))
}

// centre of the cell (cx, cy) at eighths (fx, fy) of its width and height.
func cellPoint(cx, cy, fx, fy int) (int, int) {
	return Pad + cx*CellW + fx*CellW/8, Pad + cy*CellH + fy*CellH/8
}

func TestPNGGeometry(t *testing.T) {
	c := fixture()
	b, err := PNG(c, Options{Title: "fixture"})
	if err != nil {
		t.Fatal(err)
	}
	img := decode(t, b)
	if got, want := img.Bounds().Size(), image.Pt(2*Pad+12*CellW, 2*Pad+4*CellH); got != want {
		t.Fatalf("size %v, want %v", got, want)
	}
	// Block elements as the Unicode Standard's Block Elements chart
	// (U+2580-U+259F) defines them.
	checks := []struct {
		name           string
		cx, cy, fx, fy int
		want           views.Colour
	}{
		{"U+2580 upper half: fg on top", 8, 0, 4, 2, red},
		{"U+2580 upper half: bg below", 8, 0, 4, 6, green},
		{"U+2580 next cell", 9, 0, 4, 2, red},
		{"U+2588 full block", 10, 0, 4, 7, red},
		{"U+2584 lower half: bg on top", 11, 0, 4, 2, blue},
		{"U+2584 lower half: fg below", 11, 0, 4, 6, red},
		{"U+259A upper left", 0, 1, 2, 2, red},
		{"U+259A upper right", 0, 1, 6, 2, green},
		{"U+259A lower left", 0, 1, 2, 6, green},
		{"U+259A lower right", 0, 1, 6, 6, red},
		{"reverse: the foreground is the background", 5, 1, 0, 0, green},
		{"space in the default colours", 11, 3, 4, 4, lightBG},
	}
	if got := at(img, 2, 2); got != lightBG {
		t.Errorf("page margin: %s, want %s", got.Hex(), lightBG.Hex())
	}
	for _, ck := range checks {
		x, y := cellPoint(ck.cx, ck.cy, ck.fx, ck.fy)
		if got := at(img, x, y); got != ck.want {
			t.Errorf("%s at (%d, %d): %s, want %s", ck.name, x, y, got.Hex(), ck.want.Hex())
		}
	}
	// U+2592 medium shade: half foreground, half background.
	x, y := cellPoint(1, 1, 4, 4)
	if r, _, _ := at(img, x, y).Channels(); r < 99 || r > 101 {
		t.Errorf("medium shade of black on 200 grey: %d, want 100", r)
	}
	// Box drawing (U+2500 light horizontal, U+253C cross, U+2502 light
	// vertical) reaches the cell edges, so lines join across cells.
	for _, p := range []struct{ x, y int }{
		{Pad + 6*CellW, Pad + 2*CellH + CellH/2},             // ─ left edge
		{Pad + 7*CellW + CellW - 1, Pad + 2*CellH + CellH/2}, // ┼ right edge
		{Pad + 8*CellW + CellW/2, Pad + 2*CellH},             // │ top edge
		{Pad + 8*CellW + CellW/2, Pad + 3*CellH - 1},         // │ bottom edge
	} {
		if got := at(img, p.x, p.y); got != lightFG {
			t.Errorf("box drawing at (%d, %d): %s, want %s", p.x, p.y, got.Hex(), lightFG.Hex())
		}
	}
	// Text cells hold glyph pixels in their colour; bold blue "h".
	if n := countColour(img, cellRect(0, 0, 1), blue); n < 10 {
		t.Errorf("glyph h: %d blue pixels", n)
	}
	// Underline: a line one pixel high, 2 px below the baseline, under "ul".
	for cx := 2; cx < 4; cx++ {
		x, y := Pad+cx*CellW+4, Pad+1*CellH+Baseline+2
		if got := at(img, x, y); got != lightFG {
			t.Errorf("underline at cell %d: %s, want %s", cx, got.Hex(), lightFG.Hex())
		}
	}
	// Faint text is lighter than normal text: its darkest pixel is not the foreground.
	if n := countColour(img, cellRect(9, 1, 3), lightFG); n != 0 {
		t.Errorf("faint text has %d pixels of full foreground", n)
	}
	// A rune Go Mono lacks is an empty box in the foreground colour: the
	// wide one spans two cells.
	if n := countColour(img, cellRect(0, 2, 2), red); n < 2*(2*CellW-4) {
		t.Errorf("box for a missing wide glyph: %d red pixels", n)
	}
}

func cellRect(cx, cy, cells int) image.Rectangle {
	x, y := Pad+cx*CellW, Pad+cy*CellH
	return image.Rect(x, y, x+cells*CellW, y+CellH)
}

func countColour(img image.Image, r image.Rectangle, c views.Colour) int {
	n := 0
	for y := r.Min.Y; y < r.Max.Y; y++ {
		for x := r.Min.X; x < r.Max.X; x++ {
			if at(img, x, y) == c {
				n++
			}
		}
	}
	return n
}

// TestGlyphsMatchOpentype draws glyphs with x/image/font/opentype's own face
// (font.Drawer) and compares them with picture's rasterisation of the same
// outlines.
func TestGlyphsMatchOpentype(t *testing.T) {
	f, err := opentype.Parse(gomono.TTF)
	if err != nil {
		t.Fatal(err)
	}
	face, err := opentype.NewFace(f, &opentype.FaceOptions{Size: FontSize, DPI: 72, Hinting: font.HintingNone})
	if err != nil {
		t.Fatal(err)
	}
	text := "Ag@q0.|"
	ref := image.NewRGBA(image.Rect(0, 0, 2*Pad+len(text)*CellW, 2*Pad+CellH))
	for i := range ref.Pix {
		ref.Pix[i] = 255
	}
	d := font.Drawer{Dst: ref, Src: image.Black, Face: face, Dot: fixed.P(Pad, Pad+Baseline)}
	d.DrawString(text)
	if d.Dot.X != fixed.I(Pad+len(text)*CellW) {
		t.Errorf("Go Mono advance at %d px: %v for %d glyphs, want %d px each", FontSize, d.Dot.X-fixed.I(Pad), len(text), CellW)
	}
	c := views.NewCanvas(len(text), 1)
	c.Text(0, 0, text, views.Style{FG: views.RGB(0, 0, 0), BG: views.RGB(255, 255, 255)}, -1)
	got, err := Image(c, Options{})
	if err != nil {
		t.Fatal(err)
	}
	maxDiff := 0
	for y := 0; y < ref.Bounds().Dy(); y++ {
		for x := 0; x < ref.Bounds().Dx(); x++ {
			a := int(ref.RGBAAt(x, y).R)
			b := int(got.RGBAAt(x, y).R)
			if d := a - b; d > maxDiff || -d > maxDiff {
				maxDiff = max(d, -d)
			}
		}
	}
	// Both use x/image/vector; they differ at most by rounding.
	if maxDiff > 2 {
		t.Errorf("glyphs differ from font.Drawer's by up to %d/255", maxDiff)
	}
}

func TestPNGGolden(t *testing.T) {
	for _, dark := range []bool{false, true} {
		name := "light"
		if dark {
			name = "dark"
		}
		t.Run(name, func(t *testing.T) {
			img, err := Image(fixture(), Options{Dark: dark})
			if err != nil {
				t.Fatal(err)
			}
			sum := sha256.Sum256(img.Pix)
			golden(t, "pixels.sha256", []byte(hex.EncodeToString(sum[:])+"\n"))
			if dark {
				if got := at(img, 1, 1); got != darkBG {
					t.Errorf("dark page %s", got.Hex())
				}
			}
		})
	}
}

func TestPNGText(t *testing.T) {
	b, err := PNG(fixture(), Options{Title: "decoder L3 H7", Description: "attention weight", Marker: "heed render decoder:L3:H7 map"})
	if err != nil {
		t.Fatal(err)
	}
	decode(t, b) // image/png checks every chunk's CRC, the tEXt ones too
	txt, err := PNGText(b)
	if err != nil {
		t.Fatal(err)
	}
	want := map[string]string{"Software": "heed render decoder:L3:H7 map", "Title": "decoder L3 H7", "Description": "attention weight"}
	for k, v := range want {
		if txt[k] != v {
			t.Errorf("tEXt %s = %q, want %q", k, txt[k], v)
		}
	}
	// Pillow, when Debian's python3 has it, reads the same chunks.
	py := testpy.Path()
	if err := exec.Command(py, "-c", "import PIL").Run(); err != nil {
		t.Logf("skipping the Pillow cross-check: %s has no PIL", py)
		return
	}
	path := filepath.Join(t.TempDir(), "x.png")
	os.WriteFile(path, b, 0o644)
	out, err := exec.Command(py, "-c", `
import sys
from PIL import Image
im = Image.open(sys.argv[1]); im.load()
print(im.size[0], im.size[1], im.mode)
print(im.text["Software"]); print(im.text["Title"])
print("%02x%02x%02x" % im.getpixel((8 + 8*9 + 4, 8 + 4))[:3])
`, path).CombinedOutput()
	if err != nil {
		t.Fatalf("Pillow: %v: %s", err, out)
	}
	// image/png writes an opaque image as RGB (colour type 2).
	wantOut := "124 88 RGB\nheed render decoder:L3:H7 map\ndecoder L3 H7\nee3322\n"
	if string(out) != wantOut {
		t.Errorf("Pillow read:\n%s\nwant:\n%s", out, wantOut)
	}
}

// xmlNode is a generic XML element for inspecting the SVG.
type xmlNode struct {
	XMLName xml.Name
	Attrs   []xml.Attr `xml:",any,attr"`
	Content string     `xml:",chardata"`
	Nodes   []xmlNode  `xml:",any"`
}

func (n *xmlNode) attr(name string) string {
	for _, a := range n.Attrs {
		if a.Name.Local == name {
			return a.Value
		}
	}
	return ""
}

func (n *xmlNode) walk(f func(*xmlNode)) {
	f(n)
	for i := range n.Nodes {
		n.Nodes[i].walk(f)
	}
}

func TestSVG(t *testing.T) {
	c := fixture()
	b, err := SVG(c, Options{Title: "decoder L3 H7", Marker: "heed render decoder:L3:H7 map"})
	if err != nil {
		t.Fatal(err)
	}
	golden(t, "fixture.svg", b)
	var root xmlNode
	if err := xml.Unmarshal(b, &root); err != nil {
		t.Fatalf("encoding/xml cannot parse the SVG: %v", err)
	}
	if root.XMLName.Space != "http://www.w3.org/2000/svg" || root.XMLName.Local != "svg" {
		t.Fatalf("root element %v", root.XMLName)
	}
	if root.attr("width") != "124" || root.attr("height") != "88" || root.attr("viewBox") != "0 0 124 88" {
		t.Errorf("svg size %q x %q viewBox %q", root.attr("width"), root.attr("height"), root.attr("viewBox"))
	}
	paths := map[string]bool{}
	var uses, missing int
	var title, desc string
	rects := map[string]bool{}
	root.walk(func(n *xmlNode) {
		switch n.XMLName.Local {
		case "title":
			title = n.Content
		case "desc":
			desc = n.Content
		case "path":
			if !strings.HasPrefix(n.attr("d"), "M") {
				t.Errorf("path %s: d=%q", n.attr("id"), n.attr("d"))
			}
			paths[n.attr("id")] = true
		case "use":
			uses++
			if !paths[strings.TrimPrefix(n.attr("href"), "#")] {
				t.Errorf("use of undefined glyph %q", n.attr("href"))
			}
		case "rect":
			if n.attr("class") == "missing-glyph" {
				missing++
			}
			rects[n.attr("x")+","+n.attr("y")+","+n.attr("width")+","+n.attr("height")+","+n.attr("fill")] = true
		}
	})
	if title != "decoder L3 H7" {
		t.Errorf("title %q", title)
	}
	if !strings.Contains(desc, "heed Ag") || !strings.Contains(desc, "q 3 · 0.25") {
		t.Errorf("desc lacks the screen's text: %q", desc)
	}
	// Glyph cells: "heed" + "Ag" + "ul" + "rev" + "dim" + "x" + "y" + "q3·0.25"
	// (box drawing is rectangles)
	if want := 4 + 2 + 2 + 3 + 3 + 1 + 1 + 7; uses != want {
		t.Errorf("%d glyphs drawn, want %d", uses, want)
	}
	if missing != 2 {
		t.Errorf("%d missing-glyph boxes, want 2 (漢 and ↵)", missing)
	}
	// The two upper half blocks merge into one rectangle per half.
	for _, want := range []string{"80,8,18,9,#ee3322", "80,17,18,9,#22aa44", "98,8,9,18,#ee3322"} {
		if !rects[want] {
			t.Errorf("no rect %s", want)
		}
	}
	if !bytes.Contains(b[:200], []byte("<!-- heed render decoder:L3:H7 map -->")) {
		t.Error("no marker comment at the top")
	}
}

func TestText(t *testing.T) {
	c := fixture()
	golden(t, "plain.golden", Text(c, false, Options{Marker: "heed render decoder:L3:H7 map"}))
	golden(t, "colour.golden", Text(c, true, Options{Marker: "heed render decoder:L3:H7 map"}))
	plain := string(Text(c, false, Options{}))
	if strings.Contains(plain, "\x1b") {
		t.Error("plain text has escape sequences")
	}
	if !strings.HasPrefix(plain, "# heed render\n") {
		t.Errorf("text render starts %q", plain[:20])
	}
}

func TestFormatOf(t *testing.T) {
	for path, want := range map[string]Format{"a.png": FormatPNG, "b.SVG": FormatSVG, "dir.x/c.txt": FormatTXT} {
		if got, err := FormatOf(path); err != nil || got != want {
			t.Errorf("FormatOf(%q) = %q, %v, want %q", path, got, err, want)
		}
	}
	for _, path := range []string{"a.jpg", "noext", "a.png.bak"} {
		if _, err := FormatOf(path); err == nil {
			t.Errorf("FormatOf(%q) accepted", path)
		}
	}
}

func TestWriteFile(t *testing.T) {
	c := fixture()
	dir := t.TempDir()
	for _, f := range []Format{FormatPNG, FormatSVG, FormatTXT} {
		data, err := Encode(c, f, false, Options{})
		if err != nil {
			t.Fatal(err)
		}
		path := filepath.Join(dir, "out."+string(f))
		if err := WriteFile(path, data, false); err != nil {
			t.Fatalf("new %s: %v", f, err)
		}
		if ok, err := IsRender(path); !ok || err != nil {
			t.Errorf("%s: IsRender = %v, %v after writing it", f, ok, err)
		}
		// A previous render is replaced without --force.
		data2, _ := Encode(fixture(), f, true, Options{Title: "second"})
		if err := WriteFile(path, data2, false); err != nil {
			t.Errorf("replace previous %s render: %v", f, err)
		}
		if got, _ := os.ReadFile(path); !bytes.Equal(got, data2) {
			t.Errorf("%s not replaced", f)
		}
		// Someone else's file of the same name is kept, unless forced.
		other := filepath.Join(dir, "other."+string(f))
		os.WriteFile(other, []byte("precious\n"), 0o644)
		if err := WriteFile(other, data, false); err == nil || !strings.Contains(err.Error(), "--force") {
			t.Errorf("%s: overwrote a foreign file: %v", f, err)
		}
		if got, _ := os.ReadFile(other); string(got) != "precious\n" {
			t.Errorf("%s: foreign file changed", f)
		}
		if err := WriteFile(other, data, true); err != nil {
			t.Errorf("--force: %v", err)
		}
		if st, _ := os.Stat(other); st.Mode().Perm() != 0o644 {
			t.Errorf("mode %04o", st.Mode().Perm())
		}
	}
	// Not a regular file: refused even with force.
	if err := WriteFile(dir, []byte("x"), true); err == nil {
		t.Error("replaced a directory")
	}
	link := filepath.Join(dir, "link.png")
	os.Symlink(filepath.Join(dir, "out.png"), link)
	if err := WriteFile(link, []byte("x"), true); err == nil {
		t.Error("wrote through a symlink")
	}
	// No temporary file is left behind.
	ents, _ := os.ReadDir(dir)
	for _, e := range ents {
		if strings.Contains(e.Name(), ".tmp-") {
			t.Errorf("temporary file %s left", e.Name())
		}
	}
	// A missing directory fails cleanly.
	if err := WriteFile(filepath.Join(dir, "nope", "a.png"), []byte("x"), false); err == nil {
		t.Error("wrote into a missing directory")
	}
}

func TestIsRenderForeign(t *testing.T) {
	dir := t.TempDir()
	var buf bytes.Buffer
	png.Encode(&buf, image.NewRGBA(image.Rect(0, 0, 2, 2)))
	cases := map[string][]byte{
		"plain.png": buf.Bytes(),
		"other.svg": []byte(`<?xml version="1.0"?>` + "\n<svg xmlns=\"http://www.w3.org/2000/svg\"/>"),
		"notes.txt": []byte("# my notes\nheed render\n"),
		"empty.txt": nil,
	}
	for name, data := range cases {
		path := filepath.Join(dir, name)
		os.WriteFile(path, data, 0o644)
		if ok, err := IsRender(path); ok || err != nil {
			t.Errorf("%s: IsRender = %v, %v", name, ok, err)
		}
	}
}
