package share

// These tests drive the server with the real OpenSSH client (/usr/bin/ssh,
// Debian's openssh-client) and real keys from ssh-keygen: the client and the
// key tool are the outside references for what "authorised", "refused" and
// "fingerprint" mean. Deadlines below only stop a broken test from hanging;
// nothing is timed.

import (
	"bufio"
	"bytes"
	"encoding/json"
	"fmt"
	"log/slog"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"runtime/pprof"
	"strings"
	"sync"
	"testing"
	"time"

	tea "charm.land/bubbletea/v2"
	"github.com/creack/pty"
	gossh "golang.org/x/crypto/ssh"
	"golang.org/x/time/rate"
)

const sshPath = "/usr/bin/ssh"

// patience bounds every wait so a broken server fails the test instead of
// hanging it; it is not a performance threshold.
const patience = 30 * time.Second

func requireSSH(t *testing.T) {
	t.Helper()
	if _, err := os.Stat(sshPath); err != nil {
		t.Skip("skipping: /usr/bin/ssh (Debian's openssh-client) is not installed; CI installs it with scripts/install-deps.sh")
	}
	if _, err := exec.LookPath("ssh-keygen"); err != nil {
		t.Skip("skipping: ssh-keygen (openssh-client) is not installed")
	}
}

// sshKey is a key pair written by ssh-keygen.
type sshKey struct {
	priv, pub   string
	fingerprint string // as ssh-keygen -l prints it
}

func keygen(t *testing.T, dir, name string) sshKey {
	t.Helper()
	priv := filepath.Join(dir, name)
	out, err := exec.Command("ssh-keygen", "-q", "-t", "ed25519", "-N", "", "-C", name, "-f", priv).CombinedOutput()
	if err != nil {
		t.Fatalf("ssh-keygen: %v: %s", err, out)
	}
	return sshKey{priv: priv, pub: priv + ".pub", fingerprint: keygenFingerprint(t, priv+".pub")}
}

// keygenFingerprint asks ssh-keygen for the SHA256 fingerprint of a key file.
func keygenFingerprint(t *testing.T, path string) string {
	t.Helper()
	out, err := exec.Command("ssh-keygen", "-l", "-E", "sha256", "-f", path).CombinedOutput()
	if err != nil {
		t.Fatalf("ssh-keygen -l: %v: %s", err, out)
	}
	f := strings.Fields(string(out)) // "256 SHA256:... comment (ED25519)"
	if len(f) < 2 || !strings.HasPrefix(f[1], "SHA256:") {
		t.Fatalf("ssh-keygen -l printed %q", out)
	}
	return f[1]
}

func writeAuthorized(t *testing.T, path string, keys ...sshKey) {
	t.Helper()
	var b bytes.Buffer
	b.WriteString("# heed share test\n\n")
	for _, k := range keys {
		data, err := os.ReadFile(k.pub)
		if err != nil {
			t.Fatal(err)
		}
		b.Write(data)
	}
	if err := os.WriteFile(path, b.Bytes(), 0o600); err != nil {
		t.Fatal(err)
	}
}

// syncBuffer collects log output from server goroutines.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

// records parses the JSON log lines.
func (s *syncBuffer) records(t *testing.T) []map[string]any {
	t.Helper()
	var out []map[string]any
	sc := bufio.NewScanner(strings.NewReader(s.String()))
	for sc.Scan() {
		var m map[string]any
		if err := json.Unmarshal(sc.Bytes(), &m); err != nil {
			t.Fatalf("log line %q: %v", sc.Text(), err)
		}
		out = append(out, m)
	}
	return out
}

// find returns the first log record with the message and the given fields.
func (s *syncBuffer) find(t *testing.T, msg string, fields map[string]string) map[string]any {
	t.Helper()
	for _, r := range s.records(t) {
		if r["msg"] != msg {
			continue
		}
		ok := true
		for k, v := range fields {
			got, _ := r[k].(string)
			if !strings.Contains(got, v) {
				ok = false
				break
			}
		}
		if ok {
			return r
		}
	}
	return nil
}

// standIn is a small model in place of heed's TUI: it shows what the session
// told it (sizes, environment, colour profile) so the tests can check it.
type standIn struct {
	guest    Guest
	sizes    []string
	lastSize string
	gotos    []string
	keys     []string
	term     string
	colterm  string
	profile  string
}

type gotoLoc string

func (m *standIn) Init() tea.Cmd { return nil }

func (m *standIn) Update(msg tea.Msg) (tea.Model, tea.Cmd) {
	switch msg := msg.(type) {
	case tea.WindowSizeMsg:
		// one new line per distinct size: the renderer writes new lines
		// whole, so the raw pty stream shows each one verbatim
		s := fmt.Sprintf("%dx%d", msg.Width, msg.Height)
		if m.lastSize != s {
			m.lastSize = s
			m.sizes = append(m.sizes, fmt.Sprintf("size#%d %s", len(m.sizes)+1, s))
		}
	case tea.EnvMsg:
		m.term, m.colterm = msg.Getenv("TERM"), msg.Getenv("COLORTERM")
	case tea.ColorProfileMsg:
		m.profile = msg.Profile.String()
	case gotoLoc:
		m.gotos = append(m.gotos, fmt.Sprintf("goto#%d %s", len(m.gotos)+1, msg))
	case tea.KeyPressMsg:
		if msg.String() == "q" {
			return m, tea.Quit
		}
		// every other key on a new line: keys are handled in order, so
		// seeing one proves the keys before it were handled
		m.keys = append(m.keys, fmt.Sprintf("key#%d %s", len(m.keys)+1, msg.String()))
	}
	return m, nil
}

