package tui

import (
	"bytes"
	"context"
	"encoding/base64"
	"encoding/json"
	"fmt"
	"github.com/heed-dev/heed/internal/words"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	tea "charm.land/bubbletea/v2"
	"github.com/charmbracelet/colorprofile"
	"github.com/charmbracelet/x/ansi"
	"github.com/charmbracelet/x/exp/teatest/v2"
	"github.com/heed-dev/heed/loader"
	"github.com/heed-dev/heed/views"
)

// The fixtures are written by testdata/make_export.py with numpy; the
// reference values the flows check (worst leaking cell, most changed head)
// are computed by numpy from the same files, not by heed.

func python(t testing.TB) {
	t.Helper()
	if err := exec.Command("/usr/bin/python3", "-c", "import numpy").Run(); err != nil {
		t.Skipf("these tests need /usr/bin/python3 with numpy to write their fixtures: %v", err)
	}
}

func makeExport(t *testing.T, name string, args ...string) string {
	return makeExportB(t, name, args...)
}

// makeOneCell writes testdata/one_cell.py's export: one leaking cell
// (layer 7, head 5, query 150, key 201) in 12 x 12 heads of 300 tokens.
func makeOneCell(t *testing.T) string {
	t.Helper()
	python(t)
	out := filepath.Join(t.TempDir(), "one.npz")
	if b, err := exec.Command("/usr/bin/python3", "testdata/one_cell.py", out).CombinedOutput(); err != nil {
		t.Fatalf("one_cell.py: %v\n%s", err, b)
	}
	return out
}

func makeExportB(t testing.TB, name string, args ...string) string {
	t.Helper()
	python(t)
	out := filepath.Join(t.TempDir(), name)
	cmd := exec.Command("/usr/bin/python3", append([]string{"testdata/make_export.py", out}, args...)...)
	if b, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("make_export.py: %v\n%s", err, b)
	}
	return out
}

// numpyRef runs a numpy script on the files and decodes its JSON output.
func numpyRef(t *testing.T, script string, v any, files ...string) {
	t.Helper()
	cmd := exec.Command("/usr/bin/python3", append([]string{"-c", script}, files...)...)
	b, err := cmd.Output()
	if err != nil {
		t.Fatalf("numpy reference: %v", err)
	}
	if err := json.Unmarshal(b, v); err != nil {
		t.Fatalf("numpy reference: %v: %s", err, b)
	}
}

// changeScript ranks heads by the mean over rows of the total variation
// distance 0.5 * sum_k |A - B| (batch item 0).
const changeScript = `
import json, sys
import numpy as np
a = np.load(sys.argv[1])["decoder/attn"][:, 0]
b = np.load(sys.argv[2])["decoder/attn"][:, 0]
tv = 0.5 * np.abs(a - b).sum(axis=-1).mean(axis=-1)
l, h = np.unravel_index(np.argmax(tv), tv.shape)
print(json.dumps({"layer": int(l), "head": int(h), "tv": float(tv[l, h])}))
`

type flow struct {
	t    *testing.T
	tm   *teatest.TestModel
	m    *Model
	rec  *recorder
	locs chan string
}

// recorder keeps the latest frame the model drew, without escape
// sequences, so that tests read the screen as a person sees it.
type recorder struct {
	m     *Model
	mu    sync.Mutex
	frame string
}

func (r *recorder) Init() tea.Cmd { return r.m.Init() }

func (r *recorder) Update(msg tea.Msg) (tea.Model, tea.Cmd) {
	_, cmd := r.m.Update(msg)
	return r, cmd
}

func (r *recorder) View() tea.View {
	v := r.m.View()
	r.mu.Lock()
	r.frame = ansi.Strip(v.Content)
	r.mu.Unlock()
	return v
}

func (r *recorder) latest() string {
	r.mu.Lock()
	defer r.mu.Unlock()
	return r.frame
}

func start(t *testing.T, w, h int, opts Options, files ...string) *flow {
	t.Helper()
	set, err := loader.OpenSet(files, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	locs := make(chan string, 100)
	opts.OnLocation = func(loc string) { locs <- loc }
	if opts.Background == "" {
		opts.Background = "dark"
	}
	m, err := New(set, opts)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { m.Close() })
	rec := &recorder{m: m}
	tm := teatest.NewTestModel(t, rec, teatest.WithInitialTermSize(w, h),
		teatest.WithProgramOptions(tea.WithColorProfile(colorprofile.TrueColor), tea.WithEnvironment([]string{"TERM=xterm-256color"})))
	return &flow{t: t, tm: tm, m: m, rec: rec, locs: locs}
}

