package main

import (
	"charm.land/bubbles/v2/key"
	"context"
	"errors"
	"fmt"
	"github.com/heed-dev/heed/internal/words"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"time"

	tea "charm.land/bubbletea/v2"
	charmlog "charm.land/log/v2"
	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/loader"
	"github.com/heed-dev/heed/share"
	"github.com/heed-dev/heed/tui"
	"github.com/spf13/cobra"
)

// shareFlags are heed share's own flags.
type shareFlags struct {
	listen, authorizedKeys, hostKey, logPath string
	follow, headless                         bool
	maxSessions                              int
	idle, maxTime                            time.Duration
}

func newShareCmd() *cobra.Command {
	lf := &loadFlags{}
	tf := &tuiFlags{}
	sf := &shareFlags{}
	cmd := &cobra.Command{
		Use:   "share FILE... [--listen 127.0.0.1:2222]",
		Short: "Serve the terminal UI over SSH to the keys in authorized_keys",
		Long: `share serves heed's terminal UI over SSH. Only the public keys in the
authorized_keys file (default ~/.ssh/authorized_keys) may log in: no password,
no keyboard-interactive, never anonymous. Guests get the TUI and nothing else
(no shell, commands, file transfer or forwarding). Each guest's TUI is drawn
for their own terminal; the export is opened once and only read.

The terminal that runs share keeps its own TUI (the presenter's); quitting it
ends every session and stops the server. With --follow, guests follow the
presenter's location; a guest presses F to look around alone and F again to
rejoin. Without a terminal, or with --headless, share serves until
interrupted (ctrl-c), then ends every session and exits 0.

The host key is created on first use (ed25519, mode 0600) in
<config dir>/heed/ssh_host_ed25519_key, or the file --host-key names, and
reused after, so guests' known_hosts stays valid. Nothing is written in the
current directory.

Guests connect with: ssh -p 2222 localhost`,
		Example: `  heed share run.npz --at decoder:L3:H7
  heed share run.npz --follow --authorized-keys team_keys
  heed share run.npz --headless --listen 0.0.0.0:2222 --log share.log`,
		Args: cobra.MinimumNArgs(1),
		// ctrl-c (SIGINT) is how a headless share is stopped: after a clean
		// shutdown it exits 0, not 130.
		Annotations: map[string]string{servesUntilInterrupted: "true"},
		RunE: func(cmd *cobra.Command, args []string) error {
			return runShare(cmd.Context(), args, lf, tf, sf)
		},
	}
	f := cmd.Flags()
	f.StringVar(&sf.listen, "listen", share.DefaultListen, "TCP address to listen on (a non-loopback address is logged as a warning)")
	f.StringVar(&sf.authorizedKeys, "authorized-keys", "", "public keys that may log in (default ~/.ssh/authorized_keys)")
	f.StringVar(&sf.hostKey, "host-key", "", "host key file, created when missing (default <config dir>/heed/ssh_host_ed25519_key)")
	f.BoolVar(&sf.follow, "follow", false, "guests follow the presenter's location (F leaves and rejoins)")
	f.BoolVar(&sf.headless, "headless", false, "no presenter TUI: serve until interrupted")
	f.StringVar(&sf.logPath, "log", "", "log file (default: stderr when headless, <cache dir>/heed/share.log with the presenter TUI)")
	f.IntVar(&sf.maxSessions, "max-sessions", share.DefaultMaxSessions, "concurrent guest sessions")
	f.DurationVar(&sf.idle, "idle-timeout", share.DefaultIdleTimeout, "close a connection without traffic after this long")
	f.DurationVar(&sf.maxTime, "max-time", share.DefaultMaxTimeout, "close any connection after this long")
	lf.register(cmd)
	tf.register(cmd)
	return cmd
}

