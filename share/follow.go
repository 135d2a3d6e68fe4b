package share

import (
	"context"
	"strings"
	"sync"

	"charm.land/bubbles/v2/key"
	tea "charm.land/bubbletea/v2"
	"charm.land/lipgloss/v2"
)

// Hub carries the presenter's view to every guest that follows it: a line
// whose first word is a location (a LOC such as "decoder:L3:H7:q12"),
// followed by whatever else the TUI needs to show the same (its screen and
// zoom). The latest one wins: a slow guest skips intermediate ones.
type Hub struct {
	mu   sync.Mutex
	loc  string
	subs map[chan string]struct{}
}

// NewHub returns a Hub with no location yet.
func NewHub() *Hub { return &Hub{subs: map[chan string]struct{}{}} }

// Publish sets the presenter's location and tells every subscriber.
func (h *Hub) Publish(loc string) {
	h.mu.Lock()
	defer h.mu.Unlock()
	if loc == h.loc {
		return
	}
	h.loc = loc
	for ch := range h.subs {
		select { // drop a value the subscriber has not taken yet
		case <-ch:
		default:
		}
		ch <- loc
	}
}

// State is the presenter's latest published line, "" before the first
// Publish: a location, then whatever else the TUI publishes with it.
func (h *Hub) State() string {
	h.mu.Lock()
	defer h.mu.Unlock()
	return h.loc
}

// Location is the location of the presenter's latest state (its first
// word), "" before the first Publish.
func (h *Hub) Location() string {
	if w := strings.Fields(h.State()); len(w) > 0 {
		return w[0]
	}
	return ""
}

// Subscribe returns a channel that receives each new location, and a
// function that ends the subscription.
func (h *Hub) Subscribe() (<-chan string, func()) {
	ch := make(chan string, 1)
	h.mu.Lock()
	h.subs[ch] = struct{}{}
	h.mu.Unlock()
	return ch, func() {
		h.mu.Lock()
		delete(h.subs, ch)
		h.mu.Unlock()
	}
}

// Subscribers is the number of open subscriptions.
func (h *Hub) Subscribers() int {
	h.mu.Lock()
	defer h.mu.Unlock()
	return len(h.subs)
}

// StatusMsg replaces the text of a Framed model's status line.
type StatusMsg string

// presenterMoved is delivered to a follower when the hub has a new location.
// rearm is set on the messages of the wait Cmd, which must be re-armed.
type presenterMoved struct {
	loc   string
	rearm bool
}

// FollowKey is the key a guest presses to leave follow mode and to rejoin.
var FollowKey = key.NewBinding(key.WithKeys("F"), key.WithHelp("F", "follow the presenter / look around alone"))

// Framed wraps a TUI model with a one-line status bar below it: the inner
// model is told the terminal is one row shorter. With a Hub it is a guest
// that follows the presenter: each presenter move is turned into the inner
// model's own "go to" message, until the guest presses FollowKey to look
// around alone; pressing it again rejoins at the presenter's location.
type Framed struct {
	inner     tea.Model
	w, h      int
	status    string
	hub       *Hub
	ctx       context.Context
	ch        <-chan string
	unsub     func()
	gotoMsg   func(loc string) tea.Msg
	following bool
	applied   string // the last presenter location sent to the inner model
}

// NewPresenter wraps the presenter's own TUI with a status line (updated
// with StatusMsg).
func NewPresenter(inner tea.Model, status string) *Framed {
	return &Framed{inner: inner, status: status}
}

// NewFollower wraps a guest's TUI so that it follows hub. gotoMsg returns the
// message that moves the inner model to a location. The subscription ends
// when ctx does (use Guest.Ctx).
func NewFollower(ctx context.Context, hub *Hub, inner tea.Model, gotoMsg func(loc string) tea.Msg) *Framed {
	ch, unsub := hub.Subscribe()
	context.AfterFunc(ctx, unsub)
	return &Framed{inner: inner, hub: hub, ctx: ctx, ch: ch, unsub: unsub, gotoMsg: gotoMsg, following: true}
}