func (m *standIn) View() tea.View {
	lines := []string{
		"stand-in ready for " + m.guest.User,
		"term=" + m.term + " colorterm=" + m.colterm,
		"profile=" + m.profile,
	}
	lines = append(lines, m.sizes...)
	lines = append(lines, m.gotos...)
	lines = append(lines, m.keys...)
	v := tea.NewView(strings.Join(lines, "\n"))
	v.AltScreen = true
	return v
}

type testServer struct {
	*Server
	dir  string
	log  *syncBuffer
	port string
	auth sshKey
}

func startServer(t *testing.T, mod func(*Config)) *testServer {
	t.Helper()
	requireSSH(t)
	dir := t.TempDir()
	auth := keygen(t, dir, "alice")
	ak := filepath.Join(dir, "authorized_keys")
	writeAuthorized(t, ak, auth)
	logs := &syncBuffer{}
	cfg := Config{
		Listen:         "127.0.0.1:0",
		AuthorizedKeys: ak,
		HostKey:        filepath.Join(dir, "host", "ssh_host_ed25519_key"),
		Logger:         slog.New(slog.NewJSONHandler(logs, &slog.HandlerOptions{Level: slog.LevelDebug})),
		App:            func(g Guest) tea.Model { return &standIn{guest: g} },
		// generous: the tests that want the limiter set their own
		Rate:  rate.Inf,
		Burst: 1000,
	}
	if mod != nil {
		mod(&cfg)
	}
	srv, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	if err := srv.Start(); err != nil {
		t.Fatal(err)
	}
	ts := &testServer{Server: srv, dir: dir, log: logs, auth: auth}
	_, ts.port, _ = net.SplitHostPort(srv.Addr().String())
	t.Cleanup(func() {
		if err := srv.Shutdown(5 * time.Second); err != nil {
			t.Errorf("Shutdown: %v", err)
		}
	})
	return ts
}

// sshArgs are the client options every test uses: no user config, no known
// hosts, no agent, only the given key, never a prompt.
func (ts *testServer) sshArgs(key string, extra ...string) []string {
	args := []string{
		"-F", "/dev/null",
		"-p", ts.port,
		"-o", "StrictHostKeyChecking=no",
		"-o", "UserKnownHostsFile=/dev/null",
		"-o", "GlobalKnownHostsFile=/dev/null",
		"-o", "BatchMode=yes",
		"-o", "IdentitiesOnly=yes",
		"-o", "IdentityAgent=none",
		"-o", "LogLevel=ERROR",
	}
	if key != "" {
		args = append(args, "-i", key)
	}
	args = append(args, extra...)
	return args
}

// terminal is an ssh client running in a pseudo-terminal.
type terminal struct {
	t    *testing.T
	cmd  *exec.Cmd
	ptmx *os.File
	mu   sync.Mutex
	out  bytes.Buffer
	done chan struct{}
	err  error
}

func (ts *testServer) open(t *testing.T, key string, cols, rows int, extra ...string) *terminal {
	t.Helper()
	args := ts.sshArgs(key, append([]string{"-tt"}, extra...)...)
	args = append(args, "alice@127.0.0.1")
	cmd := exec.Command(sshPath, args...)
	cmd.Env = append(os.Environ(), "TERM=xterm-256color")
	ptmx, err := pty.StartWithSize(cmd, &pty.Winsize{Cols: uint16(cols), Rows: uint16(rows)})
	if err != nil {
		t.Fatalf("start ssh in a pty: %v", err)
	}
	term := &terminal{t: t, cmd: cmd, ptmx: ptmx, done: make(chan struct{})}
	go func() {
		buf := make([]byte, 4096)
		for {
			n, err := ptmx.Read(buf)
			term.mu.Lock()
			term.out.Write(buf[:n])
			term.mu.Unlock()
			if err != nil {
				break
			}
		}
		term.err = cmd.Wait()
		close(term.done)
	}()
	t.Cleanup(func() {
		select {
		case <-term.done:
		default:
			_ = cmd.Process.Kill()
			<-term.done
		}
		ptmx.Close()
	})
	return term
}

func (term *terminal) output() string {
	term.mu.Lock()
	defer term.mu.Unlock()
	return term.out.String()
}