// see waits until the latest frame has every string.
func (f *flow) see(strs ...string) {
	f.t.Helper()
	deadline := time.Now().Add(10 * time.Second)
	for {
		frame := f.rec.latest()
		ok := true
		for _, s := range strs {
			if !strings.Contains(frame, s) {
				ok = false
			}
		}
		if ok {
			return
		}
		if time.Now().After(deadline) {
			f.t.Fatalf("the screen never showed %q; last frame (%d lines):\n%q", strs, strings.Count(frame, "\n")+1, frame)
		}
		time.Sleep(10 * time.Millisecond)
	}
}

// until waits until the latest frame satisfies ok.
func (f *flow) until(what string, ok func(frame string) bool) {
	f.t.Helper()
	deadline := time.Now().Add(10 * time.Second)
	for !ok(f.rec.latest()) {
		if time.Now().After(deadline) {
			f.t.Fatalf("the screen never showed %s; last frame:\n%s", what, f.rec.latest())
		}
		time.Sleep(10 * time.Millisecond)
	}
}

// output waits until the terminal output has s (escape sequences included).
func (f *flow) output(s string) {
	f.t.Helper()
	var seen []byte
	teatest.WaitFor(f.t, f.tm.Output(), func(b []byte) bool {
		seen = append(seen, b...)
		return bytes.Contains(seen, []byte(s))
	}, teatest.WithDuration(10*time.Second), teatest.WithCheckInterval(10*time.Millisecond))
}

// loc waits for the location to become want.
func (f *flow) loc(want string) {
	f.t.Helper()
	deadline := time.After(10 * time.Second)
	last := ""
	for {
		select {
		case got := <-f.locs:
			if got == want {
				return
			}
			last = got
		case <-deadline:
			f.t.Fatalf("location never became %s (last seen %q)", want, last)
		}
	}
}

func (f *flow) key(s string) {
	switch s {
	case "enter":
		f.tm.Send(tea.KeyPressMsg{Code: tea.KeyEnter})
	case "tab":
		f.tm.Send(tea.KeyPressMsg{Code: tea.KeyTab})
	case "shift+tab":
		f.tm.Send(tea.KeyPressMsg{Code: tea.KeyTab, Mod: tea.ModShift})
	case "esc":
		f.tm.Send(tea.KeyPressMsg{Code: tea.KeyEscape})
	case "right":
		f.tm.Send(tea.KeyPressMsg{Code: tea.KeyRight})
	case "down":
		f.tm.Send(tea.KeyPressMsg{Code: tea.KeyDown})
	case "ctrl+n":
		f.tm.Send(tea.KeyPressMsg{Code: 'n', Mod: tea.ModCtrl})
	default:
		f.tm.Type(s)
	}
}

func (f *flow) quit() *Model {
	f.t.Helper()
	f.key("q")
	fm := f.tm.FinalModel(f.t, teatest.WithFinalTimeout(10*time.Second))
	m := fm.(*recorder).m
	if m.ctx.Err() == nil {
		f.t.Error("quitting did not cancel the background work")
	}
	return m
}

func TestFlowLeakToWorstCell(t *testing.T) {
	file, want := leakExport(t)
	f := start(t, 80, 24, Options{}, file)
	f.see("Survey · decoder")
	f.see("1 finding") // the background checks finished
	f.key("3")
	f.see("Findings · 1, worst first", "causal", "shifted by +1")
	f.key("enter")
	// numpy's worst forbidden cell is where Findings' enter lands.
	f.loc(words.Loc{Block: "decoder", Layer: want.Layer, Head: want.Head, Batch: -1, Query: want.Q, Key: want.K}.String())
	f.see("forbidden by causal")
	m := f.quit()
	if m.Screen() != ScreenMap || m.sel.K != want.K || m.sel.Batch != want.Batch {
		t.Errorf("after enter: screen %d, k %d, batch %d; want Map at k %d batch %d", m.Screen(), m.sel.K, m.sel.Batch, want.K, want.Batch)
	}
}