func runShare(ctx context.Context, args []string, lf *loadFlags, tf *tuiFlags, sf *shareFlags) error {
	if sf.maxSessions < 1 {
		return fmt.Errorf("share: --max-sessions %d: want at least 1", sf.maxSessions)
	}
	if sf.idle <= 0 || sf.maxTime <= 0 {
		return errors.New("share: --idle-timeout and --max-time must be positive")
	}
	keys := sf.authorizedKeys
	if keys == "" {
		p, err := share.DefaultAuthorizedKeysPath()
		if err != nil {
			return err
		}
		keys = p
	}
	hostKey := sf.hostKey
	if hostKey == "" {
		p, err := share.DefaultHostKeyPath()
		if err != nil {
			return err
		}
		hostKey = p
	}
	topts, err := tf.options()
	if err != nil {
		return err
	}
	presenter := !sf.headless && isTerminal(os.Stdin) && isTerminal(os.Stdout)
	if sf.follow && !presenter {
		return errors.New("share: --follow needs the presenter's TUI: run heed share in a terminal, without --headless")
	}
	// Check the keys before the (possibly long) statistics pass.
	if _, err := share.LoadAuthorizedKeys(keys); err != nil {
		return err
	}

	// Logging: stderr when headless; a file while the presenter's TUI owns
	// the terminal. wish and the SSH library log through slog's and charm
	// log's defaults: those go to the same place.
	logPath := sf.logPath
	if logPath == "" && presenter {
		dir, err := os.UserCacheDir()
		if err != nil {
			return fmt.Errorf("share: no cache directory for the log (use --log PATH): %w", err)
		}
		logPath = filepath.Join(dir, "heed", "share.log")
	}
	var logOut io.Writer = os.Stderr
	if logPath != "" {
		if err := os.MkdirAll(filepath.Dir(logPath), 0o700); err != nil {
			return fmt.Errorf("share: log: %w", err)
		}
		lfh, err := os.OpenFile(logPath, os.O_WRONLY|os.O_CREATE|os.O_APPEND, 0o600)
		if err != nil {
			return fmt.Errorf("share: log: %w", err)
		}
		defer lfh.Close()
		logOut = lfh
	}
	logger := slog.New(slog.NewTextHandler(logOut, nil))
	prevSlog := slog.Default()
	slog.SetDefault(logger)
	defer slog.SetDefault(prevSlog)
	prevCharm := charmlog.Default()
	charmlog.SetDefault(charmlog.NewWithOptions(logOut, charmlog.Options{ReportTimestamp: true, Formatter: charmlog.LogfmtFormatter}))
	defer charmlog.SetDefault(prevCharm)

	// The export, opened once and only read by every session.
	set, err := openSetChecked(args, lf)
	if err != nil {
		return err
	}
	ex, err := set.Open(0)
	if err != nil {
		return err
	}
	defer ex.Close()
	res, err := shareStatistics(ctx, set)
	if err != nil {
		return err
	}
	// Validate --at once, here, rather than in every session.
	probe, err := tui.New(set, tuiOpts(topts, ex, res, ctx))
	if err != nil {
		return err
	}
	probe.Close()

	var hub *share.Hub
	if sf.follow {
		hub = share.NewHub()
	}
	var (
		progMu sync.Mutex
		prog   *tea.Program
	)
	send := func(msg tea.Msg) {
		progMu.Lock()
		p := prog
		progMu.Unlock()
		if p != nil {
			go p.Send(msg)
		}
	}
	var statusMu sync.Mutex
	listenLine := ""
	status := func(n int, event string) string {
		statusMu.Lock()
		defer statusMu.Unlock()
		s := fmt.Sprintf("%s · %d %s", listenLine, n, words.Plural(n, "guest", "guests"))
		if sf.follow {
			s += words.Plural(n, " follows you", " follow you")
		}
		if event != "" {
			s += " · " + event
		}
		return s
	}
	srv, err := share.New(share.Config{
		Listen:         sf.listen,
		AuthorizedKeys: keys,
		HostKey:        hostKey,
		MaxSessions:    sf.maxSessions,
		IdleTimeout:    sf.idle,
		MaxTimeout:     sf.maxTime,
		Logger:         logger,
		App: func(g share.Guest) tea.Model {
			o := tuiOpts(topts, ex, res, g.Ctx)
			o.Background = "" // ask the guest's terminal, unless --background said
			if tf.background == "dark" || tf.background == "light" {
				o.Background = tf.background
			}
			if hub != nil {
				if loc := hub.Location(); loc != "" {
					o.At = loc
				}
				o.ExtraHelp = []key.Binding{share.FollowKey}
			}
			m, err := tui.New(set, o)
			if err != nil {
				logger.Error("session model", "user", g.User, "addr", g.Addr, "err", err)
				return nil
			}
			// Compare's second export, if any, is the session's own.
			context.AfterFunc(g.Ctx, func() { m.Close() })
			if hub == nil {
				return m
			}
			return share.NewFollower(g.Ctx, hub, m, func(st string) tea.Msg { return tui.FollowMsg{State: st} })
		},
		OnChange: func(n int, event string) { send(share.StatusMsg(status(n, event))) },
	})
	if err != nil {
		return err
	}
	if err := srv.Start(); err != nil {
		return err
	}
	statusMu.Lock()
	listenLine = "sharing on " + srv.Addr().String() + " · host key " + srv.HostKeyFingerprint()
	statusMu.Unlock()
	port := portOf(srv.Addr().String())
	intro := fmt.Sprintf("heed share: serving %s on %s to the keys in %s\n  host key %s%s\n  guests: ssh -p %s localhost\n",
		strings.Join(set.Examples[0], " "), srv.Addr(), keys, srv.HostKeyFingerprint(), createdNote(srv.HostKeyCreated(), hostKey), port)
	if logPath != "" {
		intro += "  log: " + logPath + "\n"
	}
	fmt.Fprint(os.Stdout, intro)

	var runErr error
	if presenter {
		o := tuiOpts(topts, ex, res, ctx)
		if hub != nil {
			o.OnFollow = hub.Publish // screen, cursor and zoom, not only the location
		}
		m, err := tui.New(set, o)
		if err != nil {
			srv.Shutdown(5 * time.Second)
			return err
		}
		if hub != nil {
			hub.Publish(m.FollowState())
		}
		p := tea.NewProgram(share.NewPresenter(m, status(0, "ssh -p "+port+" localhost")), tea.WithContext(ctx))
		progMu.Lock()
		prog = p
		progMu.Unlock()
		if _, err := p.Run(); err != nil && !errors.Is(err, tea.ErrProgramKilled) && !errors.Is(err, tea.ErrInterrupted) {
			runErr = err
		}
		progMu.Lock()
		prog = nil
		progMu.Unlock()
		m.Close()
	} else {
		select {
		case <-ctx.Done():
		case <-srv.Done():
			runErr = srv.Err()
		}
	}
	n := srv.Sessions()
	if err := srv.Shutdown(5 * time.Second); err != nil && runErr == nil {
		runErr = err
	}
	fmt.Fprintf(os.Stdout, "heed share: stopped (%d %s open)\n", n, words.Plural(n, "session was", "sessions were"))
	return runErr
}

