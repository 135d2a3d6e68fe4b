package share

import (
	"bytes"
	"context"
	"strings"
	"testing"
	"time"

	tea "charm.land/bubbletea/v2"
	"github.com/charmbracelet/colorprofile"
	"github.com/charmbracelet/x/exp/teatest/v2"
)

func TestHubLatestWins(t *testing.T) {
	h := NewHub()
	ch, unsub := h.Subscribe()
	if h.Subscribers() != 1 {
		t.Fatalf("Subscribers() = %d", h.Subscribers())
	}
	h.Publish("a:L0:H0")
	h.Publish("a:L0:H1")
	h.Publish("a:L0:H1") // unchanged: no message
	if got := <-ch; got != "a:L0:H1" {
		t.Errorf("slow subscriber got %q, want the latest a:L0:H1", got)
	}
	select {
	case got := <-ch:
		t.Errorf("extra message %q", got)
	default:
	}
	if h.Location() != "a:L0:H1" {
		t.Errorf("Location() = %q", h.Location())
	}
	unsub()
	h.Publish("a:L1:H0") // must not block without subscribers
	if h.Subscribers() != 0 {
		t.Errorf("Subscribers() = %d after unsubscribe", h.Subscribers())
	}
}

func TestFollowerKeys(t *testing.T) {
	hub := NewHub()
	hub.Publish("decoder:L0:H0")
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	inner := &standIn{guest: Guest{User: "bob"}}
	f := NewFollower(ctx, hub, inner, func(loc string) tea.Msg { return gotoLoc(loc) })
	tm := teatest.NewTestModel(t, f, teatest.WithInitialTermSize(70, 12),
		teatest.WithProgramOptions(tea.WithColorProfile(colorprofile.Ascii), tea.WithEnvironment([]string{"TERM=xterm-256color"})))
	wait := func(s string) {
		t.Helper()
		teatest.WaitFor(t, tm.Output(), func(b []byte) bool { return bytes.Contains(b, []byte(s)) }, teatest.WithDuration(patience))
	}
	wait("goto#1 decoder:L0:H0")
	hub.Publish("decoder:L2:H5")
	wait("goto#2 decoder:L2:H5")
	tm.Type("Fz") // F leaves follow mode; z, handled after it, reaches the inner model
	wait("key#1 z")
	hub.Publish("decoder:L3:H1")
	// The presenter's move must not reach the inner model; x proves the
	// follower is still handling messages.
	tm.Type("x")
	wait("key#2 x")
	tm.Type("F")
	wait("goto#3 decoder:L3:H1")
	tm.Type("q")
	fm := tm.FinalModel(t, teatest.WithFinalTimeout(patience)).(*Framed)
	got := fm.Inner().(*standIn)
	want := []string{"goto#1 decoder:L0:H0", "goto#2 decoder:L2:H5", "goto#3 decoder:L3:H1"}
	if strings.Join(got.gotos, "|") != strings.Join(want, "|") {
		t.Errorf("inner model moved to %q, want %q", got.gotos, want)
	}
	// The inner model was told the terminal is one row shorter.
	if len(got.sizes) == 0 || got.sizes[len(got.sizes)-1] != "size#1 70x11" {
		t.Errorf("inner sizes %q, want 70x11", got.sizes)
	}
	if !fm.Following() {
		t.Error("not following after rejoining")
	}
	if v := fm.View().Content; !strings.Contains(v, "following the presenter (decoder:L3:H1)") {
		t.Errorf("status line of a follower: %q", v)
	}
	cancel()
	deadline := time.Now().Add(patience)
	for hub.Subscribers() != 0 && time.Now().Before(deadline) {
		time.Sleep(5 * time.Millisecond)
	}
	if hub.Subscribers() != 0 {
		t.Error("subscription outlived the context")
	}
}

func TestPresenterStatus(t *testing.T) {
	p := NewPresenter(&standIn{}, "sharing on 127.0.0.1:2222")
	tm := teatest.NewTestModel(t, p, teatest.WithInitialTermSize(60, 10),
		teatest.WithProgramOptions(tea.WithColorProfile(colorprofile.Ascii)))
	teatest.WaitFor(t, tm.Output(), func(b []byte) bool { return bytes.Contains(b, []byte("sharing on 127.0.0.1:2222")) }, teatest.WithDuration(patience))
	tm.Send(StatusMsg("2 guests · bob joined"))
	teatest.WaitFor(t, tm.Output(), func(b []byte) bool { return bytes.Contains(b, []byte("2 guests · bob joined")) }, teatest.WithDuration(patience))
	tm.Type("F") // no hub: the key goes to the inner model, nothing toggles
	tm.Type("q")
	fm := tm.FinalModel(t, teatest.WithFinalTimeout(patience)).(*Framed)
	v := fm.View()
	lines := strings.Split(v.Content, "\n")
	if len(lines) != 10 || !strings.Contains(lines[9], "2 guests") {
		t.Errorf("status not on the last of 10 rows: %q", lines)
	}
}

// A client that reports no terminal size (ssh -tt from a script sends 0 x 0)
// gets the classic 80 x 24 rather than nothing, and the status line shows
// only the location word of what the presenter published.
func TestZeroSizeAndStatusWord(t *testing.T) {
	hub := NewHub()
	hub.Publish("decoder:L2:H5:q3:k3 screen=2 scale=1:1 origin=0,0")
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	inner := &standIn{guest: Guest{User: "bob"}}
	f := NewFollower(ctx, hub, inner, func(loc string) tea.Msg { return gotoLoc(loc) })
	f.Update(tea.WindowSizeMsg{Width: 0, Height: 0})
	if len(inner.sizes) == 0 || inner.sizes[len(inner.sizes)-1] != "size#1 80x23" {
		t.Errorf("inner sizes %q after a 0x0 window, want 80x23 (80x24 less the status row)", inner.sizes)
	}
	if v := f.View().Content; !strings.Contains(v, "following the presenter (decoder:L2:H5:q3:k3)") {
		t.Errorf("status line: %q", v)
	}
}
