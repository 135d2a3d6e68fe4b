package tui

import (
	"context"
	"testing"
	"time"

	tea "charm.land/bubbletea/v2"
	"github.com/charmbracelet/colorprofile"
	"github.com/heed-dev/heed/loader"
)

// TestKeysHoldStatistics: a key or a mouse event holds the background
// statistics (their Yield waits) for holdFor; without one, or once the
// program's context is done, Yield returns at once.
func TestKeysHoldStatistics(t *testing.T) {
	file := makeExport(t, "h.npz", "--seq", "16", "--layers", "1", "--heads", "2")
	set, err := loader.OpenSet([]string{file}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	m, err := New(set, Options{Context: ctx, Background: "dark", Profile: colorprofile.TrueColor})
	if err != nil {
		t.Fatal(err)
	}
	defer m.Close()
	if !m.anaOpt.Background || m.anaOpt.Yield == nil {
		t.Fatalf("statistics options: Background %v, Yield set %v", m.anaOpt.Background, m.anaOpt.Yield != nil)
	}
	returns := func(within time.Duration) bool {
		done := make(chan struct{})
		go func() { m.anaOpt.Yield(); close(done) }()
		select {
		case <-done:
			return true
		case <-time.After(within):
			return false
		}
	}
	if !returns(time.Second) {
		t.Fatal("Yield waits before any key")
	}
	for _, msg := range []tea.Msg{tea.KeyPressMsg{Code: '}', Text: "}"}, tea.MouseWheelMsg{Button: tea.MouseWheelDown}} {
		m.Update(msg)
		if returns(holdFor / 3) {
			t.Errorf("%T: Yield returned at once; want it held for %v", msg, holdFor)
		}
		if !returns(2 * time.Second) {
			t.Errorf("%T: Yield still held after the hold", msg)
		}
	}
	m.Update(tea.KeyPressMsg{Code: '}', Text: "}"})
	cancel()
	if !returns(holdFor / 3) {
		t.Error("Yield held after the context was canceled")
	}
}
