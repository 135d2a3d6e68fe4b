// Package share serves heed's terminal UI over SSH (wish v2) to the people
// whose public keys are in an authorized_keys file, and nobody else.
//
// Security model: public-key authentication only (no password, no
// keyboard-interactive, never anonymous); the server refuses to start
// without at least one usable key. Sessions get an interactive TUI and
// nothing else: shell commands (exec), subsystems (sftp), port forwarding,
// agent and X11 forwarding are refused. Concurrent sessions are capped, each
// address is rate limited, and idle and absolute timeouts end forgotten
// connections. Every connection, refusal and disconnection is logged with
// the remote address and, once known, the key's SHA256 fingerprint.
//
// Each session runs its own tea.Program with the client's terminal size,
// environment (tea.EnvMsg) and colour profile; the data it shows is whatever
// the App function closes over, shared read-only between sessions.
package share

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"sync"
	"sync/atomic"
	"time"

	tea "charm.land/bubbletea/v2"
	"charm.land/ssh"
	"charm.land/wish/v2"
	"charm.land/wish/v2/activeterm"
	bm "charm.land/wish/v2/bubbletea"
	"charm.land/wish/v2/ratelimiter"
	gossh "golang.org/x/crypto/ssh"
	"golang.org/x/time/rate"
)

// Defaults of Config.
const (
	DefaultListen      = "127.0.0.1:2222"
	DefaultMaxSessions = 8
	DefaultIdleTimeout = 15 * time.Minute
	DefaultMaxTimeout  = 4 * time.Hour
	// DefaultRate and DefaultBurst: sessions per address, a token bucket.
	DefaultRate  = rate.Limit(1.0 / 3) // one new session every 3 s on average
	DefaultBurst = 5
	// handshakeTimeout bounds how long an unauthenticated connection may
	// stay: long enough for a person to type a key's passphrase (OpenSSH
	// sshd's LoginGraceTime default, 120 s, from memory).
	handshakeTimeout = 2 * time.Minute
	// maxPending caps the connections that have not authenticated yet, so
	// that the longer grace cannot be used to hold many open (OpenSSH
	// sshd's MaxStartups begins refusing at 10, from memory).
	maxPending = 10
	// maxAuthTries is OpenSSH sshd's default MaxAuthTries.
	maxAuthTries = 6
)

// Guest describes one SSH session to the App function.
type Guest struct {
	User        string
	Addr        string
	Fingerprint string // SHA256 fingerprint of the key the guest authenticated with
	// Ctx ends when the session ends or the server shuts down: a Cmd that
	// blocks must select on it, or its goroutine outlives the session.
	Ctx context.Context
}

// Config configures a Server. Zero values take the defaults above.
type Config struct {
	// Listen is the TCP address, DefaultListen when empty. A non-loopback
	// address is allowed but logged as a warning.
	Listen string
	// AuthorizedKeys is the authorized_keys file (required). It is read at
	// start (which fails without a usable key) and again at every
	// authentication, so removing a line revokes that key for new sessions.
	AuthorizedKeys string
	// HostKey is the host private key file (required); created when missing.
	HostKey string
	// MaxSessions caps concurrent sessions.
	MaxSessions int
	// IdleTimeout ends a connection without traffic; MaxTimeout ends any connection.
	IdleTimeout, MaxTimeout time.Duration
	// Rate and Burst limit new sessions per remote IP address.
	Rate  rate.Limit
	Burst int
	// Logger receives every connect, refusal and disconnect. nil: slog.Default().
	Logger *slog.Logger
	// App returns the model of one session (required). It is called once per
	// session, from the session's goroutine.
	App func(Guest) tea.Model
	// OnChange, when set, is called (from a server goroutine) after a session
	// starts or ends, with the number of open sessions and a one-line
	// description of what happened.
	OnChange func(sessions int, event string)
}

// Server is a configured SSH server; see New.
type Server struct {
	cfg      Config
	log      *slog.Logger
	srv      *ssh.Server
	hostKey  gossh.Signer
	created  bool
	keysPath string
	limiter  ratelimiter.RateLimiter

	appCtx    context.Context
	appCancel context.CancelFunc

	sem      chan struct{}
	sessions atomic.Int64
	conns    atomic.Int64
	pending  atomic.Int64 // connections not authenticated yet
	unauth   sync.Map     // remote address string -> struct{} while not authenticated
	guests   sync.Map     // ssh.Session -> context.Context
	fps      sync.Map     // remote address string -> fingerprint

	mu       sync.Mutex
	ln       net.Listener
	done     chan struct{}
	serveErr error
}

