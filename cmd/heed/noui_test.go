package main

import (
	"path/filepath"
	"strings"
	"testing"

	"github.com/heed-dev/heed/internal/termtest"
)

// Where no UI can run (output to a pipe, as in run's buffer), heed FILE
// prints heed info's and heed check's text and says on stderr how to get the
// UI.
func TestNoTerminalGivesTextReport(t *testing.T) {
	out, code := run(t, filepath.Join(casesDir, "shift_bad.npz"))
	if code != 0 {
		t.Fatalf("exit %d, want 0\n%s", code, out)
	}
	for _, want := range []string{"block decoder", "rules       causal", "heed check: ", "shifted by +1", "the output is not a terminal, so this is the text report"} {
		if !strings.Contains(out, want) {
			t.Errorf("the text report lacks %q:\n%s", want, out)
		}
	}
}

// TERM=dumb in a real terminal (tmux) gives the text report, not the UI,
// and heed exits by itself.
func TestDumbTerminalGivesTextReport(t *testing.T) {
	_, bin := terminalTest(t)
	file, _ := filepath.Abs(filepath.Join(casesDir, "shift_bad.npz"))
	tm := termtest.New(t).Start("dumb", termtest.Window{W: 120, H: 60, Env: []string{"TERM=dumb"}}, bin, file)
	if st := tm.Exited(); st != "0" {
		t.Fatalf("heed with TERM=dumb exited %s, want 0 by itself", st)
	}
	screen := tm.History()
	s := strings.Join(strings.Fields(string(screen)), " ")
	for _, want := range []string{"heed check: ", "TERM is dumb, so this is the text report", "run heed in a terminal for the UI"} {
		if !strings.Contains(s, want) {
			t.Errorf("the dumb terminal shows no %q:\n%s", want, screen)
		}
	}
}