func TestFlowMoveZoomFindCopy(t *testing.T) {
	file := makeExport(t, "clean.npz", "--layers", "3", "--heads", "3", "--seq", "60")
	f := start(t, 80, 24, Options{}, file)
	f.see("Survey · decoder")
	f.key("]")
	f.loc("decoder:L1:H0:q0:k0")
	f.key("]")
	f.key("}")
	f.loc("decoder:L2:H1:q0:k0")
	f.key("[")
	f.key("{")
	f.key("{")
	f.loc("decoder:L1:H2:q0:k0") // head wraps around
	f.key("2")
	// 60 tokens do not fit in 21 lines at 1:1: the map starts zoomed out.
	f.see("zoom 1:2 mean")
	f.key("+")
	f.see("zoom 1:1")
	f.key("+")
	f.see("zoom 2:1")
	f.key("m")
	f.see("max weight")
	f.key("-")
	f.key("-")
	f.see("zoom 1:2 max")
	// find the 4th token, " river"
	f.key("/")
	f.see("find token")
	f.key("river")
	f.key("enter")
	f.loc("decoder:L1:H2:q3:k3")
	f.see("match 1 of 3")
	f.key("ctrl+n")
	f.loc("decoder:L1:H2:q23:k23")
	f.key("y")
	loc := "decoder:L1:H2:q23:k23"
	// OSC 52 puts the location on the clipboard, also over SSH.
	f.output("\x1b]52;c;" + base64.StdEncoding.EncodeToString([]byte(loc)))
	f.see("copied " + loc)
	f.key("?")
	f.see("Keys of Map", "zoom in", "hide/show sink column")
	f.key("esc")
	f.tm.Send(tea.WindowSizeMsg{Width: 200, Height: 60})
	f.see("■ leak")
	m := f.quit()
	if m.w != 200 || m.h != 60 {
		t.Errorf("size after resize %dx%d", m.w, m.h)
	}
}

func TestFlowAtGotoAndMouse(t *testing.T) {
	file := makeExport(t, "clean.npz")
	f := start(t, 80, 24, Options{At: "decoder:L1:H3:q5"}, file)
	f.see("[2 Map]", "q 5 \" past\"")
	f.tm.Send(GotoMsg{Loc: "decoder:L0:H1:q9"})
	f.loc("decoder:L0:H1:q9:k9")
	f.tm.Send(GotoMsg{Loc: "encoder:L0:H0"})
	f.see("no block")
	// A click on the map moves the cursor to the cell under it: row 0 of
	// the grid is on screen line 1 (tab bar) + 3 (key labels) + 0.
	f.tm.Send(tea.MouseClickMsg{X: 11, Y: 4, Button: tea.MouseLeft})
	f.loc("decoder:L0:H1:q0:k0")
	f.tm.Send(tea.MouseClickMsg{X: 7, Y: 0, Button: tea.MouseLeft}) // the " 1 Survey " tab, columns 5-14
	f.see("Survey ·")
	m := f.quit()
	if m.Screen() != ScreenSurvey {
		t.Errorf("tab click: screen %d", m.Screen())
	}
}

func TestFlowCompare(t *testing.T) {
	a := makeExport(t, "before.npz", "--leak")
	b := makeExport(t, "after.npz")
	var want struct {
		Layer, Head int
		TV          float64
	}
	numpyRef(t, changeScript, &want, a, b)
	f := start(t, 120, 30, Options{}, a, b)
	f.see("5 Compare")
	f.key("5")
	f.until("the table of most changed heads", func(s string) bool {
		return strings.Contains(s, "most changed heads") && !strings.Contains(s, "measuring")
	})
	// Compare opens on the most changed head by itself, and says what TV is
	f.see(fmt.Sprintf("most changed head: L%d H%d, mean total variation", want.Layer, want.Head), "TV: mean total variation")
	f.key("enter") // the next one down the table
	f.see("changed head 2: L")
	m := f.quit()
	heads := m.cmp[0]
	if len(heads) == 0 || heads[0].Layer != want.Layer || heads[0].Head != want.Head {
		t.Fatalf("most changed head %+v, numpy says L%d H%d", heads, want.Layer, want.Head)
	}
	if d := heads[0].TV - want.TV; d > 1e-5 || d < -1e-5 {
		t.Errorf("TV %v, numpy %v", heads[0].TV, want.TV)
	}
}