// waitFor waits until the output contains s.
func (term *terminal) waitFor(s string) {
	term.t.Helper()
	deadline := time.Now().Add(patience)
	for time.Now().Before(deadline) {
		if strings.Contains(term.output(), s) {
			return
		}
		select {
		case <-term.done:
			if strings.Contains(term.output(), s) {
				return
			}
			term.t.Fatalf("ssh exited (%v) before showing %q; output:\n%q", term.err, s, term.output())
		case <-time.After(20 * time.Millisecond):
		}
	}
	term.t.Fatalf("no %q on the screen; output:\n%q", s, term.output())
}

// wait waits for the client to exit and returns its exit code.
func (term *terminal) wait() int {
	term.t.Helper()
	select {
	case <-term.done:
	case <-time.After(patience):
		term.t.Fatalf("ssh did not exit; output:\n%q", term.output())
	}
	if term.err == nil {
		return 0
	}
	if ee, ok := term.err.(*exec.ExitError); ok {
		return ee.ExitCode()
	}
	term.t.Fatalf("ssh: %v", term.err)
	return -1
}

// run runs ssh without a pty and returns its exit code and stderr.
func (ts *testServer) run(t *testing.T, key string, extra ...string) (int, string) {
	t.Helper()
	args := ts.sshArgs(key, extra...)
	cmd := exec.Command(sshPath, args...)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	cmd.Stdin = strings.NewReader("")
	done := make(chan error, 1)
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	go func() { done <- cmd.Wait() }()
	var err error
	select {
	case err = <-done:
	case <-time.After(patience):
		_ = cmd.Process.Kill()
		t.Fatalf("ssh %v did not exit; stderr: %s", extra, stderr.String())
	}
	code := 0
	if ee, ok := err.(*exec.ExitError); ok {
		code = ee.ExitCode()
	} else if err != nil {
		t.Fatal(err)
	}
	return code, stderr.String()
}

func waitUntil(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(patience)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(10 * time.Millisecond)
	}
}

func TestAuthorizedKeySeesScreen(t *testing.T) {
	ts := startServer(t, nil)
	term := ts.open(t, ts.auth.priv, 97, 31, "-o", "SetEnv=COLORTERM=truecolor")
	term.waitFor("stand-in ready for alice")
	// The client's terminal size, environment and colour profile reach the
	// session's program (tea.EnvMsg, tea.ColorProfileMsg).
	term.waitFor("size#1 97x31")
	term.waitFor("term=xterm-256color colorterm=truecolor")
	term.waitFor("profile=TrueColor")
	// A resize of the client's terminal arrives as a new size.
	if err := pty.Setsize(term.ptmx, &pty.Winsize{Cols: 83, Rows: 29}); err != nil {
		t.Fatal(err)
	}
	term.waitFor("size#2 83x29")
	if _, err := term.ptmx.Write([]byte("q")); err != nil {
		t.Fatal(err)
	}
	if code := term.wait(); code != 0 {
		t.Errorf("ssh exit code %d after q, want 0; output %q", code, term.output())
	}
	// ssh-keygen's fingerprint of alice's key is in the log of the session.
	waitUntil(t, "the disconnect log", func() bool { return ts.log.find(t, "disconnect", map[string]string{"key": ts.auth.fingerprint}) != nil })
	for _, msg := range []string{"connect", "session start", "session end"} {
		if ts.log.find(t, msg, map[string]string{"addr": "127.0.0.1:"}) == nil {
			t.Errorf("no %q record in the log:\n%s", msg, ts.log.String())
		}
	}
	if r := ts.log.find(t, "session start", map[string]string{"key": ts.auth.fingerprint, "user": "alice"}); r == nil {
		t.Errorf("session start not logged with the key fingerprint %s:\n%s", ts.auth.fingerprint, ts.log.String())
	}
}

func TestColorProfileFollowsClientTerm(t *testing.T) {
	// Without COLORTERM, OpenSSH sends only TERM: xterm-256color gives 256
	// colours, a dumb terminal none (colorprofile's documented rules).
	ts := startServer(t, nil)
	term := ts.open(t, ts.auth.priv, 90, 24)
	term.waitFor("profile=ANSI256")
	term.ptmx.Write([]byte("q"))
	term.wait()
}

func TestUnknownKeyRefused(t *testing.T) {
	ts := startServer(t, nil)
	mallory := keygen(t, ts.dir, "mallory")
	code, stderr := ts.run(t, mallory.priv, "-tt", "alice@127.0.0.1")
	if code != 255 || !strings.Contains(stderr, "Permission denied (publickey)") {
		t.Errorf("unknown key: exit %d, stderr %q; want 255 and Permission denied (publickey)", code, stderr)
	}
	if r := ts.log.find(t, "refused", map[string]string{"key": mallory.fingerprint, "addr": "127.0.0.1:"}); r == nil {
		t.Errorf("refusal of %s not logged:\n%s", mallory.fingerprint, ts.log.String())
	}
	if ts.Sessions() != 0 || ts.log.find(t, "session start", nil) != nil {
		t.Errorf("a session started for an unknown key")
	}
}

