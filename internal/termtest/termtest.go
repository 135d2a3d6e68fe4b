// Package termtest runs programs in a real terminal for tests: a private
// tmux server per test, keys typed with send-keys and the screen read with
// capture-pane, the way a person uses heed. Only tests import it.
package termtest

import (
	"fmt"
	"os"
	"os/exec"
	"strings"
	"sync/atomic"
	"testing"
	"time"
)

// Timeout bounds every wait: it is there against a hang, never a measure
// of speed.
const Timeout = 60 * time.Second

// ExitMark is what the shell prints after the program ends, followed by its
// exit status (see Term.Exited).
const ExitMark = "term-exit="

var servers atomic.Int64

// Server is one tmux server on a private socket; it is killed when the test
// ends.
type Server struct {
	t      testing.TB
	socket string
}

// New starts nothing yet but skips the test when tmux is not installed.
func New(t testing.TB) *Server {
	t.Helper()
	if _, err := exec.LookPath("tmux"); err != nil {
		t.Skip("skipping: tmux is not installed (apt-get install tmux): this test drives a real terminal")
	}
	s := &Server{t: t, socket: fmt.Sprintf("heed-test-%d-%d", os.Getpid(), servers.Add(1))}
	t.Cleanup(func() { exec.Command("tmux", "-L", s.socket, "kill-server").Run() })
	return s
}

// Tmux runs one tmux command on the server and fails the test if it fails.
func (s *Server) Tmux(args ...string) string {
	s.t.Helper()
	out, err := exec.Command("tmux", append([]string{"-L", s.socket, "-f", "/dev/null"}, args...)...).CombinedOutput()
	if err != nil {
		s.t.Fatalf("tmux %s: %v\n%s", strings.Join(args, " "), err, out)
	}
	return string(out)
}

// Window says how a session starts: its size, the environment given to
// the program (NAME=value, through env(1), so TERM too), and its working
// directory ("" = the test's).
type Window struct {
	W, H int
	Env  []string
	Dir  string
}

// Start opens session name running argv in a window of that size. The
// shell stays after the program ends, having printed ExitMark and the exit
// status, so that its last screen can be read.
func (s *Server) Start(name string, win Window, argv ...string) *Term {
	s.t.Helper()
	shell := "env"
	for _, a := range append(append([]string{}, win.Env...), argv...) {
		shell += " " + Quote(a)
	}
	shell += "; echo " + ExitMark + "$?; exec sleep 600"
	args := []string{"new-session", "-d", "-s", name, "-x", fmt.Sprint(win.W), "-y", fmt.Sprint(win.H)}
	if win.Dir != "" {
		args = append(args, "-c", win.Dir)
	}
	s.Tmux(append(args, "sh", "-c", shell)...)
	return &Term{s: s, name: name}
}

// Quote quotes a word for sh.
func Quote(s string) string { return "'" + strings.ReplaceAll(s, "'", `'\''`) + "'" }

// Term is one session of a Server.
type Term struct {
	s    *Server
	name string
}

// Keys sends tmux key names (Enter, Escape, C-c, BTab...) or text.
func (tm *Term) Keys(keys ...string) {
	tm.s.Tmux(append([]string{"send-keys", "-t", tm.name}, keys...)...)
}

// Literal types text as it is (no key names).
func (tm *Term) Literal(text string) { tm.s.Tmux("send-keys", "-t", tm.name, "-l", text) }

// Screen is what the window shows now.
func (tm *Term) Screen() string { return tm.s.Tmux("capture-pane", "-p", "-t", tm.name) }

// ScreenEscapes is Screen with its colour escape sequences.
func (tm *Term) ScreenEscapes() string { return tm.s.Tmux("capture-pane", "-p", "-e", "-t", tm.name) }

// History is the screen and up to 200 lines above it, wrapped lines joined.
func (tm *Term) History() string {
	return tm.s.Tmux("capture-pane", "-p", "-J", "-S", "-200", "-t", tm.name)
}

// Resize changes the window's size.
func (tm *Term) Resize(w, h int) {
	tm.s.Tmux("resize-window", "-t", tm.name, "-x", fmt.Sprint(w), "-y", fmt.Sprint(h))
}

// See waits until the screen shows every string and returns it.
func (tm *Term) See(strs ...string) string {
	tm.s.t.Helper()
	deadline := time.Now().Add(Timeout)
	for {
		s := tm.Screen()
		ok := true
		for _, x := range strs {
			ok = ok && strings.Contains(s, x)
		}
		if ok {
			return s
		}
		if time.Now().After(deadline) {
			tm.s.t.Fatalf("%s never showed %q; it shows:\n%s", tm.name, strs, s)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// Exited waits for the program to end and returns its exit status.
func (tm *Term) Exited() string {
	tm.s.t.Helper()
	deadline := time.Now().Add(Timeout)
	for {
		s := tm.History()
		if i := strings.Index(s, ExitMark); i >= 0 {
			return strings.Fields(s[i+len(ExitMark):])[0]
		}
		if time.Now().After(deadline) {
			tm.s.t.Fatalf("%s did not exit; the screen shows:\n%s", tm.name, s)
		}
		time.Sleep(50 * time.Millisecond)
	}
}