// New validates cfg, loads the authorized keys and the host key (creating
// it when missing) and builds the server. It does not listen yet; see Start.
func New(cfg Config) (*Server, error) {
	if cfg.App == nil {
		return nil, errors.New("share: no App")
	}
	if cfg.Listen == "" {
		cfg.Listen = DefaultListen
	}
	if cfg.MaxSessions <= 0 {
		cfg.MaxSessions = DefaultMaxSessions
	}
	if cfg.IdleTimeout <= 0 {
		cfg.IdleTimeout = DefaultIdleTimeout
	}
	if cfg.MaxTimeout <= 0 {
		cfg.MaxTimeout = DefaultMaxTimeout
	}
	if cfg.Rate <= 0 {
		cfg.Rate = DefaultRate
	}
	if cfg.Burst <= 0 {
		cfg.Burst = DefaultBurst
	}
	lg := cfg.Logger
	if lg == nil {
		lg = slog.Default()
	}
	ak, err := LoadAuthorizedKeys(cfg.AuthorizedKeys)
	if err != nil {
		return nil, err
	}
	for _, s := range ak.Skipped {
		lg.Warn("authorized_keys line skipped", "file", cfg.AuthorizedKeys, "why", s)
	}
	signer, created, err := LoadOrCreateHostKey(cfg.HostKey)
	if err != nil {
		return nil, err
	}
	host, _, err := net.SplitHostPort(cfg.Listen)
	if err != nil {
		return nil, fmt.Errorf("listen address %q: %w", cfg.Listen, err)
	}
	if !isLoopback(host) {
		lg.Warn("listening beyond this machine: anyone who can reach the address may try to log in; only keys in authorized_keys get in",
			"listen", cfg.Listen)
	}

	s := &Server{
		cfg:      cfg,
		log:      lg,
		hostKey:  signer,
		created:  created,
		keysPath: cfg.AuthorizedKeys,
		limiter:  ratelimiter.NewRateLimiter(cfg.Rate, cfg.Burst, 4096),
		sem:      make(chan struct{}, cfg.MaxSessions),
		done:     make(chan struct{}),
	}
	s.appCtx, s.appCancel = context.WithCancel(context.Background())

	// The host key goes in as an option: wish.NewServer writes a key of its
	// own to ./id_ed25519, in whatever directory heed runs in, when no host
	// key is among its options.
	srv, err := wish.NewServer(
		func(srv *ssh.Server) error { srv.AddHostKey(signer); return nil },
		wish.WithAddress(cfg.Listen),
		wish.WithVersion("heed"),
		wish.WithIdleTimeout(cfg.IdleTimeout),
		wish.WithMaxTimeout(cfg.MaxTimeout),
		wish.WithPublicKeyAuth(s.checkKey),
		// Middlewares: the last listed runs first.
		wish.WithMiddleware(
			bm.Middleware(s.teaHandler),
			activeterm.Middleware(),
			s.guestContext,
			s.capSessions,
			s.rateLimit,
			s.logSession,
		),
	)
	if err != nil {
		return nil, fmt.Errorf("share: %w", err)
	}
	srv.HandshakeTimeout = handshakeTimeout
	// Only interactive sessions: a "shell" request with a pty. exec and
	// subsystem requests are refused here (and the request filter below).
	srv.SessionRequestCallback = func(sess ssh.Session, requestType string) bool {
		if requestType == "shell" {
			return true
		}
		s.log.Warn("refused", "why", requestType+" request", "addr", sess.RemoteAddr().String(),
			"user", sess.User(), "key", fingerprint(sess.PublicKey()), "command", sess.RawCommand(), "subsystem", sess.Subsystem())
		return false
	}
	srv.ServerConfigCallback = func(ssh.Context) *gossh.ServerConfig {
		return &gossh.ServerConfig{
			MaxAuthTries: maxAuthTries,
			AuthLogCallback: func(conn gossh.ConnMetadata, method string, err error) {
				// "none" is every client's first probe; public keys are logged
				// by checkKey with their fingerprint.
				if err != nil && method != "none" && method != "publickey" {
					s.log.Warn("refused", "why", method+" authentication is not offered", "addr", conn.RemoteAddr().String(), "user", conn.User())
				}
			},
		}
	}
	// Only "session" channels: no direct-tcpip (local forwarding) and no
	// global tcpip-forward requests (remote forwarding).
	srv.ChannelHandlers = map[string]ssh.ChannelHandler{"session": s.sessionChannel}
	srv.RequestHandlers = map[string]ssh.RequestHandler{}
	srv.SubsystemHandlers = map[string]ssh.SubsystemHandler{}
	srv.LocalPortForwardingCallback = nil
	srv.ReversePortForwardingCallback = nil
	srv.ConnCallback = s.onConnect
	srv.ConnectionFailedCallback = func(conn net.Conn, err error) {
		why := err.Error()
		var ae *gossh.ServerAuthError
		if errors.As(err, &ae) {
			why = "authentication failed (only public keys from authorized_keys are accepted): " + why
		}
		s.log.Warn("refused", "why", why, "addr", conn.RemoteAddr().String())
	}
	srv.ConnectionCloseCallback = s.onClose
	s.srv = srv
	return s, nil
}