// Inner returns the wrapped model as it is now.
func (f *Framed) Inner() tea.Model { return f.inner }

// Following reports whether a follower is in follow mode.
func (f *Framed) Following() bool { return f.hub != nil && f.following }

func (f *Framed) wait() tea.Cmd {
	ch, ctx := f.ch, f.ctx
	return func() tea.Msg {
		select {
		case loc := <-ch:
			return presenterMoved{loc: loc, rearm: true}
		case <-ctx.Done():
			return nil
		}
	}
}

// Init starts the inner model and, for a follower, jumps to the presenter's
// current location and waits for the next.
func (f *Framed) Init() tea.Cmd {
	cmds := []tea.Cmd{f.inner.Init()}
	if f.hub != nil {
		if loc := f.hub.State(); loc != "" {
			cmds = append(cmds, func() tea.Msg { return presenterMoved{loc: loc} })
		}
		cmds = append(cmds, f.wait())
	}
	return tea.Batch(cmds...)
}

func (f *Framed) forward(msg tea.Msg) tea.Cmd {
	var cmd tea.Cmd
	f.inner, cmd = f.inner.Update(msg)
	return cmd
}

// Update routes messages: sizes shrink by the status row, presenter moves go
// to the inner model while following, FollowKey toggles follow mode,
// everything else goes to the inner model.
func (f *Framed) Update(msg tea.Msg) (tea.Model, tea.Cmd) {
	switch msg := msg.(type) {
	case tea.WindowSizeMsg:
		if msg.Width <= 0 || msg.Height <= 0 {
			// a client that reports no size (ssh -tt from a script): the
			// classic terminal's, rather than nothing at all
			msg.Width, msg.Height = 80, 24
		}
		f.w, f.h = msg.Width, msg.Height
		return f, f.forward(tea.WindowSizeMsg{Width: msg.Width, Height: max(msg.Height-1, 1)})
	case StatusMsg:
		f.status = string(msg)
		return f, nil
	case presenterMoved:
		// The hub's latest location, not msg.loc: messages of concurrent
		// Cmds may arrive out of order, and the latest one wins.
		// A location already applied is not applied again: a late message
		// must not pull the guest back after they moved while following.
		var cmd tea.Cmd
		if loc := f.hub.State(); f.following && loc != "" && loc != f.applied {
			f.applied = loc
			cmd = f.forward(f.gotoMsg(loc))
		}
		if msg.rearm {
			// exactly one wait is pending at any time
			return f, tea.Batch(cmd, f.wait())
		}
		return f, cmd
	case tea.KeyPressMsg:
		if f.hub != nil && key.Matches(msg, FollowKey) {
			f.following = !f.following
			if f.following {
				if loc := f.hub.State(); loc != "" {
					f.applied = loc
					return f, f.forward(f.gotoMsg(loc))
				}
			}
			return f, nil
		}
	}
	return f, f.forward(msg)
}

// statusText is the status line without styling.
func (f *Framed) statusText() string {
	if f.hub == nil {
		return f.status
	}
	loc := f.hub.Location()
	if loc == "" {
		loc = "not moved yet"
	}
	if f.following {
		return "following the presenter (" + loc + ")  ·  F: look around on your own"
	}
	return "on your own  ·  F: follow the presenter again (at " + loc + ")"
}

// View draws the inner view with the status line on the last row.
func (f *Framed) View() tea.View {
	v := f.inner.View()
	if f.h <= 1 {
		return v
	}
	lines := strings.Split(v.Content, "\n")
	if len(lines) > f.h-1 {
		lines = lines[:f.h-1]
	}
	for len(lines) < f.h-1 {
		lines = append(lines, "")
	}
	bar := lipgloss.NewStyle().Reverse(true).Width(f.w).MaxWidth(f.w).MaxHeight(1).Render(f.statusText())
	v.Content = strings.Join(append(lines, bar), "\n")
	return v
}
