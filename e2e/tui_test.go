// Package e2e drives the real heed binary in a real terminal (tmux): it
// types keys with send-keys and reads the screen with capture-pane, the way
// a person would use it.
package e2e

import (
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"strings"
	"testing"

	"github.com/heed-dev/heed/internal/termtest"
	"github.com/heed-dev/heed/internal/testpy"
)

var heedBin string

func TestMain(m *testing.M) {
	code := func() int {
		dir, err := os.MkdirTemp("", "heed-e2e")
		if err != nil {
			fmt.Fprintln(os.Stderr, err)
			return 1
		}
		defer os.RemoveAll(dir)
		heedBin = filepath.Join(dir, "heed")
		_, file, _, _ := runtime.Caller(0)
		root := filepath.Dir(filepath.Dir(file))
		cmd := exec.Command("go", "build", "-o", heedBin, "./cmd/heed")
		cmd.Dir = root
		if out, err := cmd.CombinedOutput(); err != nil {
			fmt.Fprintf(os.Stderr, "building heed: %v\n%s", err, out)
			return 1
		}
		return m.Run()
	}()
	os.Exit(code)
}

func needTools(t *testing.T) {
	t.Helper()
	if _, err := exec.LookPath("tmux"); err != nil {
		t.Skip("tmux is not installed: the end-to-end tests drive heed in tmux (apt-get install tmux)")
	}
	testpy.Require(t, "numpy") // the fixtures are written with numpy
}

func fixture(t *testing.T, name string, args ...string) string {
	t.Helper()
	out := filepath.Join(t.TempDir(), name)
	cmd := exec.Command(testpy.Path(), append([]string{"../tui/testdata/make_export.py", out}, args...)...)
	if b, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("make_export.py: %v\n%s", err, b)
	}
	return out
}

// run starts heed with args in a w x h terminal with the environment env.
func run(t *testing.T, w, h int, env []string, args ...string) *termtest.Term {
	t.Helper()
	return termtest.New(t).Start("heed", termtest.Window{W: w, H: h, Env: env}, append([]string{heedBin}, args...)...)
}

// checkWidth fails when a line of the screen is wider than the terminal
// (something overlapped or wrapped).
func checkWidth(t *testing.T, screen string, w int) {
	t.Helper()
	for i, ln := range strings.Split(strings.TrimRight(screen, "\n"), "\n") {
		if n := len([]rune(ln)); n > w {
			t.Errorf("line %d is %d columns wide, terminal %d: %q", i, n, w, ln)
		}
	}
}

var colourEnv = []string{"TERM=xterm-256color", "COLORTERM=truecolor"}
var plainEnv = []string{"TERM=xterm-256color", "NO_COLOR=1"}

// TestLeakJourney: from "heed FILE" to the leaking cell and its tokens in a
// few keys, with colour at 80x24 and without colour after a resize to 200x60.
func TestLeakJourney(t *testing.T) {
	needTools(t)
	file := fixture(t, "leak.npz", "--leak")
	for _, tc := range []struct {
		name   string
		env    []string
		w, h   int
		glyphs string // what draws the heat map
	}{
		{"colour_80x24", colourEnv, 80, 24, "▀"},
		{"no_colour_80x24", plainEnv, 80, 24, "!!"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			tm := run(t, tc.w, tc.h, tc.env, file)
			s := tm.See("Survey · decoder", "1 finding")
			checkWidth(t, s, tc.w)
			tm.Keys("3")
			s = tm.See("Findings · 1, worst first", "Causal mask shifted by +1", "causal", "decoder:L1:H2:B0:q2:k3")
			checkWidth(t, s, tc.w)
			tm.Keys("Enter")
			// The worst cell: query 2 " quiet" attends to key 3 " river".
			s = tm.See(`q 2 " quiet" → k 3 " river"`, "forbidden by causal", " 2  quiet", tc.glyphs)
			checkWidth(t, s, tc.w)
			if tc.env[1] == "NO_COLOR=1" {
				if e := tm.ScreenEscapes(); strings.Contains(e, "38;2;") || strings.Contains(e, "38;5;") {
					t.Error("NO_COLOR: the screen still has colours")
				}
			} else if e := tm.ScreenEscapes(); !strings.Contains(e, "38;2;") && !strings.Contains(e, "38;5;") {
				t.Error("COLORTERM=truecolor: the screen has no colours")
			}
			tm.Keys("?")
			s = tm.See("Keys of Map", "zoom in", "next layer", "copy location")
			checkWidth(t, s, tc.w)
			tm.Keys("Escape")
			tm.Resize(200, 60)
			s = tm.See(" leak", "15  lake")
			checkWidth(t, s, 200)
			tm.Keys("y")
			tm.See("copied decoder:L1:H2:q2:k3")
			tm.Keys("q")
			if st := tm.Exited(); st != "0" {
				t.Errorf("exit status %s", st)
			}
		})
	}
}