func isLoopback(host string) bool {
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

func fingerprint(k ssh.PublicKey) string {
	if k == nil {
		return ""
	}
	return gossh.FingerprintSHA256(k)
}

func ctxFingerprint(ctx ssh.Context) string {
	k, _ := ctx.Value(ssh.ContextKeyPublicKey).(ssh.PublicKey)
	return fingerprint(k)
}

// HostKeyFingerprint is the SHA256 fingerprint of the host key, for guests to
// compare with what their ssh client shows on first connection.
func (s *Server) HostKeyFingerprint() string { return gossh.FingerprintSHA256(s.hostKey.PublicKey()) }

// HostKeyCreated reports whether New created the host key file.
func (s *Server) HostKeyCreated() bool { return s.created }

// Sessions is the number of open sessions.
func (s *Server) Sessions() int { return int(s.sessions.Load()) }

// Start listens on Config.Listen and serves in the background. It returns
// once the server accepts connections, so a Shutdown right after it stops
// the server.
func (s *Server) Start() error {
	ln, err := net.Listen("tcp", s.cfg.Listen)
	if err != nil {
		return fmt.Errorf("share: %w", err)
	}
	s.mu.Lock()
	s.ln = ln
	s.mu.Unlock()
	s.log.Info("listening", "addr", ln.Addr().String(), "host_key", s.HostKeyFingerprint(),
		"authorized_keys", s.keysPath, "max_sessions", s.cfg.MaxSessions)
	al := &acceptSignal{Listener: ln, ready: make(chan struct{})}
	go func() {
		err := s.srv.Serve(al)
		if errors.Is(err, ssh.ErrServerClosed) {
			err = nil
		}
		s.mu.Lock()
		s.serveErr = err
		s.mu.Unlock()
		close(s.done)
	}()
	// ssh.Server.Shutdown only closes the listeners Serve has registered, and
	// Serve registers its listener before its first Accept: until then a
	// Shutdown would leave the server serving.
	select {
	case <-al.ready:
		return nil
	case <-s.done:
		if err := s.Err(); err != nil {
			return fmt.Errorf("share: %w", err)
		}
		return errors.New("share: the server stopped before serving")
	}
}

// acceptSignal closes ready when Serve first calls Accept.
type acceptSignal struct {
	net.Listener
	once  sync.Once
	ready chan struct{}
}

func (l *acceptSignal) Accept() (net.Conn, error) {
	l.once.Do(func() { close(l.ready) })
	return l.Listener.Accept()
}

// Addr is the address the server listens on (after Start), or nil.
func (s *Server) Addr() net.Addr {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.ln == nil {
		return nil
	}
	return s.ln.Addr()
}

// Done is closed when the server stops serving.
func (s *Server) Done() <-chan struct{} { return s.done }

// Err is the error that stopped the server (nil after Shutdown).
func (s *Server) Err() error {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.serveErr
}

// Shutdown ends every session and stops the server: it cancels the context
// every session's program runs under (each TUI restores its guest's terminal
// and the session closes), waits up to timeout for the connections to end,
// then closes whatever is left.
func (s *Server) Shutdown(timeout time.Duration) error {
	s.appCancel()
	ctx, cancel := context.WithTimeout(context.Background(), timeout)
	defer cancel()
	err := s.srv.Shutdown(ctx)
	if errors.Is(err, context.DeadlineExceeded) {
		s.log.Warn("shutdown: connections still open after the timeout; closing them", "timeout", timeout.String())
		err = nil
	}
	if cerr := s.srv.Close(); err == nil && cerr != nil && !errors.Is(cerr, net.ErrClosed) {
		err = cerr
	}
	s.mu.Lock()
	started := s.ln != nil
	s.mu.Unlock()
	if started {
		<-s.done
	}
	s.log.Info("stopped")
	return err
}

// checkKey is the only authentication handler: the key must be in the
// authorized_keys file as it is now.
func (s *Server) checkKey(ctx ssh.Context, key ssh.PublicKey) bool {
	ak, err := LoadAuthorizedKeys(s.keysPath)
	ok := err == nil && ak.Contains(key)
	if !ok {
		why := "key not in authorized_keys"
		if err != nil {
			why = err.Error()
		}
		s.log.Warn("refused", "why", why, "addr", ctx.RemoteAddr().String(), "user", ctx.User(), "key", fingerprint(key))
	}
	return ok
}

// onConnect counts connections and refuses beyond a cap, before the SSH
// handshake spends anything on them.
func (s *Server) onConnect(_ ssh.Context, conn net.Conn) net.Conn {
	limit := int64(4*s.cfg.MaxSessions + 16)
	if n := s.conns.Add(1); n > limit {
		s.conns.Add(-1)
		s.log.Warn("refused", "why", "too many open connections", "addr", conn.RemoteAddr().String(), "limit", limit)
		return nil
	}
	if n := s.pending.Add(1); n > maxPending {
		s.pending.Add(-1)
		s.conns.Add(-1)
		s.log.Warn("refused", "why", "too many connections still authenticating", "addr", conn.RemoteAddr().String(), "limit", maxPending)
		return nil
	}
	s.unauth.Store(conn.RemoteAddr().String(), struct{}{})
	s.log.Info("connect", "addr", conn.RemoteAddr().String())
	return conn
}

// authenticated takes the connection from addr off the pending count.
func (s *Server) authenticated(addr string) {
	if _, ok := s.unauth.LoadAndDelete(addr); ok {
		s.pending.Add(-1)
	}
}

func (s *Server) onClose(conn net.Conn) {
	s.conns.Add(-1)
	s.authenticated(conn.RemoteAddr().String()) // or it never did
	addr := conn.RemoteAddr().String()
	fp, _ := s.fps.LoadAndDelete(addr)
	fps, _ := fp.(string)
	s.log.Info("disconnect", "addr", addr, "key", fps)
}

// sessionChannel accepts a session channel but filters its requests before
// the default session handler sees them: agent forwarding, X11 forwarding,
// exec and subsystem requests are answered "no".
func (s *Server) sessionChannel(srv *ssh.Server, conn *gossh.ServerConn, newChan gossh.NewChannel, ctx ssh.Context) {
	// The connection is authenticated: its key is known for the disconnect log.
	s.fps.Store(ctx.RemoteAddr().String(), ctxFingerprint(ctx))
	s.authenticated(ctx.RemoteAddr().String())
	ssh.DefaultSessionHandler(srv, conn, &filteredChannel{NewChannel: newChan, s: s, ctx: ctx}, ctx)
}

type filteredChannel struct {
	gossh.NewChannel
	s   *Server
	ctx ssh.Context
}

var refusedRequests = map[string]string{
	"auth-agent-req@openssh.com": "agent forwarding",
	"x11-req":                    "X11 forwarding",
	"exec":                       "exec request",
	"subsystem":                  "subsystem request",
}

func (f *filteredChannel) Accept() (gossh.Channel, <-chan *gossh.Request, error) {
	ch, reqs, err := f.NewChannel.Accept()
	if err != nil {
		return ch, reqs, err
	}
	out := make(chan *gossh.Request)
	go func() {
		defer close(out)
		for req := range reqs {
			if what, bad := refusedRequests[req.Type]; bad {
				f.s.log.Warn("refused", "why", what, "addr", f.ctx.RemoteAddr().String(), "user", f.ctx.User(),
					"key", ctxFingerprint(f.ctx))
				if req.WantReply {
					_ = req.Reply(false, nil)
				}
				continue
			}
			out <- req
		}
	}()
	return ch, out, nil
}

// The middlewares, in the order they run.

func (s *Server) logSession(next ssh.Handler) ssh.Handler {
	return func(sess ssh.Session) {
		addr := sess.RemoteAddr().String()
		fp := fingerprint(sess.PublicKey())
		s.fps.Store(addr, fp)
		pty, _, hasPty := sess.Pty()
		start := time.Now()
		if hasPty {
			s.log.Info("session start", "addr", addr, "user", sess.User(), "key", fp,
				"term", pty.Term, "width", pty.Window.Width, "height", pty.Window.Height)
		} else {
			s.log.Info("session start", "addr", addr, "user", sess.User(), "key", fp, "pty", false)
		}
		next(sess)
		s.log.Info("session end", "addr", addr, "user", sess.User(), "key", fp,
			"duration", time.Since(start).Round(time.Millisecond).String())
	}
}

func (s *Server) rateLimit(next ssh.Handler) ssh.Handler {
	return func(sess ssh.Session) {
		if err := s.limiter.Allow(sess); err != nil {
			s.log.Warn("refused", "why", "rate limit", "addr", sess.RemoteAddr().String(), "user", sess.User(), "key", fingerprint(sess.PublicKey()))
			refuse(sess, "heed share: too many sessions from your address; try again in a little while")
			return
		}
		next(sess)
	}
}

func (s *Server) capSessions(next ssh.Handler) ssh.Handler {
	return func(sess ssh.Session) {
		select {
		case s.sem <- struct{}{}:
		default:
			s.log.Warn("refused", "why", "session cap reached", "addr", sess.RemoteAddr().String(), "user", sess.User(),
				"key", fingerprint(sess.PublicKey()), "max_sessions", s.cfg.MaxSessions)
			refuse(sess, fmt.Sprintf("heed share: all %d sessions are taken; try again later", s.cfg.MaxSessions))
			return
		}
		n := s.sessions.Add(1)
		s.changed(int(n), fmt.Sprintf("%s joined from %s", sess.User(), sess.RemoteAddr()))
		defer func() {
			n := s.sessions.Add(-1)
			<-s.sem
			s.changed(int(n), fmt.Sprintf("%s left", sess.User()))
		}()
		next(sess)
	}
}

func (s *Server) changed(n int, event string) {
	if s.cfg.OnChange != nil {
		s.cfg.OnChange(n, event)
	}
}

// guestContext gives the session a context that ends with the session or
// with the server, and tells the guest why the screen went away when the
// presenter stopped sharing.
func (s *Server) guestContext(next ssh.Handler) ssh.Handler {
	return func(sess ssh.Session) {
		ctx, cancel := context.WithCancel(s.appCtx)
		stop := context.AfterFunc(sess.Context(), cancel)
		s.guests.Store(sess, ctx)
		next(sess)
		s.guests.Delete(sess)
		stop()
		cancel()
		if s.appCtx.Err() != nil {
			_, _ = io.WriteString(sess.Stderr(), "heed share: the presenter stopped sharing.\r\n")
		}
	}
}

func (s *Server) teaHandler(sess ssh.Session) (tea.Model, []tea.ProgramOption) {
	v, _ := s.guests.Load(sess)
	ctx, _ := v.(context.Context)
	if ctx == nil {
		return nil, nil
	}
	m := s.cfg.App(Guest{User: sess.User(), Addr: sess.RemoteAddr().String(), Fingerprint: fingerprint(sess.PublicKey()), Ctx: ctx})
	if m == nil {
		return nil, nil
	}
	// The server process's signals are not the guest's: shutdown goes
	// through the context.
	return m, []tea.ProgramOption{tea.WithContext(ctx), tea.WithoutSignalHandler()}
}

func refuse(sess ssh.Session, msg string) {
	_, _ = io.WriteString(sess.Stderr(), msg+"\r\n")
	_ = sess.Exit(1)
	_ = sess.Close()
}