func TestPasswordRefused(t *testing.T) {
	ts := startServer(t, nil)
	// OpenSSH lists the methods the server offers: only publickey.
	code, stderr := ts.run(t, "", "-o", "PreferredAuthentications=password,keyboard-interactive", "-o", "PubkeyAuthentication=no", "alice@127.0.0.1", "true")
	if code != 255 || !strings.Contains(stderr, "Permission denied (publickey)") {
		t.Errorf("password: exit %d, stderr %q; want 255 and Permission denied (publickey)", code, stderr)
	}
	// With -v the client prints the server's list of methods.
	code, stderr = ts.run(t, "", "-v", "-o", "LogLevel=DEBUG1", "-o", "PreferredAuthentications=password", "alice@127.0.0.1")
	if code != 255 || !strings.Contains(stderr, "Authentications that can continue: publickey\r\n") && !strings.Contains(stderr, "Authentications that can continue: publickey\n") {
		t.Errorf("server offered more than publickey: exit %d, stderr %q", code, stderr)
	}
	// sshpass is not on Debian's default install, so an actual password and
	// keyboard-interactive attempt is made with golang.org/x/crypto/ssh.
	for _, auth := range []gossh.AuthMethod{
		gossh.Password("hunter2"),
		gossh.KeyboardInteractive(func(string, string, []string, []bool) ([]string, error) { return []string{"hunter2"}, nil }),
	} {
		c, err := gossh.Dial("tcp", "127.0.0.1:"+ts.port, &gossh.ClientConfig{
			User: "alice", Auth: []gossh.AuthMethod{auth},
			HostKeyCallback: gossh.InsecureIgnoreHostKey(), Timeout: patience,
		})
		if err == nil {
			c.Close()
			t.Fatal("a password / keyboard-interactive login was accepted")
		}
		if !strings.Contains(err.Error(), "unable to authenticate") {
			t.Errorf("password attempt: %v, want unable to authenticate", err)
		}
	}
	// Clients do not even send the password: the server never lists the
	// method. The failed connection is logged as a refusal.
	waitUntil(t, "the refusal in the log", func() bool {
		return ts.log.find(t, "refused", map[string]string{"why": "authentication failed", "addr": "127.0.0.1:"}) != nil
	})
	// No authentication at all (method "none") is not enough either.
	c, err := gossh.Dial("tcp", "127.0.0.1:"+ts.port, &gossh.ClientConfig{
		User: "alice", HostKeyCallback: gossh.InsecureIgnoreHostKey(), Timeout: patience,
	})
	if err == nil {
		c.Close()
		t.Fatal("an anonymous login was accepted")
	}
}

func TestExecAndForwardingRefused(t *testing.T) {
	ts := startServer(t, nil)
	// exec: `ssh host command`
	code, stderr := ts.run(t, ts.auth.priv, "alice@127.0.0.1", "cat /etc/passwd")
	if code == 0 || !strings.Contains(stderr, "exec request failed") {
		t.Errorf("exec: exit %d, stderr %q; want failure and 'exec request failed'", code, stderr)
	}
	// subsystem: sftp
	code, stderr = ts.run(t, ts.auth.priv, "-s", "alice@127.0.0.1", "sftp")
	if code == 0 || !strings.Contains(stderr, "subsystem request failed") {
		t.Errorf("sftp subsystem: exit %d, stderr %q; want failure", code, stderr)
	}
	// local forwarding through a stdio channel (direct-tcpip)
	code, stderr = ts.run(t, ts.auth.priv, "-W", "127.0.0.1:"+ts.port, "alice@127.0.0.1")
	if code == 0 || !strings.Contains(stderr, "stdio forwarding failed") && !strings.Contains(stderr, "open failed") {
		t.Errorf("-W forwarding: exit %d, stderr %q; want 'open failed'", code, stderr)
	}
	// remote forwarding (tcpip-forward)
	code, stderr = ts.run(t, ts.auth.priv, "-N", "-o", "ExitOnForwardFailure=yes", "-R", "127.0.0.1:0:127.0.0.1:9", "alice@127.0.0.1")
	if code == 0 || !strings.Contains(stderr, "remote port forwarding failed") {
		t.Errorf("-R forwarding: exit %d, stderr %q; want 'remote port forwarding failed'", code, stderr)
	}
	if ts.log.find(t, "refused", map[string]string{"why": "exec request", "key": ts.auth.fingerprint}) == nil {
		t.Errorf("exec refusal not logged:\n%s", ts.log.String())
	}

	// Agent and X11 forwarding requests are answered "no". OpenSSH only
	// logs these at debug level, so ask with x/crypto/ssh.
	signer := loadSigner(t, ts.auth.priv)
	c, err := gossh.Dial("tcp", "127.0.0.1:"+ts.port, &gossh.ClientConfig{
		User: "alice", Auth: []gossh.AuthMethod{gossh.PublicKeys(signer)},
		HostKeyCallback: gossh.InsecureIgnoreHostKey(), Timeout: patience,
	})
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	sess, err := c.NewSession()
	if err != nil {
		t.Fatal(err)
	}
	defer sess.Close()
	for _, req := range []string{"auth-agent-req@openssh.com", "x11-req"} {
		ok, err := sess.SendRequest(req, true, nil)
		if err != nil || ok {
			t.Errorf("%s: ok=%v err=%v, want refused", req, ok, err)
		}
	}
	if ok, _, err := c.SendRequest("tcpip-forward", true, gossh.Marshal(struct {
		Addr string
		Port uint32
	}{"127.0.0.1", 0})); ok || err != nil {
		t.Errorf("tcpip-forward: ok=%v err=%v, want refused", ok, err)
	}
	// A session without a pty gets no TUI.
	if out, err := sess.CombinedOutput(""); err == nil {
		t.Errorf("shell without a pty succeeded: %q", out)
	}
}