func TestNewErrors(t *testing.T) {
	file := makeExport(t, "clean.npz")
	set, err := loader.OpenSet([]string{file}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	for _, o := range []Options{{At: "nosuch:L0:H0"}, {At: "decoder:L9:H0"}, {Colormap: "rainbow"}} {
		if m, err := New(set, o); err == nil {
			m.Close()
			t.Errorf("New(%+v) accepted", o)
		} else if !strings.Contains(err.Error(), "tui:") {
			t.Errorf("New(%+v): %v", o, err)
		}
	}
	ctx, cancel := context.WithCancel(context.Background())
	m, err := New(set, Options{Context: ctx})
	if err != nil {
		t.Fatal(err)
	}
	cancel()
	if m.ctx.Err() == nil {
		t.Error("the parent context does not cancel the model's work")
	}
	m.Close()
}

// leakCell is numpy's worst forbidden cell of an export (leakBoxScript)
// and the bounding box of its head's leaking cells.
type leakCell struct{ Layer, Batch, Head, Q, K, Q0, Q1, K0, K1 int }

// leakBox asks numpy (leakBoxScript) for file's worst forbidden cell.
func leakBox(t *testing.T, file string) leakCell {
	t.Helper()
	var c leakCell
	numpyRef(t, leakBoxScript, &c, file)
	return c
}

// leakExport writes make_export.py's export with a +1 causal leak and
// returns its path and numpy's worst forbidden cell.
func leakExport(t *testing.T) (string, leakCell) {
	t.Helper()
	file := makeExport(t, "leak.npz", "--leak")
	return file, leakBox(t, file)
}

// leakBoxScript reads an export (decoder/attn [layer, batch, head, q, k]) and
// returns numpy's worst forbidden cell and the bounding box of the cells
// above the diagonal carrying more than 1e-6 in that head (causal rule:
// k > q, the common definition of a causal mask).
const leakBoxScript = `
import json, sys
import numpy as np
a = np.load(sys.argv[1])["decoder/attn"]
n = a.shape[-1]
up = np.triu(np.ones((n, n), dtype=bool), k=1)
m = np.where(up, a, -1.0)
l, b, h, q, k = np.unravel_index(np.argmax(m), m.shape)
qs, ks = np.nonzero(up & (a[l, b, h] > 1e-6))
print(json.dumps({"layer": int(l), "batch": int(b), "head": int(h), "q": int(q), "k": int(k),
                  "q0": int(qs.min()), "q1": int(qs.max()), "k0": int(ks.min()), "k1": int(ks.max())}))
`

// From the Survey one key (n) reaches the worst leaking cell, at a zoom
// whose view holds every leaking cell of that head, and says what it is.
func TestFlowNextFindingShowsExtent(t *testing.T) {
	one := makeOneCell(t)
	for _, tc := range []struct {
		name, file string
	}{
		{"shifted mask, 100 tokens", makeExport(t, "leak.npz", "--leak", "--seq", "100", "--layers", "3", "--heads", "12")},
		{"one cell of 12x12 heads, 300 tokens", one},
	} {
		t.Run(tc.name, func(t *testing.T) {
			want := leakBox(t, tc.file)
			f := start(t, 100, 30, Options{}, tc.file)
			f.see("Survey · decoder")
			f.see("1 finding")
			f.key("n")
			f.loc(words.Loc{Block: "decoder", Layer: want.Layer, Head: want.Head, Batch: -1, Query: want.Q, Key: want.K}.String())
			f.see("finding 1 of 1", "causal leak")
			m := f.quit()
			bw, bh := m.bodySize()
			md, err := m.mapData(&m.screens[ScreenMap].(*mapScreen).memo)
			if err != nil {
				t.Fatal(err)
			}
			opt := m.sel.Map
			opt.CursorQ, opt.CursorK = m.sel.Q, m.sel.K
			l := views.LayoutMap(md, bw, bh, opt, m.st)
			if l.Q0 > want.Q0 || l.Q0+l.PageRows() <= want.Q1 || l.K0 > want.K0 || l.K0+l.PageCols() <= want.K1 {
				t.Errorf("view q %d+%d k %d+%d does not hold numpy's leak box q %d-%d k %d-%d", l.Q0, l.PageRows(), l.K0, l.PageCols(), want.Q0, want.Q1, want.K0, want.K1)
			}
			if want.Q0 == want.Q1 && want.K0 == want.K1 {
				// one cell: shown one cell a pixel, centred
				if l.Block != 1 {
					t.Errorf("one leaking cell shown at %d cells a pixel, want 1", l.Block)
				}
				if dq := m.sel.Q - (l.Q0 + l.PageRows()/2); dq < -1 || dq > 1 {
					t.Errorf("cursor row %d not centred in q %d+%d", m.sel.Q, l.Q0, l.PageRows())
				}
				if dk := m.sel.K - (l.K0 + l.PageCols()/2); dk < -1 || dk > 1 {
					t.Errorf("cursor key %d not centred in k %d+%d", m.sel.K, l.K0, l.PageCols())
				}
			}
		})
	}
}

// The Survey marks a head with one leaking cell on every statistic, and its
// ranked list of leak mass puts that head first (numpy writes the export).
func TestFlowSurveyShowsOneLeakingCell(t *testing.T) {
	one := makeOneCell(t)
	f := start(t, 100, 30, Options{}, one)
	f.see("Survey · decoder · entropy")
	f.see("forbidden mass (any amount)") // the legend of the marks, once the statistics are in
	for _, ln := range strings.Split(f.rec.latest(), "\n") {
		if strings.HasPrefix(strings.TrimSpace(ln), "L") && strings.Contains(ln, "!") != strings.HasPrefix(strings.TrimSpace(ln), "L7 ") {
			t.Errorf("a mark on a line other than L7's (or none on L7's):\n%s", f.rec.latest())
		}
	}
	f.key("sss")
	f.see("leak mass (per row)")
	f.key("o")
	f.see("rank  layer  head", "     1      7     5")
	f.quit()
}

// rowTopScript gives numpy's heaviest keys of one row of decoder/attn
// [layer, batch, head, q, k] (argv: file layer batch head q).
const rowTopScript = `
import json, sys
import numpy as np
a = np.load(sys.argv[1])["decoder/attn"].astype(np.float32)
l, b, h, q = (int(x) for x in sys.argv[2:6])
row = a[l, b, h, q]
top = np.argsort(-row, kind="stable")[:3]
print(json.dumps({"keys": [int(k) for k in top], "sum": float(row.sum())}))
`

// The row inspector (i on the Map) lists the cursor row's heaviest keys
// as numpy orders them, the leaking one marked with its rule; # writes the
// Survey's values in its cells.
func TestFlowRowInspectorAndNumbers(t *testing.T) {
	file, want := leakExport(t)
	var top struct {
		Keys []int
		Sum  float64
	}
	numpyRef(t, rowTopScript, &top, file, strconv.Itoa(want.Layer), strconv.Itoa(want.Batch), strconv.Itoa(want.Head), strconv.Itoa(want.Q))
	f := start(t, 120, 40, Options{}, file)
	f.see("1 finding")
	f.key("#")
	f.see(" 0.") // a value written in a cell
	f.key("n")
	f.see("finding 1 of 1")
	f.key("i")
	f.see("row q"+strconv.Itoa(want.Q), "heaviest keys:", fmt.Sprintf("k%d", want.K))
	frame := f.rec.latest()
	prev := -1
	for _, k := range top.Keys {
		i := strings.Index(frame, fmt.Sprintf("\nk%d ", k))
		if i < 0 {
			i = strings.Index(frame, fmt.Sprintf(" k%d ", k))
		}
		if i < prev {
			t.Errorf("key %d out of numpy's order %v:\n%s", k, top.Keys, frame)
		}
		prev = i
	}
	if !strings.Contains(frame, "forbidden by causal") {
		t.Errorf("the leaking key is not marked:\n%s", frame)
	}
	f.quit()
}

// Trace chooses its own query on the first visit: the first finding's worst
// query (numpy's worst forbidden cell), else the last position; keys after
// the query are marked as not seen, not given a share of 0.
func TestFlowTraceChoosesItsQuery(t *testing.T) {
	leak, want := leakExport(t)
	f := start(t, 100, 30, Options{}, leak)
	f.see("1 finding")
	f.key("4")
	f.see(fmt.Sprintf("Trace explains query %d (the worst cell of the first finding)", want.Q), "predicted: ", "future: not seen by this query")
	f.quit()
	clean := makeExport(t, "clean.npz", "--seq", "12")
	f = start(t, 100, 30, Options{}, clean)
	f.see("checks clean")
	f.key("4")
	f.see("Trace explains query 11 (the last real position)", "Trace · decoder · q 11")
	f.quit()
}
