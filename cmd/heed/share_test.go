package main

import (
	"bufio"
	"bytes"
	"crypto/ed25519"
	"crypto/rand"
	"errors"
	"fmt"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/spf13/cobra"
	gossh "golang.org/x/crypto/ssh"

	"github.com/heed-dev/heed/internal/termtest"
)

// TestShareJourney is the journey of issue 6 as a new user would take it,
// with the real binary in real terminals (tmux) and Debian's OpenSSH client:
// the presenter runs heed share with --follow in one terminal, a colleague
// with an authorised key runs ssh in another and sees the TUI following the
// presenter, a wrong key is refused, and quitting the presenter's TUI ends
// the colleague's session. HOME is a fresh directory, so the defaults
// (~/.ssh/authorized_keys, the host key under ~/.config/heed, the log under
// ~/.cache/heed) are a new user's; the presenter's working directory stays
// empty.
func TestShareJourney(t *testing.T) {
	for _, tool := range []string{"tmux", "/usr/bin/ssh", "ssh-keygen"} {
		if _, err := exec.LookPath(tool); err != nil {
			t.Skipf("skipping: %s is not installed (scripts/install-deps.sh installs tmux and openssh-client)", tool)
		}
	}
	dir := t.TempDir()
	home := filepath.Join(dir, "home")
	sshDir := filepath.Join(home, ".ssh")
	if err := os.MkdirAll(sshDir, 0o700); err != nil {
		t.Fatal(err)
	}
	key, wrong := filepath.Join(sshDir, "id_ed25519"), filepath.Join(dir, "wrong_key")
	for _, k := range []string{key, wrong} {
		if out, err := exec.Command("ssh-keygen", "-q", "-t", "ed25519", "-N", "", "-f", k).CombinedOutput(); err != nil {
			t.Fatalf("ssh-keygen: %v: %s", err, out)
		}
	}
	pub, _ := os.ReadFile(key + ".pub")
	os.WriteFile(filepath.Join(sshDir, "authorized_keys"), pub, 0o600)
	fp, err := exec.Command("ssh-keygen", "-l", "-f", key+".pub").Output()
	if err != nil {
		t.Fatal(err)
	}
	fingerprint := strings.Fields(string(fp))[1]

	bin := filepath.Join(dir, "heed")
	if out, err := exec.Command("go", "build", "-o", bin, ".").CombinedOutput(); err != nil {
		t.Fatalf("go build: %v\n%s", err, out)
	}
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	port := fmt.Sprint(ln.Addr().(*net.TCPAddr).Port)
	ln.Close()

	env := []string{"HOME=" + home, "XDG_CONFIG_HOME=", "XDG_CACHE_HOME=", "TERM=xterm-256color"}
	file, _ := filepath.Abs(filepath.Join(casesDir, "shift_bad.npz"))
	cwd := filepath.Join(dir, "cwd") // the presenter's working directory: heed writes nothing there
	if err := os.Mkdir(cwd, 0o700); err != nil {
		t.Fatal(err)
	}
	srv := termtest.New(t)
	presenter := srv.Start("presenter", termtest.Window{W: 120, H: 36, Env: env, Dir: cwd}, bin, "share", file, "--follow",
		"--listen", "127.0.0.1:"+port, "--at", "decoder:L1:H2:q5", "--background", "dark")
	presenter.See("sharing on 127.0.0.1:" + port)

	sshOpts := []string{"/usr/bin/ssh", "-F", "/dev/null", "-p", port, "-o", "IdentitiesOnly=yes", "-o", "IdentityAgent=none",
		"-o", "StrictHostKeyChecking=accept-new", "-o", "UserKnownHostsFile=" + filepath.Join(dir, "known_hosts")}
	guest := srv.Start("guest", termtest.Window{W: 100, H: 30, Env: []string{"TERM=xterm-256color"}}, append(sshOpts, "-i", key, "localhost")...)
	screen := guest.See("following the presenter (decoder:L1:H2:B0:q5:k5)")
	for _, w := range []string{"Map", "■ leak"} {
		if !strings.Contains(screen, w) {
			t.Errorf("the guest's TUI lacks %q:\n%s", w, screen)
		}
	}
	presenter.See("1 guest follows you")
	// The presenter moves a layer down: the guest follows.
	presenter.Keys("[")
	guest.See("following the presenter (decoder:L0:H2:B0:q5:k5)")
	// The guest looks around alone, the presenter moves on, the guest rejoins.
	guest.Keys("F")
	guest.See("on your own  ·") // the status of a guest on their own
	presenter.Keys(">")
	screen = guest.See("F: follow the presenter again (at decoder:L0:H3:B0:q5:k5)")
	if !strings.Contains(screen, " decoder:L0:H2:B0:q5:k5 ") {
		t.Errorf("a guest on their own was moved:\n%s", screen)
	}
	guest.Keys("F")
	guest.See("following the presenter (decoder:L0:H3:B0:q5:k5)")

	// The guest follows the screen and the zoom too, not only the location:
	// the presenter goes to the Survey and back to the Map zoomed in.
	presenter.Keys("1")
	guest.See("Survey · decoder")
	// The terminals differ in size, so the guest shows the nearest scale it
	// can draw: each zoom of the presenter's zooms the guest in too.
	zoomRe := regexp.MustCompile(`zoom (\d+):(\d+)`)
	ratio := func(screen string) float64 {
		m := zoomRe.FindStringSubmatch(screen)
		if m == nil {
			return 0
		}
		a, _ := strconv.ParseFloat(m[1], 64)
		b, _ := strconv.ParseFloat(m[2], 64)
		return a / b
	}
	presenter.Keys("2")
	prev := ratio(guest.See("[2 Map]"))
	// The export is small: one step in reaches the largest zoom.
	presenter.Keys("+")
	deadline := time.Now().Add(30 * time.Second) // only against a hang
	for ratio(guest.Screen()) <= prev && time.Now().Before(deadline) {
		time.Sleep(50 * time.Millisecond)
	}
	if now := ratio(guest.Screen()); now <= prev {
		t.Fatalf("the presenter zoomed in, the guest stayed at %v:\n%s", prev, guest.Screen())
	}
	// The guest's help lists the follow key.
	guest.Keys("F", "?")
	guest.See("follow the presenter / look around alone")
	guest.Keys("Escape")
	guest.See("→ k 5") // the Map again: the help closed (ESC and F at once would read as alt+F)
	guest.Keys("F")
	guest.See("following the presenter (")

	// The presenter's status line carries the host key's fingerprint, as
	// ssh-keygen -l prints it for the key heed created.
	hk, err := exec.Command("ssh-keygen", "-l", "-f", filepath.Join(home, ".config", "heed", "ssh_host_ed25519_key")).Output()
	if err != nil {
		t.Fatal(err)
	}
	presenter.See("host key " + strings.Fields(string(hk))[1])

	// A wrong key is refused.
	out, err := exec.Command(sshOpts[0], append(append(sshOpts[1:], "-o", "BatchMode=yes", "-i", wrong), "localhost", "true")...).CombinedOutput()
	if err == nil || !strings.Contains(string(out), "Permission denied (publickey)") {
		t.Errorf("wrong key: %v: %s", err, out)
	}

	// Quitting the presenter's TUI ends the guest's session cleanly.
	presenter.Keys("q")
	guest.See("the presenter stopped sharing")
	if st := guest.Exited(); st != "0" {
		t.Errorf("ssh exited %s, want 0", st)
	}
	presenter.See("heed share: stopped (1 session was open)")

	// A new user's defaults: host key 0600 under ~/.config/heed, the log
	// under ~/.cache/heed with the guest's key fingerprint.
	st, err := os.Stat(filepath.Join(home, ".config", "heed", "ssh_host_ed25519_key"))
	if err != nil || st.Mode().Perm() != 0o600 {
		t.Errorf("host key: %v %v", st, err)
	}
	if ents, err := os.ReadDir(cwd); err != nil || len(ents) > 0 {
		t.Errorf("files in the presenter's working directory: %v %v", ents, err)
	}
	log, err := os.ReadFile(filepath.Join(home, ".cache", "heed", "share.log"))
	if err != nil {
		t.Fatal(err)
	}
	for _, w := range []string{"msg=\"session start\"", "key=" + fingerprint, "msg=refused", "msg=disconnect", "msg=stopped"} {
		if !strings.Contains(string(log), w) {
			t.Errorf("log lacks %q:\n%s", w, log)
		}
	}
}

