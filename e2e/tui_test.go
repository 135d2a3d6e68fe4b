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
	"time"
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

// term is one tmux server (private socket) running heed in a session.
type term struct {
	t      *testing.T
	socket string
}

func needTools(t *testing.T) {
	t.Helper()
	if _, err := exec.LookPath("tmux"); err != nil {
		t.Skip("tmux is not installed: the end-to-end tests drive heed in tmux (apt-get install tmux)")
	}
	if err := exec.Command("/usr/bin/python3", "-c", "import numpy").Run(); err != nil {
		t.Skipf("the fixtures are written with /usr/bin/python3 and numpy: %v", err)
	}
}

func fixture(t *testing.T, name string, args ...string) string {
	t.Helper()
	out := filepath.Join(t.TempDir(), name)
	cmd := exec.Command("/usr/bin/python3", append([]string{"../tui/testdata/make_export.py", out}, args...)...)
	if b, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("make_export.py: %v\n%s", err, b)
	}
	return out
}

// run starts heed with args in a w x h tmux window with the environment env.
func run(t *testing.T, w, h int, env []string, args ...string) *term {
	t.Helper()
	tm := &term{t: t, socket: fmt.Sprintf("heed-e2e-%d-%d", os.Getpid(), time.Now().UnixNano())}
	// The shell stays after heed ends, so that its last screen and exit
	// status can be read.
	shell := heedBin
	for _, a := range args {
		shell += " '" + a + "'"
	}
	shell += "; echo heed-exit=$?; exec sleep 600"
	cmdArgs := []string{"-f", "/dev/null", "new-session", "-d", "-s", "heed", "-x", fmt.Sprint(w), "-y", fmt.Sprint(h)}
	for _, e := range env {
		cmdArgs = append(cmdArgs, "-e", e)
	}
	tm.tmux(append(cmdArgs, shell)...)
	t.Cleanup(func() { exec.Command("tmux", "-L", tm.socket, "kill-server").Run() })
	return tm
}

func (tm *term) tmux(args ...string) string {
	tm.t.Helper()
	out, err := exec.Command("tmux", append([]string{"-L", tm.socket}, args...)...).CombinedOutput()
	if err != nil {
		tm.t.Fatalf("tmux %s: %v\n%s", strings.Join(args, " "), err, out)
	}
	return string(out)
}

func (tm *term) keys(keys ...string) {
	tm.tmux(append([]string{"send-keys", "-t", "heed"}, keys...)...)
}

// literal types text as it is (no key names).
func (tm *term) literal(s string) { tm.tmux("send-keys", "-t", "heed", "-l", s) }

func (tm *term) screen() string { return tm.tmux("capture-pane", "-p", "-t", "heed") }

func (tm *term) screenEscapes() string { return tm.tmux("capture-pane", "-p", "-e", "-t", "heed") }

