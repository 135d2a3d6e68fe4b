package tui

import (
	"charm.land/bubbles/v2/key"
	tea "charm.land/bubbletea/v2"
	"github.com/heed-dev/heed/views"
)

// screen is one screen of the TUI. Keys reach only the focused screen,
// after the global ones; Refresh prepares what View returns from the shared
// state, so View itself only hands out the prepared frame.
type screen interface {
	Name() string
	Update(msg tea.Msg) tea.Cmd
	SetSize(w, h int)
	Refresh()
	View() string
	// Canvas is the cells View was drawn from (nil for a plain message).
	Canvas() *views.Canvas
	ShortHelp() []key.Binding
	FullHelp() [][]key.Binding
}

type base struct {
	m      *Model
	w, h   int
	view   string
	canvas *views.Canvas // what view was drawn from; nil for a plain message
}

func (b *base) SetSize(w, h int)      { b.w, b.h = w, h }
func (b *base) View() string          { return b.view }
func (b *base) Canvas() *views.Canvas { return b.canvas }
func (b *base) show(c *views.Canvas)  { b.canvas, b.view = c, c.String() }
