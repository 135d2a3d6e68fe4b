package tui

import "charm.land/bubbles/v2/key"

// KeyMap is every key binding of the TUI. Help is built from it; bindings
// that do not apply to the focused screen or the export are disabled so that
// the help never lists a key that does nothing.
type KeyMap struct {
	Up, Down, Left, Right    key.Binding
	PageUp, PageDown         key.Binding
	NextScreen, PrevScreen   key.Binding
	NextLayer, PrevLayer     key.Binding
	NextHead, PrevHead       key.Binding
	NextBlock, PrevBlock     key.Binding
	NextBatch, PrevBatch     key.Binding
	ZoomIn, ZoomOut          key.Binding
	Enter                    key.Binding
	Find, FindNext, FindPrev key.Binding
	NextFinding, PrevFinding key.Binding
	Copy                     key.Binding
	Stat                     key.Binding
	Agg, Scale, Sink         key.Binding
	Colormap                 key.Binding
	Order                    key.Binding
	Numbers                  key.Binding
	Inspect                  key.Binding
	Jump                     key.Binding
	Help, Back, Quit         key.Binding
}

// DefaultKeyMap returns heed's keys.
func DefaultKeyMap() KeyMap {
	b := func(help, desc string, keys ...string) key.Binding {
		return key.NewBinding(key.WithKeys(keys...), key.WithHelp(help, desc))
	}
	return KeyMap{
		Up:          b("↑/k", "up", "up", "k"),
		Down:        b("↓/j", "down", "down", "j"),
		Left:        b("←/h", "left", "left", "h"),
		Right:       b("→/l", "right", "right", "l"),
		PageUp:      b("pgup", "page up", "pgup", "ctrl+b"),
		PageDown:    b("pgdn", "page down", "pgdown", "ctrl+f", "space"),
		NextScreen:  b("tab", "next screen", "tab"),
		PrevScreen:  b("shift+tab", "previous screen", "shift+tab"),
		NextLayer:   b("]", "next layer", "]"),
		PrevLayer:   b("[", "previous layer", "["),
		NextHead:    b("}/>", "next head", "}", ">"),
		PrevHead:    b("{/<", "previous head", "{", "<"),
		NextBlock:   b(")", "next block", ")"),
		PrevBlock:   b("(", "previous block", "("),
		NextBatch:   b("b", "next batch item", "b"),
		PrevBatch:   b("B", "previous batch item", "B"),
		ZoomIn:      b("+", "zoom in", "+", "="),
		ZoomOut:     b("-", "zoom out", "-", "_"),
		Enter:       b("enter", "open", "enter"),
		Find:        b("/", "find a token", "/"),
		FindNext:    b("ctrl+n", "next match", "ctrl+n"),
		FindPrev:    b("ctrl+p", "previous match", "ctrl+p"),
		NextFinding: b("n", "next finding", "n"),
		PrevFinding: b("N", "previous finding", "N"),
		Copy:        b("y", "copy location", "y"),
		Stat:        b("s", "next statistic", "s"),
		Agg:         b("m", "mean/max when zoomed out", "m"),
		Scale:       b("L", "linear/log scale", "L"),
		Sink:        b("z", "hide/show sink column", "z"),
		Colormap:    b("c", "next colormap", "c"),
		Order:       b("o", "order by position/share", "o"),
		Numbers:     b("#", "values in the cells", "#"),
		Inspect:     b("i", "row inspector", "i"),
		Jump:        b("1-5", "go to screen", "1", "2", "3", "4", "5"),
		Help:        b("?", "help", "?"),
		Back:        b("esc", "back", "esc"),
		Quit:        b("q", "quit", "q", "ctrl+c"),
	}
}

// keyHelp is a help.KeyMap over groups of bindings.
type keyHelp struct {
	short  []key.Binding
	groups [][]key.Binding
}

func (k keyHelp) ShortHelp() []key.Binding  { return k.short }
func (k keyHelp) FullHelp() [][]key.Binding { return k.groups }