// TestCleanSurveyAndScreens: on a clean export every head's statistics
// show, and every screen is readable at 200x60 without colour.
func TestCleanSurveyAndScreens(t *testing.T) {
	needTools(t)
	file := fixture(t, "clean.npz", "--layers", "3", "--heads", "6")
	tm := run(t, 200, 60, plainEnv, file)
	s := tm.See("Survey · decoder · entropy", "checks clean", "L2 ", "entropy", "confidence")
	if strings.Contains(s, "blank: not") {
		t.Errorf("some heads have no statistics:\n%s", s)
	}
	tm.Keys("s")
	tm.See("Survey · decoder · confidence")
	tm.Keys("3")
	tm.See("Findings · clean", "No forbidden cell carries mass")
	tm.Keys("4")
	tm.See("Trace · decoder · q 15", "Trace explains query 15 (the last real position)", "rollout", "flow")
	tm.Keys("Tab")
	tm.See("[1 Survey]")
	tm.Keys("BTab")
	tm.See("[4 Trace]")
	tm.Keys("2", "/")
	tm.Literal("mill")
	tm.Keys("Enter")
	tm.See(`"mill": match 1 of 1, position 8`, `q 8 " mill" → k 8 " mill"`)
	tm.Keys("C-c")
	if st := tm.Exited(); st != "0" {
		t.Errorf("exit status %s", st)
	}
}

// TestCompareTwoExports: heed A B opens Compare for two exports of the same shape.
func TestCompareTwoExports(t *testing.T) {
	needTools(t)
	a := fixture(t, "before.npz", "--leak")
	b := fixture(t, "after.npz")
	tm := run(t, 200, 60, colourEnv, a, b)
	tm.See("5 Compare")
	tm.Keys("5")
	tm.See("most changed heads", "most changed head: L1 H", "TV: mean total variation")
	tm.Keys("q")
	if st := tm.Exited(); st != "0" {
		t.Errorf("exit status %s", st)
	}
}

// TestBadInput: a file that is not an export gives one line and exit 2.
func TestBadInput(t *testing.T) {
	needTools(t)
	bad := filepath.Join(t.TempDir(), "bad.npz")
	if err := os.WriteFile(bad, []byte("not a zip"), 0o644); err != nil {
		t.Fatal(err)
	}
	tm := run(t, 200, 24, colourEnv, bad)
	if st := tm.Exited(); st != "2" {
		t.Errorf("exit status %s, want 2", st)
	}
	tm.See("heed: ", "bad.npz")
}

// TestOneKeyToTheLeak: on a 12 x 12-head export with one leaking cell, the
// Survey marks the head, and one key (n) reaches the cell, centred on the
// Map, with its rule and mass on screen; i shows its row.
func TestOneKeyToTheLeak(t *testing.T) {
	needTools(t)
	file := filepath.Join(t.TempDir(), "one.npz")
	if out, err := exec.Command(testpy.Path(), "../tui/testdata/one_cell.py", file).CombinedOutput(); err != nil {
		t.Fatalf("one_cell.py: %v\n%s", err, out)
	}
	for _, tc := range []struct {
		name string
		env  []string
	}{{"colour", colourEnv}, {"no_colour", plainEnv}} {
		t.Run(tc.name, func(t *testing.T) {
			tm := run(t, 120, 40, tc.env, file)
			s := tm.See("Survey · decoder", "1 finding", "forbidden mass (any amount)")
			for _, ln := range strings.Split(s, "\n") {
				if f := strings.Fields(ln); len(f) > 0 && f[0] == "L7" && !strings.Contains(ln, "!") {
					t.Errorf("the Survey does not mark layer 7:\n%s", s)
				}
			}
			tm.Keys("n")
			s = tm.See("[2 Map]", "finding 1 of 1", "causal leak", `q 150 → k 201`, "forbidden by causal", "decoder:L7:H5:q150:k201")
			checkWidth(t, s, 120)
			// centred: the row label of query 150 is in the middle third of the map
			lines := strings.Split(s, "\n")
			row := -1
			for i, ln := range lines {
				if strings.HasPrefix(strings.TrimSpace(ln), "150") {
					row = i
				}
			}
			if row < len(lines)/4 || row > 3*len(lines)/4 {
				t.Errorf("query 150 is on line %d of %d, not near the middle:\n%s", row, len(lines), s)
			}
			tm.Keys("i")
			tm.See("row q150", "heaviest keys:", "forbidden mass 0.01")
			tm.Keys("q")
			if st := tm.Exited(); st != "0" {
				t.Errorf("exit status %s", st)
			}
		})
	}
}
