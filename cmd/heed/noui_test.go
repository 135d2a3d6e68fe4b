package main

import (
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"
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
	dir, bin := terminalTest(t)
	file, _ := filepath.Abs(filepath.Join(casesDir, "shift_bad.npz"))
	done := filepath.Join(dir, "done")
	session := fmt.Sprintf("heed-dumb-test-%d", os.Getpid())
	script := fmt.Sprintf("%s %s; echo exit=$? > %s; sleep 60", shellQuote(bin), shellQuote(file), shellQuote(done))
	if out, err := exec.Command("tmux", "new-session", "-d", "-s", session, "-x", "120", "-y", "60", "env", "TERM=dumb", "sh", "-c", script).CombinedOutput(); err != nil {
		t.Fatalf("tmux: %v\n%s", err, out)
	}
	defer exec.Command("tmux", "kill-session", "-t", session).Run()
	for i := 0; i < 300; i++ {
		if _, err := os.Stat(done); err == nil {
			break
		}
		time.Sleep(100 * time.Millisecond)
	}
	b, err := os.ReadFile(done)
	if err != nil || strings.TrimSpace(string(b)) != "exit=0" {
		t.Fatalf("heed with TERM=dumb did not exit 0 by itself: %q %v", b, err)
	}
	screen, _ := exec.Command("tmux", "capture-pane", "-t", session, "-p", "-J", "-S", "-200").Output()
	s := strings.Join(strings.Fields(string(screen)), " ")
	for _, want := range []string{"heed check: ", "TERM is dumb, so this is the text report", "run heed in a terminal for the UI"} {
		if !strings.Contains(s, want) {
			t.Errorf("the dumb terminal shows no %q:\n%s", want, screen)
		}
	}
}