func tuiOpts(base tui.Options, ex *loader.Export, res *analysis.Result, ctx context.Context) tui.Options {
	o := base
	o.Export, o.Result, o.Context = ex, res, ctx
	return o
}

func portOf(addr string) string {
	if i := strings.LastIndexByte(addr, ':'); i >= 0 {
		return addr[i+1:]
	}
	return addr
}

func createdNote(created bool, path string) string {
	if created {
		return " (new, saved in " + path + ")"
	}
	return ""
}

// shareStatistics runs the statistics and checks once, for every session,
// with a progress line on stderr when it is a terminal.
func shareStatistics(ctx context.Context, set *loader.Set) (*analysis.Result, error) {
	opt := analysis.DefaultOptions()
	tty := isTerminal(os.Stderr)
	last := -1
	opt.Progress = func(done, total int64) {
		if !tty || total <= 0 {
			return
		}
		if pct := int(100 * done / total); pct != last {
			last = pct
			fmt.Fprintf(os.Stderr, "\rheed share: statistics %3d%%", pct)
		}
	}
	// each example opened anew and closed after its pass: not the shared export
	p, err := analysis.AnalyzeExamples(ctx, set, nil, opt)
	if tty {
		fmt.Fprint(os.Stderr, "\r\033[K")
	}
	if err != nil {
		return nil, err
	}
	res := p.Result()
	res.WordGaps(words.WithOption)
	return res, nil
}