func TestShareRefusesWithoutKeys(t *testing.T) {
	home := t.TempDir()
	t.Setenv("HOME", home)
	file := filepath.Join(casesDir, "shift_bad.npz")
	// no ~/.ssh/authorized_keys: refused before anything listens
	if msg, code := run(t, "share", file, "--headless", "--listen", "127.0.0.1:0"); code != 2 {
		t.Errorf("no authorized_keys: exit %d: %s", code, msg)
	}
	empty := filepath.Join(home, "keys")
	os.WriteFile(empty, []byte("# nobody\n"), 0o600)
	if msg, code := run(t, "share", file, "--headless", "--authorized-keys", empty, "--listen", "127.0.0.1:0"); code != 2 {
		t.Errorf("empty authorized_keys: exit %d: %s", code, msg)
	}
	// --follow needs the presenter's terminal
	if msg, code := run(t, "share", file, "--headless", "--follow", "--authorized-keys", empty); code != 2 {
		t.Errorf("--follow --headless: exit %d: %s", code, msg)
	}
}

// TestShareHeadlessInterrupt runs the real binary headless, as under nohup,
// in an empty working directory with a fresh HOME and XDG directories:
// ctrl-c (SIGINT) stops it with exit status 0 (the README's command contract for
// share: 0, or 2 on bad input) after its shutdown line; the host key is
// created 0600 under $XDG_CONFIG_HOME/heed and reused by a second run; and no
// file appears in the working directory.
func TestShareHeadlessInterrupt(t *testing.T) {
	dir := t.TempDir()
	home, config, cache, cwd := filepath.Join(dir, "home"), filepath.Join(dir, "config"), filepath.Join(dir, "cache"), filepath.Join(dir, "cwd")
	for _, d := range []string{filepath.Join(home, ".ssh"), cwd} {
		if err := os.MkdirAll(d, 0o700); err != nil {
			t.Fatal(err)
		}
	}
	// One authorised key, in OpenSSH's format as x/crypto/ssh writes it.
	pub, _, err := ed25519.GenerateKey(rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	sshPub, err := gossh.NewPublicKey(pub)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(home, ".ssh", "authorized_keys"), gossh.MarshalAuthorizedKey(sshPub), 0o600); err != nil {
		t.Fatal(err)
	}
	bin := filepath.Join(dir, "heed")
	if out, err := exec.Command("go", "build", "-o", bin, ".").CombinedOutput(); err != nil {
		t.Fatalf("go build: %v\n%s", err, out)
	}
	file, _ := filepath.Abs(filepath.Join(casesDir, "shift_bad.npz"))
	hostKey := filepath.Join(config, "heed", "ssh_host_ed25519_key")

	// serve runs heed share headless until it has printed its guests: line,
	// stops it with sig and returns its stdout and exit status.
	serve := func(sig os.Signal) (string, int) {
		t.Helper()
		cmd := exec.Command(bin, "share", file, "--headless", "--listen", "127.0.0.1:0")
		cmd.Dir = cwd
		cmd.Env = append(os.Environ(), "HOME="+home, "XDG_CONFIG_HOME="+config, "XDG_CACHE_HOME="+cache)
		var stderr bytes.Buffer
		cmd.Stderr = &stderr
		pipe, err := cmd.StdoutPipe()
		if err != nil {
			t.Fatal(err)
		}
		if err := cmd.Start(); err != nil {
			t.Fatal(err)
		}
		var out strings.Builder
		sc := bufio.NewScanner(pipe)
		for sc.Scan() {
			out.WriteString(sc.Text() + "\n")
			if strings.Contains(sc.Text(), "guests: ssh -p") {
				break
			}
		}
		// The server listens before the intro is printed: interrupt it now.
		if err := cmd.Process.Signal(sig); err != nil {
			t.Fatal(err)
		}
		for sc.Scan() {
			out.WriteString(sc.Text() + "\n")
		}
		err = cmd.Wait()
		var ee *exec.ExitError
		if err != nil && !errors.As(err, &ee) {
			t.Fatal(err)
		}
		if code := cmd.ProcessState.ExitCode(); code != 0 {
			t.Logf("stderr:\n%s", stderr.String())
		}
		return out.String(), cmd.ProcessState.ExitCode()
	}

	out1, code := serve(os.Interrupt)
	if code != 0 {
		t.Errorf("interrupted headless share: exit %d, want 0; stdout:\n%s", code, out1)
	}
	if !strings.Contains(out1, "heed share: stopped (0 sessions were open)") {
		t.Errorf("no shutdown line:\n%s", out1)
	}
	if !strings.Contains(out1, "(new, saved in "+hostKey+")") {
		t.Errorf("first run does not say it created %s:\n%s", hostKey, out1)
	}
	st, err := os.Stat(hostKey)
	if err != nil {
		t.Fatal(err)
	}
	if st.Mode().Perm() != 0o600 {
		t.Errorf("host key mode %04o, want 0600", st.Mode().Perm())
	}
	// The fingerprint printed is the key in the file (x/crypto/ssh's
	// SHA256 fingerprint, the string ssh-keygen -l prints).
	data, err := os.ReadFile(hostKey)
	if err != nil {
		t.Fatal(err)
	}
	signer, err := gossh.ParsePrivateKey(data)
	if err != nil {
		t.Fatal(err)
	}
	fp := gossh.FingerprintSHA256(signer.PublicKey())
	if !strings.Contains(out1, "host key "+fp) {
		t.Errorf("stdout does not show the host key %s:\n%s", fp, out1)
	}

	// A second run reuses the key: guests' known_hosts stays valid. It is
	// stopped by SIGTERM, as a service manager stops it: a clean exit 0 too.
	out2, code := serve(syscall.SIGTERM)
	if code != 0 {
		t.Errorf("second run stopped by SIGTERM: exit %d, want 0; stdout:\n%s", code, out2)
	}
	if !strings.Contains(out2, "heed share: stopped (0 sessions were open)") {
		t.Errorf("no shutdown line after SIGTERM:\n%s", out2)
	}
	if !strings.Contains(out2, "host key "+fp) || strings.Contains(out2, "(new, saved in") {
		t.Errorf("second run did not reuse the host key %s:\n%s", fp, out2)
	}
	ents, err := os.ReadDir(cwd)
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range ents {
		t.Errorf("heed share wrote %s in the working directory", e.Name())
	}
}

// TestShareInterruptExitCode: only a command that serves until interrupted
// and shut down cleanly turns an interrupt into exit 0; an interrupted share
// that failed (e.g. interrupted during its statistics pass) and any other
// interrupted command keep 130.
func TestShareInterruptExitCode(t *testing.T) {
	root := newRootCmd()
	find := func(name string) *cobra.Command {
		c, _, err := root.Find([]string{name})
		if err != nil {
			t.Fatal(err)
		}
		return c
	}
	share, check := find("share"), find("check")
	cases := []struct {
		cmd  *cobra.Command
		err  error
		want int
	}{
		{share, nil, 0},
		{share, errors.New("context canceled"), 130},
		{check, nil, 130},
		{root, nil, 130},
	}
	for _, c := range cases {
		interrupted := !stoppedByInterrupt(c.cmd, c.err)
		if got := exitCode(c.err, interrupted); got != c.want {
			t.Errorf("%s interrupted, err %v: exit %d, want %d", c.cmd.Name(), c.err, got, c.want)
		}
	}
}