func loadSigner(t *testing.T, path string) gossh.Signer {
	t.Helper()
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	s, err := gossh.ParsePrivateKey(data)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

func TestSessionCap(t *testing.T) {
	ts := startServer(t, func(c *Config) { c.MaxSessions = 2 })
	a := ts.open(t, ts.auth.priv, 80, 24)
	b := ts.open(t, ts.auth.priv, 80, 24)
	a.waitFor("stand-in ready")
	b.waitFor("stand-in ready")
	c := ts.open(t, ts.auth.priv, 80, 24)
	c.waitFor("all 2 sessions are taken")
	if code := c.wait(); code == 0 {
		t.Errorf("third session exited 0, want an error")
	}
	if ts.Sessions() != 2 {
		t.Errorf("Sessions() = %d, want 2", ts.Sessions())
	}
	if ts.log.find(t, "refused", map[string]string{"why": "session cap reached", "key": ts.auth.fingerprint}) == nil {
		t.Errorf("cap refusal not logged:\n%s", ts.log.String())
	}
	// One leaves: there is room again.
	a.ptmx.Write([]byte("q"))
	a.wait()
	waitUntil(t, "a free session slot", func() bool { return ts.Sessions() == 1 })
	d := ts.open(t, ts.auth.priv, 80, 24)
	d.waitFor("stand-in ready")
}

func TestRateLimitPerAddress(t *testing.T) {
	// A bucket of 2 that practically never refills.
	ts := startServer(t, func(c *Config) { c.Rate = rate.Every(time.Hour); c.Burst = 2 })
	for i := 0; i < 2; i++ {
		term := ts.open(t, ts.auth.priv, 80, 24)
		term.waitFor("stand-in ready")
		term.ptmx.Write([]byte("q"))
		term.wait()
	}
	term := ts.open(t, ts.auth.priv, 80, 24)
	term.waitFor("too many sessions from your address")
	if code := term.wait(); code == 0 {
		t.Errorf("rate-limited session exited 0")
	}
	if ts.log.find(t, "refused", map[string]string{"why": "rate limit", "addr": "127.0.0.1:"}) == nil {
		t.Errorf("rate limit refusal not logged:\n%s", ts.log.String())
	}
}

func TestShutdownEndsSessions(t *testing.T) {
	requireSSH(t)
	ts := startServer(t, nil)
	var terms []*terminal
	for i := 0; i < 3; i++ {
		term := ts.open(t, ts.auth.priv, 80, 24)
		term.waitFor("stand-in ready")
		terms = append(terms, term)
	}
	if err := ts.Shutdown(patience); err != nil {
		t.Fatalf("Shutdown: %v", err)
	}
	for i, term := range terms {
		term.wait()
		out := term.output()
		if !strings.Contains(out, "the presenter stopped sharing") {
			t.Errorf("session %d: no goodbye; output %q", i, out)
		}
		// The guest's terminal left the alternate screen (DECRST 1049).
		if !strings.Contains(out, "\x1b[?1049l") {
			t.Errorf("session %d: alternate screen not restored; output %q", i, out)
		}
	}
	select {
	case <-ts.Done():
	default:
		t.Error("server still serving after Shutdown")
	}
	if ts.Sessions() != 0 {
		t.Errorf("Sessions() = %d after Shutdown", ts.Sessions())
	}
	// New connections are refused.
	if c, err := net.Dial("tcp", "127.0.0.1:"+ts.port); err == nil {
		c.Close()
		t.Error("still accepting connections after Shutdown")
	}
}

// TestLoad opens N sessions at once, reports the memory each one costs and
// checks that every goroutine they started is gone after they close; with
// heed's TUI (TestLoadTUI) and with the stand-in model.
func TestLoad(t *testing.T) { testLoad(t, nil) }

// loadApp is a session model for testLoad: the App, the text of its first
// screen, and whether n sessions have moved to decoder:L1:H1.
type loadApp struct {
	app   func(Guest) tea.Model
	ready string
	moved func(n int) bool
}

func testLoad(t *testing.T, real func(*Hub) loadApp) {
	requireSSH(t)
	n := 8
	if testing.Short() {
		n = 3
	}
	hub := NewHub()
	hub.Publish("decoder:L0:H0")
	app := func(g Guest) tea.Model {
		return NewFollower(g.Ctx, hub, &standIn{guest: g}, func(loc string) tea.Msg { return gotoLoc(loc) })
	}
	ready := "stand-in ready"
	var moved func(int) bool
	if real != nil {
		la := real(hub)
		app, ready, moved = la.app, la.ready, la.moved
	}
	ts := startServer(t, func(c *Config) {
		c.MaxSessions = n
		c.App = app
	})
	settle := func() (runtime.MemStats, int) {
		runtime.GC()
		var ms runtime.MemStats
		runtime.ReadMemStats(&ms)
		return ms, runtime.NumGoroutine()
	}
	before, g0 := settle()
	var terms []*terminal
	for i := 0; i < n; i++ {
		terms = append(terms, ts.open(t, ts.auth.priv, 120, 40))
	}
	for _, term := range terms {
		term.waitFor(ready)
	}
	waitUntil(t, "every session open", func() bool { return ts.Sessions() == n })
	hub.Publish("decoder:L1:H1")
	if moved != nil {
		waitUntil(t, "every session at the presenter's location", func() bool { return moved(n) })
	} else {
		for _, term := range terms {
			term.waitFor("goto#2 decoder:L1:H1")
		}
	}
	during, g1 := settle()
	perSession := (int64(during.HeapAlloc) - int64(before.HeapAlloc)) / int64(n)
	t.Logf("%d sessions: %d KiB heap per session, %d goroutines per session", n, perSession/1024, (g1-g0)/n)
	if g1 <= g0 {
		t.Errorf("goroutines %d with %d sessions, %d before: the count does not see sessions", g1, n, g0)
	}
	for _, term := range terms {
		term.ptmx.Write([]byte("q"))
	}
	for _, term := range terms {
		if code := term.wait(); code != 0 {
			t.Errorf("ssh exit %d", code)
		}
	}
	waitUntil(t, "every session closed", func() bool { return ts.Sessions() == 0 })
	// Goroutines settle back to where they were before the sessions.
	deadline := time.Now().Add(patience)
	for {
		_, g2 := settle()
		if g2 <= g0 {
			break
		}
		if time.Now().After(deadline) {
			var b bytes.Buffer
			pprof.Lookup("goroutine").WriteTo(&b, 1)
			t.Fatalf("goroutine leak: %d before, %d after the sessions closed:\n%s", g0, g2, b.String())
		}
		time.Sleep(20 * time.Millisecond)
	}
}

func TestRefusesToStartWithoutKeys(t *testing.T) {
	dir := t.TempDir()
	app := func(Guest) tea.Model { return &standIn{} }
	hk := filepath.Join(dir, "host_key")
	if _, err := New(Config{HostKey: hk, App: app}); err == nil || !strings.Contains(err.Error(), "key source") {
		t.Errorf("no authorized_keys: err %v, want a refusal", err)
	}
	missing := filepath.Join(dir, "nope")
	if _, err := New(Config{AuthorizedKeys: missing, HostKey: hk, App: app}); err == nil {
		t.Error("missing authorized_keys accepted")
	}
	empty := filepath.Join(dir, "empty")
	os.WriteFile(empty, []byte("# nothing here\n\n"), 0o600)
	if _, err := New(Config{AuthorizedKeys: empty, HostKey: hk, App: app}); err == nil || !strings.Contains(err.Error(), "no usable public key") {
		t.Errorf("empty authorized_keys: err %v", err)
	}
	loose := filepath.Join(dir, "loose")
	os.WriteFile(loose, []byte("ssh-ed25519 AAAAC3NzaC1lZDI1NTE5AAAAIOMqqnkVzrm0SdG6UOoqKLsabgH5C9okWi0dh2l9GKJl x\n"), 0o600)
	os.Chmod(loose, 0o666)
	if _, err := New(Config{AuthorizedKeys: loose, HostKey: hk, App: app}); err == nil || !strings.Contains(err.Error(), "writable by group or others") {
		t.Errorf("world-writable authorized_keys: err %v", err)
	}
}

func TestAuthorizedKeysOptionsSkipped(t *testing.T) {
	requireSSH(t)
	dir := t.TempDir()
	a, b := keygen(t, dir, "plain"), keygen(t, dir, "restricted")
	pa, _ := os.ReadFile(a.pub)
	pb, _ := os.ReadFile(b.pub)
	data := string(pa) + "garbage line\n" + `from="10.0.0.1",no-pty ` + string(pb)
	ak := ParseAuthorizedKeys([]byte(data))
	if len(ak.Keys) != 1 || gossh.FingerprintSHA256(ak.Keys[0]) != a.fingerprint {
		t.Fatalf("keys %d, want only the plain key %s", len(ak.Keys), a.fingerprint)
	}
	if len(ak.Skipped) != 2 || !strings.Contains(ak.Skipped[0], "line 2") || !strings.Contains(ak.Skipped[1], b.fingerprint) {
		t.Errorf("skipped %q", ak.Skipped)
	}
}

func TestHostKeyCreatedPrivateAndReused(t *testing.T) {
	requireSSH(t)
	dir := t.TempDir()
	path := filepath.Join(dir, "cfg", "heed", "ssh_host_ed25519_key")
	s1, created, err := LoadOrCreateHostKey(path)
	if err != nil || !created {
		t.Fatalf("create: %v %v", created, err)
	}
	st, err := os.Stat(path)
	if err != nil {
		t.Fatal(err)
	}
	if st.Mode().Perm() != 0o600 {
		t.Errorf("host key mode %04o, want 0600", st.Mode().Perm())
	}
	if d, _ := os.Stat(filepath.Dir(path)); d.Mode().Perm() != 0o700 {
		t.Errorf("host key directory mode %04o, want 0700", d.Mode().Perm())
	}
	// ssh-keygen reads the file we wrote and derives the same public key.
	out, err := exec.Command("ssh-keygen", "-y", "-f", path).CombinedOutput()
	if err != nil {
		t.Fatalf("ssh-keygen -y: %v: %s", err, out)
	}
	pub, _, _, _, err := gossh.ParseAuthorizedKey(out)
	if err != nil || !bytes.Equal(pub.Marshal(), s1.PublicKey().Marshal()) {
		t.Fatalf("ssh-keygen -y gives another key: %v %q", err, out)
	}
	s2, created, err := LoadOrCreateHostKey(path)
	if err != nil || created {
		t.Fatalf("reuse: created=%v err=%v", created, err)
	}
	if !bytes.Equal(s1.PublicKey().Marshal(), s2.PublicKey().Marshal()) {
		t.Error("the host key changed between runs")
	}
	os.Chmod(path, 0o644)
	if _, _, err := LoadOrCreateHostKey(path); err == nil || !strings.Contains(err.Error(), "chmod 600") {
		t.Errorf("group-readable host key: %v, want a refusal", err)
	}
}

func TestHostKeySeenByClient(t *testing.T) {
	// The key ssh-keyscan receives is the key in the file, across restarts.
	ts := startServer(t, nil)
	if _, err := exec.LookPath("ssh-keyscan"); err != nil {
		t.Skip("no ssh-keyscan")
	}
	scan := func(port string) string {
		out, err := exec.Command("ssh-keyscan", "-p", port, "-t", "ed25519", "127.0.0.1").Output()
		if err != nil {
			t.Fatalf("ssh-keyscan: %v", err)
		}
		f := filepath.Join(t.TempDir(), "scanned.pub")
		line := strings.TrimSpace(string(out))
		parts := strings.Fields(line)
		if len(parts) < 3 {
			t.Fatalf("ssh-keyscan printed %q", out)
		}
		os.WriteFile(f, []byte(parts[1]+" "+parts[2]+"\n"), 0o600)
		return keygenFingerprint(t, f)
	}
	got := scan(ts.port)
	if got != ts.HostKeyFingerprint() {
		t.Errorf("ssh-keyscan sees %s, server says %s", got, ts.HostKeyFingerprint())
	}
	srv2, err := New(Config{Listen: "127.0.0.1:0", AuthorizedKeys: filepath.Join(ts.dir, "authorized_keys"),
		HostKey: filepath.Join(ts.dir, "host", "ssh_host_ed25519_key"), App: ts.cfg.App, Logger: slog.New(slog.DiscardHandler)})
	if err != nil {
		t.Fatal(err)
	}
	if srv2.HostKeyCreated() {
		t.Error("second server created a new host key")
	}
	if err := srv2.Start(); err != nil {
		t.Fatal(err)
	}
	defer srv2.Shutdown(5 * time.Second)
	_, port2, _ := net.SplitHostPort(srv2.Addr().String())
	if got2 := scan(port2); got2 != got {
		t.Errorf("restarted server presents %s, first presented %s", got2, got)
	}
}

func TestNonLoopbackWarns(t *testing.T) {
	requireSSH(t)
	dir := t.TempDir()
	k := keygen(t, dir, "k")
	ak := filepath.Join(dir, "ak")
	writeAuthorized(t, ak, k)
	for _, tc := range []struct {
		listen string
		warn   bool
	}{{"127.0.0.1:0", false}, {"[::1]:0", false}, {"localhost:0", false}, {"0.0.0.0:0", true}, {":2222", true}, {"192.0.2.1:22", true}} {
		logs := &syncBuffer{}
		_, err := New(Config{Listen: tc.listen, AuthorizedKeys: ak, HostKey: filepath.Join(dir, "hk"),
			App: func(Guest) tea.Model { return &standIn{} }, Logger: slog.New(slog.NewJSONHandler(logs, nil))})
		if err != nil {
			t.Fatal(err)
		}
		warned := strings.Contains(logs.String(), "listening beyond this machine")
		if warned != tc.warn {
			t.Errorf("listen %s: warned=%v, want %v", tc.listen, warned, tc.warn)
		}
	}
}

func TestRevokedKeyRefused(t *testing.T) {
	// authorized_keys is read at every authentication: removing a key
	// revokes it without a restart.
	ts := startServer(t, nil)
	bob := keygen(t, ts.dir, "bob")
	writeAuthorized(t, filepath.Join(ts.dir, "authorized_keys"), ts.auth, bob)
	term := ts.open(t, bob.priv, 80, 24)
	term.waitFor("stand-in ready")
	term.ptmx.Write([]byte("q"))
	term.wait()
	writeAuthorized(t, filepath.Join(ts.dir, "authorized_keys"), ts.auth)
	code, stderr := ts.run(t, bob.priv, "-tt", "alice@127.0.0.1")
	if code != 255 || !strings.Contains(stderr, "Permission denied") {
		t.Errorf("revoked key: exit %d stderr %q", code, stderr)
	}
}

func TestFollowOverSSH(t *testing.T) {
	hub := NewHub()
	ts := startServer(t, func(c *Config) {
		c.App = func(g Guest) tea.Model {
			return NewFollower(g.Ctx, hub, &standIn{guest: g}, func(loc string) tea.Msg { return gotoLoc(loc) })
		}
	})
	hub.Publish("decoder:L1:H2")
	term := ts.open(t, ts.auth.priv, 90, 24)
	term.waitFor("goto#1 decoder:L1:H2")
	term.waitFor("following the presenter")
	hub.Publish("encoder:L3:H0:q5")
	term.waitFor("goto#2 encoder:L3:H0:q5")
	// F is the follower's; z reaches the stand-in after it.
	term.ptmx.Write([]byte("Fz"))
	term.waitFor("key#1 z")
	hub.Publish("cross:L0:H1")
	term.ptmx.Write([]byte("y"))
	term.waitFor("key#2 y")
	if strings.Contains(term.output(), "goto#3") {
		t.Errorf("guest on their own was moved by the presenter: %q", term.output())
	}
	term.ptmx.Write([]byte("F"))
	term.waitFor("goto#3 cross:L0:H1")
	term.ptmx.Write([]byte("q"))
	term.wait()
	waitUntil(t, "the follower's subscription to end", func() bool { return hub.Subscribers() == 0 })
}

func TestFingerprintMatchesSSHKeygen(t *testing.T) {
	requireSSH(t)
	k := keygen(t, t.TempDir(), "x")
	data, _ := os.ReadFile(k.pub)
	pub, _, _, _, err := gossh.ParseAuthorizedKey(data)
	if err != nil {
		t.Fatal(err)
	}
	if got := fingerprint(pub); got != k.fingerprint {
		t.Errorf("fingerprint %s, ssh-keygen -l says %s", got, k.fingerprint)
	}
}

// TestTimeouts: a connection without traffic is closed after IdleTimeout,
// and a busy one after MaxTimeout. (The durations only make the test short;
// nothing is measured.)
func TestTimeouts(t *testing.T) {
	idle := startServer(t, func(c *Config) { c.IdleTimeout = 500 * time.Millisecond })
	quiet := idle.open(t, idle.auth.priv, 80, 24)
	quiet.waitFor("stand-in ready")
	quiet.wait() // returns only because the server closed the connection
	waitUntil(t, "the idle session to end", func() bool { return idle.Sessions() == 0 })

	abs := startServer(t, func(c *Config) { c.MaxTimeout = 1500 * time.Millisecond })
	busy := abs.open(t, abs.auth.priv, 80, 24)
	busy.waitFor("stand-in ready")
	stop := make(chan struct{})
	go func() {
		for {
			select {
			case <-busy.done:
				return
			case <-stop:
				return
			case <-time.After(100 * time.Millisecond):
				busy.ptmx.Write([]byte("x")) // traffic: the idle timeout never fires
			}
		}
	}()
	busy.wait()
	close(stop)
	if !strings.Contains(busy.output(), "key#2 x") {
		t.Errorf("the busy session saw no traffic before it was closed: %q", busy.output())
	}
}

// Connections that have not authenticated are capped (maxPending), so the
// two minutes a person has to type a passphrase cannot be used to hold the
// server: the next one is closed at once, and an authenticated guest still
// gets in once the pending ones go.
func TestPendingConnectionsCapped(t *testing.T) {
	ts := startServer(t, nil)
	var held []net.Conn
	defer func() {
		for _, c := range held {
			c.Close()
		}
	}()
	for i := 0; i < maxPending; i++ {
		c, err := net.Dial("tcp", ts.Addr().String())
		if err != nil {
			t.Fatal(err)
		}
		held = append(held, c)
	}
	// wait until the server has counted them (no timing is asserted)
	deadline := time.Now().Add(10 * time.Second)
	for ts.pending.Load() < maxPending && time.Now().Before(deadline) {
		time.Sleep(10 * time.Millisecond)
	}
	c, err := net.Dial("tcp", ts.Addr().String())
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	c.SetReadDeadline(time.Now().Add(10 * time.Second))
	if n, err := c.Read(make([]byte, 64)); err == nil {
		t.Errorf("connection %d past the cap got %d bytes of a handshake, want it closed", maxPending+1, n)
	}
	for _, c := range held {
		c.Close()
	}
	held = nil
	for ts.pending.Load() > 0 && time.Now().Before(deadline) {
		time.Sleep(10 * time.Millisecond)
	}
	if n := ts.pending.Load(); n != 0 {
		t.Errorf("%d connections still counted as pending after they closed", n)
	}
}