// see waits until the screen shows every string.
func (tm *term) see(strs ...string) string {
	tm.t.Helper()
	deadline := time.Now().Add(15 * time.Second)
	for {
		s := tm.screen()
		ok := true
		for _, x := range strs {
			ok = ok && strings.Contains(s, x)
		}
		if ok {
			return s
		}
		if time.Now().After(deadline) {
			tm.t.Fatalf("the screen never showed %q; it shows:\n%s", strs, s)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// exited waits for heed to end and returns its exit status.
func (tm *term) exited() string {
	tm.t.Helper()
	deadline := time.Now().Add(15 * time.Second)
	for {
		s := tm.screen()
		if i := strings.Index(s, "heed-exit="); i >= 0 {
			return strings.Fields(s[i+len("heed-exit="):])[0]
		}
		if time.Now().After(deadline) {
			tm.t.Fatalf("heed did not exit; the screen shows:\n%s", s)
		}
		time.Sleep(50 * time.Millisecond)
	}
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
			s := tm.see("Survey · decoder", "1 finding")
			checkWidth(t, s, tc.w)
			tm.keys("3")
			s = tm.see("Findings · 1, worst first", "Causal mask shifted by +1", "causal", "decoder:L1:H2:B0:q2:k3")
			checkWidth(t, s, tc.w)
			tm.keys("Enter")
			// The worst cell: query 2 " quiet" attends to key 3 " river".
			s = tm.see(`q 2 " quiet" → k 3 " river"`, "forbidden by causal", " 2  quiet", tc.glyphs)
			checkWidth(t, s, tc.w)
			if tc.env[1] == "NO_COLOR=1" {
				if e := tm.screenEscapes(); strings.Contains(e, "38;2;") || strings.Contains(e, "38;5;") {
					t.Error("NO_COLOR: the screen still has colours")
				}
			} else if e := tm.screenEscapes(); !strings.Contains(e, "38;2;") && !strings.Contains(e, "38;5;") {
				t.Error("COLORTERM=truecolor: the screen has no colours")
			}
			tm.keys("?")
			s = tm.see("Keys of Map", "zoom in", "next layer", "copy location")
			checkWidth(t, s, tc.w)
			tm.keys("Escape")
			tm.tmux("resize-window", "-t", "heed", "-x", "200", "-y", "60")
			s = tm.see(" leak", "15  lake")
			checkWidth(t, s, 200)
			tm.keys("y")
			tm.see("copied decoder:L1:H2:q2:k3")
			tm.keys("q")
			if st := tm.exited(); st != "0" {
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
	s := tm.see("Survey · decoder · entropy", "checks clean", "L2 ", "entropy", "confidence")
	if strings.Contains(s, "blank: not") {
		t.Errorf("some heads have no statistics:\n%s", s)
	}
	tm.keys("s")
	tm.see("Survey · decoder · confidence")
	tm.keys("3")
	tm.see("Findings · clean", "No forbidden cell carries mass")
	tm.keys("4")
	tm.see("Trace · decoder · q 15", "Trace explains query 15 (the last real position)", "rollout", "flow")
	tm.keys("Tab")
	tm.see("[1 Survey]")
	tm.keys("BTab")
	tm.see("[4 Trace]")
	tm.keys("2", "/")
	tm.literal("mill")
	tm.keys("Enter")
	tm.see(`"mill": match 1 of 1, position 8`, `q 8 " mill" → k 8 " mill"`)
	tm.keys("C-c")
	if st := tm.exited(); st != "0" {
		t.Errorf("exit status %s", st)
	}
}

// TestCompareTwoExports: heed A B opens Compare for two exports of the same shape.
func TestCompareTwoExports(t *testing.T) {
	needTools(t)
	a := fixture(t, "before.npz", "--leak")
	b := fixture(t, "after.npz")
	tm := run(t, 200, 60, colourEnv, a, b)
	tm.see("5 Compare")
	tm.keys("5")
	tm.see("most changed heads", "most changed head: L1 H", "TV: mean total variation")
	tm.keys("q")
	if st := tm.exited(); st != "0" {
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
	if st := tm.exited(); st != "2" {
		t.Errorf("exit status %s, want 2", st)
	}
	tm.see("heed: ", "bad.npz")
}

// TestOneKeyToTheLeak: on a 12 x 12-head export with one leaking cell, the
// Survey marks the head, and one key (n) reaches the cell, centred on the
// Map, with its rule and mass on screen; i shows its row.
func TestOneKeyToTheLeak(t *testing.T) {
	needTools(t)
	file := filepath.Join(t.TempDir(), "one.npz")
	if out, err := exec.Command("/usr/bin/python3", "../tui/testdata/one_cell.py", file).CombinedOutput(); err != nil {
		t.Fatalf("one_cell.py: %v\n%s", err, out)
	}
	for _, tc := range []struct {
		name string
		env  []string
	}{{"colour", colourEnv}, {"no_colour", plainEnv}} {
		t.Run(tc.name, func(t *testing.T) {
			tm := run(t, 120, 40, tc.env, file)
			s := tm.see("Survey · decoder", "1 finding", "forbidden mass (any amount)")
			for _, ln := range strings.Split(s, "\n") {
				if f := strings.Fields(ln); len(f) > 0 && f[0] == "L7" && !strings.Contains(ln, "!") {
					t.Errorf("the Survey does not mark layer 7:\n%s", s)
				}
			}
			tm.keys("n")
			s = tm.see("[2 Map]", "finding 1 of 1", "causal leak", `q 150 → k 201`, "forbidden by causal", "decoder:L7:H5:q150:k201")
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
			tm.keys("i")
			tm.see("row q150", "heaviest keys:", "forbidden mass 0.01")
			tm.keys("q")
			if st := tm.exited(); st != "0" {
				t.Errorf("exit status %s", st)
			}
		})
	}
}
