// Package tui is heed's terminal UI: a bubbletea program over an opened
// set of exports with five screens (Survey, Map, Findings, Trace, Compare).
// It draws with package views and computes with package analysis; the
// statistics and checks run in the background and report progress by
// messages, so the first frame comes at once.
//
// New builds the root model for any tea.Program, including one served over
// SSH: every location change is reported to Options.OnLocation, and GotoMsg
// moves the model to a location (to follow a presenter).
package tui

import (
	"context"
	"errors"
	"fmt"
	"runtime"
	"strings"

	"charm.land/bubbles/v2/help"
	"charm.land/bubbles/v2/key"
	"charm.land/bubbles/v2/progress"
	"charm.land/bubbles/v2/textinput"
	tea "charm.land/bubbletea/v2"
	"charm.land/lipgloss/v2"
	"github.com/charmbracelet/colorprofile"
	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/internal/words"
	"github.com/heed-dev/heed/loader"
	"github.com/heed-dev/heed/views"
)

// Options configure a Model.
type Options struct {
	// At is the start location (BLOCK:L<layer>:H<head>[:B<batch>][:q<query>]);
	// with a query the TUI opens on the Map.
	At string
	// Colormap is a name of views.ColormapNames ("" = the default).
	Colormap string
	// Background is "dark", "light", or "" to ask the terminal.
	Background string
	// Profile forces a colour profile; 0 takes the program's (which follows
	// NO_COLOR, TERM and whether the output is a terminal).
	Profile colorprofile.Profile
	// OnLocation, when set, is called with the new location string each time
	// the location changes (from the Update goroutine; keep it quick).
	OnLocation func(loc string)
	// OnFollow, when set, is called with the new FollowState each time the
	// location, the screen or the Map's zoom or origin changes (heed share's
	// presenter publishes it to the guests, who apply it with FollowMsg).
	OnFollow func(state string)
	// ExtraHelp are keys a wrapper handles (heed share's follow key), listed
	// in the help with the global keys.
	ExtraHelp []key.Binding
	// Context cancels the background work when done (the program's quit
	// cancels it too).
	Context context.Context
	// Analysis are the options of the statistics pass (zero value: the
	// defaults of heed check).
	Analysis *analysis.Options
	// Name is shown at the right of the tab bar (default: the first file).
	Name string
	// Export, when set, is shown instead of opening set's first example,
	// and Close leaves it open: heed share opens the export once and every
	// session reads it (loader exports are read-only).
	Export *loader.Export
	// Result, when set, is the finished statistics of set: no background
	// pass runs (heed share computes them once for every session).
	Result *analysis.Result
	// NoStatistics runs no statistics pass at all (heed render of a screen
	// that does not show them).
	NoStatistics bool
}

// GotoMsg moves the model to a location string (see ParseLoc); an invalid
// one shows an error in the status line.
type GotoMsg struct{ Loc string }

// FPS is the frame rate a local terminal program should ask the renderer
// for (tea.WithFPS): a frame is written at the renderer's next tick after
// the model changes, so the rate bounds how long a key waits for its frame
// (at most 8.3 ms at 120 frames a second, bubbletea's largest, against
// 16.7 ms at its default 60); when nothing changes no frame is written.
const FPS = 120

// Screen indices, in tab order.
const (
	ScreenSurvey = iota
	ScreenMap
	ScreenFindings
	ScreenTrace
	ScreenCompare
)

// Model is the root model of the TUI.
type Model struct {
	set    *loader.Set
	opts   Options
	d      *data
	ctx    context.Context
	cancel context.CancelFunc
	hold   *hold // holds the background statistics while keys come in
	keys   KeyMap
	help   help.Model
	prog   progress.Model
	find   textinput.Model

	w, h       int
	profile    colorprofile.Profile
	dark       bool
	cmIndex    int
	st         views.Styles
	screens    []screen
	active     int
	showHelp   bool
	finding    bool
	query      string
	matches    []int
	matchAt    int
	msg        string
	msgStyle   views.Style
	lastLoc    string
	lastFollow string
	quitting   bool
	anaOpt     analysis.Options
	anaJob     *job
	anaDone    bool
	anaErr     error
	anaFrac    float64
	res        *analysis.Result
	cmpJob     *job
	cmpBlock   int
	cmpFrac    float64
	cmp        map[int][]views.HeadChange
	cmpErr     error
	traces     map[traceKey]*views.TraceData
	tracing    map[traceKey]bool
	statIndex  int
	findAt     int // the finding n/N showed last, -1 before the first
	// batchPicked is set once the user picks a batch item (b / B): the
	// Survey then shows that item's statistics
	batchPicked bool

	// sel is the one selection every screen shows
	sel Selection
}

// New opens the first example of set (and the second, for Compare, when the
// set holds exactly two examples of the same shape) and returns the model.
// Close releases the files after the program ends.
func New(set *loader.Set, opts Options) (*Model, error) {
	if set == nil || set.Len() == 0 {
		return nil, errors.New("tui: no export to show")
	}
	ex := opts.Export
	var err error
	if ex == nil {
		if ex, err = set.Open(0); err != nil {
			return nil, err
		}
	}
	if len(ex.Blocks) == 0 {
		if opts.Export == nil {
			ex.Close()
		}
		return nil, fmt.Errorf("tui: %s: no attention block", strings.Join(set.Examples[0], ", "))
	}
	// the Map marks cells by the same rules the checks judge by: a mask
	// inferred from the data when nobody gave the kind (as the pass does)
	if err := analysis.InferExport(context.Background(), ex); err != nil {
		if opts.Export == nil {
			ex.Close()
		}
		return nil, err
	}
	var exB *loader.Export
	if set.Len() == 2 {
		if exB, err = set.Open(1); err != nil {
			if opts.Export == nil {
				ex.Close()
			}
			return nil, err
		}
	}
	parent := opts.Context
	if parent == nil {
		parent = context.Background()
	}
	m := &Model{set: set, opts: opts, d: newData(ex, exB), keys: DefaultKeyMap(), help: help.New(),
		w: 80, h: 24, profile: opts.Profile, dark: opts.Background != "light",
		cmp: map[int][]views.HeadChange{}, traces: map[traceKey]*views.TraceData{}, tracing: map[traceKey]bool{}, cmpBlock: -1, findAt: -1}
	m.ctx, m.cancel = context.WithCancel(parent)
	if m.profile == 0 {
		m.profile = colorprofile.TrueColor
	}
	if opts.Colormap != "" {
		found := false
		if cm, ok := views.ColormapByName(opts.Colormap); ok {
			for i, n := range views.ColormapNames() {
				if n == cm.Name {
					m.cmIndex, found = i, true
				}
			}
		}
		if !found {
			m.Close()
			return nil, fmt.Errorf("tui: unknown colormap %q (want one of %s)", opts.Colormap, strings.Join(views.ColormapNames(), ", "))
		}
	}
	if opts.Analysis != nil {
		m.anaOpt = *opts.Analysis
	} else {
		m.anaOpt = analysis.DefaultOptions()
	}
	if m.anaOpt.Workers <= 0 {
		// one core left to the screen, so that moving between heads stays
		// quick while the statistics fill in
		m.anaOpt.Workers = max(1, runtime.GOMAXPROCS(0)-1)
	}
	// and the workers on threads of the lowest priority, so that the
	// screen and the terminal get a processor as soon as they want one;
	// they also stand still while the user is moving around (hold)
	m.anaOpt.Background = true
	m.hold = &hold{}
	ctx := m.ctx
	m.anaOpt.Yield = func() { m.hold.wait(ctx) }
	m.find = textinput.New()
	m.find.Prompt = "find token: "
	m.find.Placeholder = "text of a token"
	m.find.SetVirtualCursor(true)
	m.prog = progress.New(progress.WithDefaultBlend(), progress.WithWidth(30))
	m.screens = []screen{newSurvey(m), newMapScreen(m), newFindings(m), newTrace(m), newCompare(m)}
	m.restyle()
	if opts.At != "" {
		if err := m.gotoLoc(opts.At, true); err != nil {
			m.Close()
			return nil, err
		}
	}
	m.lastLoc = m.Location().String()
	m.refresh()
	return m, nil
}

// Close closes the exports the model opened and stops its background work.
func (m *Model) Close() error {
	m.cancel()
	m.d.close()
	var err error
	if m.opts.Export == nil {
		err = m.d.ex.Close()
	}
	if m.d.exB != nil {
		if e := m.d.exB.Close(); err == nil {
			err = e
		}
	}
	return err
}

// Location is where the model is: block, layer, head, the batch item (when
// the block has more than one), and the cursor's query and key.
func (m *Model) Location() words.Loc {
	l := words.Loc{Block: m.bi().blk.Name, Layer: m.sel.Layer, Head: m.sel.Head, Batch: -1, Query: m.sel.Q, Key: m.sel.K}
	if m.bi().blk.Batch > 1 {
		l.Batch = m.sel.Batch
	}
	return l
}

// LocationString is the location as it is copied and shown.
func (m *Model) LocationString() string { return m.Location().String() }

// Canvas returns the cells of the focused screen's body as last drawn (the
// area between the tab bar and the status line, after a WindowSizeMsg or
// any Update), for pictures (heed render); nil when the screen shows only a
// message.
func (m *Model) Canvas() *views.Canvas { return m.screens[m.active].Canvas() }

// Screen returns the index of the focused screen.
func (m *Model) Screen() int { return m.active }

// Busy reports whether the focused screen still waits for background work
// (the statistics on the Survey and Findings, the trace, the comparison).
func (m *Model) Busy() bool {
	switch m.active {
	case ScreenSurvey, ScreenFindings:
		return !m.anaDone && !m.opts.NoStatistics
	case ScreenTrace:
		_, ok := m.traces[traceKey{m.sel.Block, m.sel.Batch, m.sel.Q}]
		return !ok && m.tracing[traceKey{m.sel.Block, m.sel.Batch, m.sel.Q}]
	case ScreenCompare:
		_, ok := m.cmp[m.sel.Block]
		return m.hasCompare() && !ok && m.cmpErr == nil
	}
	return false
}

// Result returns the analysis once it has finished (nil before).
func (m *Model) Result() *analysis.Result { return m.res }

func (m *Model) bi() *blockInfo { return m.d.blocks[m.sel.Block] }

func (m *Model) restyle() {
	cm := views.Colormaps()[m.cmIndex]
	m.st = views.NewStyles(m.profile, m.dark, cm)
	// the help in heed's own styles: the library's faint grey reads at
	// about 2:1 on a dark background
	m.help.Styles = help.DefaultStyles(m.dark)
	m.help.Styles.ShortKey = m.st.Key.Lip()
	m.help.Styles.FullKey = m.st.Key.Lip()
	faint := m.st.Faint.Lip()
	m.help.Styles.ShortDesc, m.help.Styles.FullDesc = faint, faint
	m.help.Styles.ShortSeparator, m.help.Styles.FullSeparator, m.help.Styles.Ellipsis = faint, faint, faint
	m.find.SetStyles(textinput.DefaultStyles(m.dark))
}

func (m *Model) hasCompare() bool { return m.d.exB != nil && m.bi().compareMismatch == "" }

// Init starts the background statistics and asks for the background colour.
func (m *Model) Init() tea.Cmd {
	var cmds []tea.Cmd
	if res := m.opts.Result; res != nil {
		cmds = append(cmds, func() tea.Msg { return analysisMsg{res: res} })
	} else if !m.opts.NoStatistics {
		m.anaJob = newJob(m.ctx, "statistics")
		cmds = append(cmds, runAnalysis(m.anaJob, m.set, m.anaOpt), m.anaJob.wait())
	}
	if m.opts.Background == "" {
		cmds = append(cmds, tea.RequestBackgroundColor)
	}
	if c := m.ensureWork(); c != nil {
		cmds = append(cmds, c)
	}
	return tea.Batch(cmds...)
}

func (m *Model) setMsg(s string, st views.Style) { m.msg, m.msgStyle = s, st }

// ChromeLines is how many lines the TUI takes around a screen's body: the
// tab bar, the status line and the key line.
const ChromeLines = 3

func (m *Model) bodySize() (int, int) { return m.w, max(1, m.h-ChromeLines) }

// Update handles a message.
func (m *Model) Update(msg tea.Msg) (tea.Model, tea.Cmd) {
	switch msg.(type) {
	case tea.KeyPressMsg, tea.MouseMsg:
		m.hold.push()
	}
	cmd := m.update(msg)
	if m.quitting {
		return m, cmd
	}
	if w := m.ensureWork(); w != nil {
		cmd = tea.Batch(cmd, w)
	}
	m.refresh()
	if loc := m.Location().String(); loc != m.lastLoc {
		m.lastLoc = loc
		if m.opts.OnLocation != nil {
			m.opts.OnLocation(loc)
		}
	}
	if m.opts.OnFollow != nil {
		if st := m.FollowState(); st != m.lastFollow {
			m.lastFollow = st
			m.opts.OnFollow(st)
		}
	}
	return m, cmd
}

func (m *Model) update(msg tea.Msg) tea.Cmd {
	switch msg := msg.(type) {
	case tea.WindowSizeMsg:
		m.w, m.h = msg.Width, msg.Height
		m.help.SetWidth(m.w)
		m.prog.SetWidth(max(10, min(40, m.w/3)))
		bw, bh := m.bodySize()
		for _, s := range m.screens {
			s.SetSize(bw, bh)
		}
		return nil
	case tea.ColorProfileMsg:
		if m.opts.Profile == 0 {
			m.profile = msg.Profile
			m.restyle()
		}
		return nil
	case tea.BackgroundColorMsg:
		if m.opts.Background == "" {
			m.dark = msg.IsDark()
			m.restyle()
		}
		return nil
	case selectMsg:
		m.applySelect(msg)
		return nil
	case FollowMsg:
		if err := m.follow(msg.State); err != nil {
			m.setMsg(strings.TrimPrefix(err.Error(), "tui: "), m.st.Bad)
		}
		return nil
	case GotoMsg:
		if err := m.gotoLoc(msg.Loc, false); err != nil {
			m.setMsg(strings.TrimPrefix(err.Error(), "tui: "), m.st.Bad)
		}
		return nil
	case progressMsg:
		frac := 0.0
		if msg.total > 0 {
			frac = float64(msg.done) / float64(msg.total)
		}
		switch msg.job {
		case "statistics":
			m.anaFrac = frac
			return m.anaJob.wait()
		case "compare":
			m.cmpFrac = frac
			if m.cmpJob != nil {
				return m.cmpJob.wait()
			}
		}
		return nil
	case analysisMsg:
		m.anaDone, m.anaErr, m.res = true, msg.err, msg.res
		switch {
		case m.msg != "":
			// keep the notice the user is reading
		case msg.err != nil && !errors.Is(msg.err, context.Canceled):
			m.setMsg("statistics: "+msg.err.Error(), m.st.Bad)
		case msg.res != nil && len(msg.res.Findings) > 0:
			n := len(msg.res.Findings)
			m.setMsg(words.Count(n, "finding", "findings")+" · press n for the first", m.st.Bad)
		case msg.res != nil:
			m.setMsg("checks clean", m.st.Good)
		}
		return nil
	case compareMsg:
		m.cmpJob = nil
		if msg.err != nil {
			m.cmpErr = msg.err
		} else {
			m.cmp[msg.block] = msg.heads
			m.screens[ScreenCompare].(*compareScreen).land()
		}
		return nil
	case traceMsg:
		delete(m.tracing, msg.key)
		if msg.data != nil {
			m.traces[msg.key] = msg.data
		}
		return nil
	case tea.MouseClickMsg:
		mouse := msg.Mouse()
		if m.showHelp || m.finding {
			return nil
		}
		if mouse.Y == 0 {
			m.clickTab(mouse.X)
			return nil
		}
		if mouse.Y >= 1 && mouse.Y < m.h-2 {
			mouse.Y--
			return m.screens[m.active].Update(tea.MouseClickMsg(mouse))
		}
		return nil
	case tea.MouseWheelMsg:
		mouse := msg.Mouse()
		if m.showHelp || m.finding || mouse.Y < 1 {
			return nil
		}
		mouse.Y--
		return m.screens[m.active].Update(tea.MouseWheelMsg(mouse))
	case tea.KeyPressMsg:
		return m.key(msg)
	}
	if m.finding {
		var cmd tea.Cmd
		m.find, cmd = m.find.Update(msg)
		return cmd
	}
	return nil
}

func (m *Model) quit() tea.Cmd {
	m.quitting = true
	m.cancel()
	return tea.Quit
}

func (m *Model) key(msg tea.KeyPressMsg) tea.Cmd {
	m.msg = ""
	if msg.String() == "ctrl+c" {
		return m.quit()
	}
	if m.finding {
		switch msg.String() {
		case "enter":
			m.finding = false
			m.find.Blur()
			m.search(m.find.Value())
			return nil
		case "esc":
			m.finding = false
			m.find.Blur()
			return nil
		}
		var cmd tea.Cmd
		m.find, cmd = m.find.Update(msg)
		return cmd
	}
	m.syncKeys()
	k := m.keys
	if m.showHelp {
		switch {
		case key.Matches(msg, k.Quit):
			return m.quit()
		case key.Matches(msg, k.Help), key.Matches(msg, k.Back):
			m.showHelp = false
		}
		return nil
	}
	switch {
	case key.Matches(msg, k.Quit):
		return m.quit()
	case key.Matches(msg, k.Help):
		m.showHelp = true
		return nil
	case key.Matches(msg, k.NextScreen):
		m.switchTo(m.nextScreen(1))
		return nil
	case key.Matches(msg, k.PrevScreen):
		m.switchTo(m.nextScreen(-1))
		return nil
	case key.Matches(msg, k.Jump):
		i := int(msg.String()[0] - '1')
		if i == ScreenCompare && !m.hasCompare() {
			m.setMsg(m.compareWhyNot(), m.st.Warn)
			return nil
		}
		m.switchTo(i)
		return nil
	case key.Matches(msg, k.Copy):
		loc := m.LocationString()
		m.setMsg("copied "+loc, m.st.Good)
		return tea.SetClipboard(loc)
	case key.Matches(msg, k.Find):
		m.finding = true
		m.find.SetValue("")
		m.find.SetWidth(max(10, m.w-20))
		return m.find.Focus()
	case key.Matches(msg, k.FindNext):
		m.stepMatch(1)
		return nil
	case key.Matches(msg, k.FindPrev):
		m.stepMatch(-1)
		return nil
	case key.Matches(msg, k.NextFinding):
		m.stepFinding(1)
		return nil
	case key.Matches(msg, k.PrevFinding):
		m.stepFinding(-1)
		return nil
	case key.Matches(msg, k.Colormap):
		m.cmIndex = (m.cmIndex + 1) % len(views.Colormaps())
		m.restyle()
		m.setMsg("colormap "+m.st.Colormap.Name, m.st.Text)
		return nil
	case m.stepKeys(msg, k.PrevLayer, k.NextLayer, k.PrevHead, k.NextHead):
		// moved to another layer or head
	case key.Matches(msg, k.NextBatch):
		m.sel.Batch = (m.sel.Batch + 1) % m.bi().blk.Batch
		m.batchPicked = true
	case key.Matches(msg, k.PrevBatch):
		m.sel.Batch = (m.sel.Batch + m.bi().blk.Batch - 1) % m.bi().blk.Batch
		m.batchPicked = true
	case key.Matches(msg, k.NextBlock):
		m.setBlock((m.sel.Block + 1) % len(m.d.blocks))
	case key.Matches(msg, k.PrevBlock):
		m.setBlock((m.sel.Block + len(m.d.blocks) - 1) % len(m.d.blocks))
	default:
		return m.screens[m.active].Update(msg)
	}
	return nil
}

func (m *Model) compareWhyNot() string {
	if m.d.exB == nil {
		return "Compare needs two exports of the same shape: heed A B"
	}
	return "cannot compare: " + m.bi().compareMismatch
}

// nextScreen returns the screen dir steps away, skipping Compare when it
// does not apply.
func (m *Model) nextScreen(dir int) int {
	n := len(m.screens)
	i := m.active
	for {
		i = (i + dir + n) % n
		if i != ScreenCompare || m.hasCompare() {
			return i
		}
	}
}

func (m *Model) switchTo(i int) {
	m.active = i
	m.showHelp = false
	switch i {
	case ScreenCompare:
		m.screens[ScreenCompare].(*compareScreen).land()
	case ScreenTrace:
		m.screens[ScreenTrace].(*traceScreen).land()
	}
}

func (m *Model) screenNames() []string {
	names := []string{}
	for i, s := range m.screens {
		if i == ScreenCompare && !m.hasCompare() {
			continue
		}
		names = append(names, fmt.Sprintf("%d %s", i+1, s.Name()))
	}
	return names
}

// clickTab switches to the tab under column x (the layout of views.Tabs).
func (m *Model) clickTab(x int) {
	pos := views.StringWidth("heed ")
	for i, name := range m.screenNames() {
		w := views.StringWidth(name) + 2
		if x >= pos && x < pos+w {
			m.switchTo(i)
			return
		}
		pos += w
	}
}

func (m *Model) moveLayer(d int) {
	n := m.bi().blk.Layers
	m.selectSet(func(s *Selection) { s.Layer = (s.Layer + d + n) % n })
}

// stepKeys moves the selection to the previous or next layer or head
// (wrapping round) when msg is one of the four keys given for that, and
// reports whether it was.
func (m *Model) stepKeys(msg tea.KeyPressMsg, prevLayer, nextLayer, prevHead, nextHead key.Binding) bool {
	switch {
	case key.Matches(msg, prevLayer):
		m.moveLayer(-1)
	case key.Matches(msg, nextLayer):
		m.moveLayer(1)
	case key.Matches(msg, prevHead):
		m.moveHead(-1)
	case key.Matches(msg, nextHead):
		m.moveHead(1)
	default:
		return false
	}
	return true
}

func (m *Model) moveHead(d int) {
	n := m.bi().blk.Heads
	m.selectSet(func(s *Selection) { s.Head = (s.Head + d + n) % n })
}

func (m *Model) setBlock(i int) {
	m.sel.Block = i
	b := m.bi().blk
	m.sel.Layer, m.sel.Head, m.sel.Batch = min(m.sel.Layer, b.Layers-1), min(m.sel.Head, b.Heads-1), min(m.sel.Batch, b.Batch-1)
	m.sel.Q, m.sel.K = min(m.sel.Q, b.Queries-1), min(m.sel.K, b.Keys-1)
	m.sel.Map.Q0, m.sel.Map.K0, m.sel.Map.Zoom = 0, 0, 0
	if m.active == ScreenCompare && !m.hasCompare() {
		m.active = ScreenMap
	}
}

// gotoLoc moves to a location string; start is true for --at (which also
// opens the Map when a query is given).
func (m *Model) gotoLoc(s string, start bool) error {
	l, err := words.ParseLoc(s)
	if err != nil {
		return err
	}
	l.Batch = max(l.Batch, 0)
	bi := -1
	var names []string
	for i, b := range m.d.blocks {
		names = append(names, b.blk.Name)
		if b.blk.Name == l.Block {
			bi = i
		}
	}
	if bi < 0 {
		return fmt.Errorf("tui: location %s: no block %q (the export has %s)", s, l.Block, strings.Join(names, ", "))
	}
	b := m.d.blocks[bi].blk
	if l.Layer >= b.Layers || l.Head >= b.Heads || l.Batch >= b.Batch || l.Query >= b.Queries || l.Key >= b.Keys {
		return fmt.Errorf("tui: location %s is outside block %s (layers %d, heads %d, batch %d, queries %d, keys %d)",
			s, b.Name, b.Layers, b.Heads, b.Batch, b.Queries, b.Keys)
	}
	if bi != m.sel.Block {
		m.setBlock(bi)
	}
	m.sel.Layer, m.sel.Head, m.sel.Batch = l.Layer, l.Head, l.Batch
	if l.Query >= 0 {
		m.sel.Q = l.Query
		if l.Key >= 0 {
			m.sel.K = l.Key
		} else if b.Kind != loader.KindCross {
			m.sel.K = min(l.Query+b.QueryOffset, b.Keys-1)
		}
		if start {
			m.active = ScreenMap
		}
	}
	return nil
}

// search finds tokens containing text (case-insensitive) on the key side
// and moves to the first match after the cursor.
func (m *Model) search(text string) {
	m.query = strings.TrimSpace(text)
	m.matches = nil
	if m.query == "" {
		return
	}
	_, ktoks := m.bi().tokens(m.sel.Batch)
	if ktoks == nil {
		m.setMsg("this export has no tokens", m.st.Warn)
		return
	}
	low := strings.ToLower(m.query)
	for i, t := range ktoks {
		if strings.Contains(strings.ToLower(t), low) {
			m.matches = append(m.matches, i)
		}
	}
	if len(m.matches) == 0 {
		m.setMsg(fmt.Sprintf("no token contains %q", m.query), m.st.Warn)
		return
	}
	m.matchAt = 0
	for i, p := range m.matches {
		if p >= m.sel.K {
			m.matchAt = i
			break
		}
	}
	m.showMatch()
}

func (m *Model) stepMatch(d int) {
	if len(m.matches) == 0 {
		m.setMsg("no search: press / to find a token", m.st.Warn)
		return
	}
	m.matchAt = (m.matchAt + d + len(m.matches)) % len(m.matches)
	m.showMatch()
}

// showMatch puts the cursor on the matching key; on a self-attention block
// also on its query row, so the token's row and column cross at the cursor.
func (m *Model) showMatch() {
	p := m.matches[m.matchAt]
	b := m.bi().blk
	m.sel.K = p
	if b.Kind != loader.KindCross && b.QuerySide == b.KeySide {
		if q := p - b.QueryOffset; q >= 0 && q < b.Queries {
			m.sel.Q = q
		}
	}
	if tr, ok := m.screens[ScreenTrace].(*traceScreen); ok {
		tr.sel = p
	}
	_, ktoks := m.bi().tokens(m.sel.Batch)
	m.setMsg(fmt.Sprintf("%q: match %d of %d, position %d %q · ctrl+n/ctrl+p for more", m.query, m.matchAt+1, len(m.matches), p, ktoks[p]), m.st.Accent)
}

// syncKeys enables the bindings that apply to the focused screen and export.
func (m *Model) syncKeys() {
	k := &m.keys
	b := m.bi().blk
	s := m.active
	onMap := s == ScreenMap || s == ScreenCompare
	locKeys := s != ScreenFindings
	k.NextLayer.SetEnabled(locKeys && b.Layers > 1)
	k.PrevLayer.SetEnabled(locKeys && b.Layers > 1)
	k.NextHead.SetEnabled(locKeys && b.Heads > 1)
	k.PrevHead.SetEnabled(locKeys && b.Heads > 1)
	k.NextBatch.SetEnabled(locKeys && b.Batch > 1)
	k.PrevBatch.SetEnabled(locKeys && b.Batch > 1)
	k.NextBlock.SetEnabled(len(m.d.blocks) > 1)
	k.PrevBlock.SetEnabled(len(m.d.blocks) > 1)
	k.ZoomIn.SetEnabled(onMap)
	k.ZoomOut.SetEnabled(onMap)
	k.Agg.SetEnabled(onMap)
	k.Scale.SetEnabled(onMap)
	k.Sink.SetEnabled(onMap && b.Keys > 1)
	ranked := s == ScreenSurvey && m.screens[ScreenSurvey].(*surveyScreen).ranked
	k.PageUp.SetEnabled(s != ScreenSurvey || ranked)
	k.PageDown.SetEnabled(s != ScreenSurvey || ranked)
	k.Left.SetEnabled(s != ScreenFindings)
	k.Right.SetEnabled(s != ScreenFindings)
	k.Enter.SetEnabled(s == ScreenSurvey || s == ScreenFindings || s == ScreenTrace || s == ScreenCompare)
	k.Stat.SetEnabled(s == ScreenSurvey)
	k.Order.SetEnabled(s == ScreenTrace || s == ScreenSurvey)
	k.Numbers.SetEnabled(s == ScreenSurvey)
	k.Inspect.SetEnabled(s == ScreenMap)
	k.FindNext.SetEnabled(len(m.matches) > 0)
	k.FindPrev.SetEnabled(len(m.matches) > 0)
	k.Find.SetEnabled(s != ScreenFindings)
	k.Back.SetEnabled(m.showHelp || m.finding)
	switch s {
	case ScreenSurvey:
		k.Enter.SetHelp("enter", "open the head's map")
		k.Order.SetHelp("o", "ranked list / grid")
	case ScreenFindings:
		k.Enter.SetHelp("enter", "map at the worst cell")
	case ScreenTrace:
		k.Enter.SetHelp("enter", "map at this key")
		k.Order.SetHelp("o", "order by position/share")
	case ScreenCompare:
		k.Enter.SetHelp("enter", "most changed head, then the next")
	}
}

// ensureWork starts what the focused screen needs and is not running yet.
func (m *Model) ensureWork() tea.Cmd {
	switch m.active {
	case ScreenTrace:
		b := m.bi().blk
		tk := traceKey{m.sel.Block, m.sel.Batch, m.sel.Q}
		if _, ok := m.traces[tk]; ok || m.tracing[tk] {
			return nil
		}
		m.tracing[tk] = true
		return runTrace(m.ctx, m.set, tk, b.Name)
	case ScreenCompare:
		if !m.hasCompare() || m.cmpJob != nil {
			return nil
		}
		if _, ok := m.cmp[m.sel.Block]; ok {
			return nil
		}
		m.cmpJob = newJob(m.ctx, "compare")
		m.cmpBlock = m.sel.Block
		m.cmpFrac = 0
		return tea.Batch(runCompare(m.cmpJob, m.set, m.sel.Block, m.bi().blk.Name, m.sel.Batch), m.cmpJob.wait())
	}
	return nil
}

// refresh prepares the focused screen's view after a change.
func (m *Model) refresh() {
	m.syncKeys()
	bw, bh := m.bodySize()
	s := m.screens[m.active]
	s.SetSize(bw, bh)
	s.Refresh()
}

// helpKeys is the focused screen's help with the global keys after it.
func (m *Model) helpKeys() keyHelp {
	k := m.keys
	sk := m.screens[m.active]
	global := []key.Binding{k.NextFinding, k.PrevFinding, k.NextScreen, k.PrevScreen, k.Jump, k.Find, k.FindNext, k.FindPrev, k.Copy, k.Colormap, k.Help, k.Quit}
	global = append(global, m.opts.ExtraHelp...)
	loc := []key.Binding{k.PrevLayer, k.NextLayer, k.PrevHead, k.NextHead, k.PrevBatch, k.NextBatch, k.PrevBlock, k.NextBlock}
	groups := append(sk.FullHelp(), loc, global)
	short := append(sk.ShortHelp(), k.NextFinding, k.NextScreen, k.Help, k.Quit)
	return keyHelp{short: short, groups: groups}
}

func (m *Model) statusFields() []views.Field {
	b := m.bi().blk
	// the location in the one syntax --at takes and y copies, with the
	// query and key where the screen has a cursor
	loc := m.Location()
	switch m.active {
	case ScreenSurvey, ScreenFindings:
		loc.Query, loc.Key = -1, -1
	case ScreenTrace:
		loc.Key = -1
	}
	f := []views.Field{{Value: loc.String()}}
	if b.AxesFrom == "rank" && b.AxesOther != "" {
		// how the array was read, until someone says (Findings has the words)
		f = append(f, views.Field{Name: "axes guessed", Value: strings.ReplaceAll(b.Axes, " ", "·")})
	}
	if b.KindFrom == "inferred" {
		f = append(f, views.Field{Name: "inferred", Value: string(b.Kind)})
	}
	if m.active == ScreenMap || m.active == ScreenCompare {
		if w, err := m.d.weight(m.headKey(0), m.sel.Q*b.Keys+m.sel.K); err == nil {
			f = append(f, views.Field{Name: "w", Value: views.FormatWeight(w)})
		}
	}
	return f
}

func (m *Model) headKey(example int) headKey {
	return headKey{example: example, block: m.sel.Block, layer: m.sel.Layer, batch: m.sel.Batch, head: m.sel.Head}
}

// View draws the tab bar, the focused screen (or the help), the status bar
// and the key line (or the progress bar, or the find prompt).
func (m *Model) View() tea.View {
	var v tea.View
	v.AltScreen = true
	v.MouseMode = tea.MouseModeCellMotion
	v.WindowTitle = "heed · " + m.title()
	if m.quitting {
		return v
	}
	if m.w < 20 || m.h < 6 {
		v.SetContent("heed: the terminal is too small (needs 20 x 6)")
		return v
	}
	var b strings.Builder
	right := m.title()
	b.WriteString(views.Tabs(m.w, m.screenNames(), m.tabIndex(), right, m.st).String())
	b.WriteByte('\n')
	_, bh := m.bodySize()
	var body string
	if m.showHelp {
		body = "Keys of " + m.screens[m.active].Name() + " (? or esc to close)\n\n" + m.fullHelp()
	} else {
		body = m.screens[m.active].View()
	}
	b.WriteString(fitLines(body, bh))
	b.WriteByte('\n')
	// Short notices fit in the status bar; longer ones take the key line
	// until the next key.
	status, bottom := m.msg, ""
	if views.StringWidth(m.msg) > m.w/2 {
		status, bottom = "", m.msg
	}
	b.WriteString(views.Status(m.w, m.statusFields(), status, m.msgStyle, m.st).String())
	b.WriteByte('\n')
	switch {
	case m.finding:
		b.WriteString(m.find.View())
	case !m.anaDone:
		b.WriteString(fmt.Sprintf("statistics %3.0f%% ", 100*m.anaFrac) + m.prog.ViewAs(m.anaFrac) + "  ")
		hm := m.help
		hm.SetWidth(max(0, m.w-m.prog.Width()-18))
		b.WriteString(hm.ShortHelpView([]key.Binding{m.keys.Help, m.keys.Quit}))
	case bottom != "":
		c := views.NewCanvas(m.w, 1)
		c.Text(0, 0, bottom, m.msgStyle, -1)
		b.WriteString(c.String())
	default:
		b.WriteString(m.help.ShortHelpView(m.helpKeys().short))
	}
	v.SetContent(b.String())
	return v
}

// fullHelp lays the help groups out in as many rows of columns as the
// width needs, so that no key is cut off; columns are cut to fewer keys
// until the whole help fits the height.
func (m *Model) fullHelp() string {
	hm := help.New()
	hm.Styles = m.help.Styles
	_, bh := m.bodySize()
	var out string
	for rows := 16; rows >= 3; rows-- {
		var cols [][]key.Binding
		for _, g := range m.helpKeys().groups {
			var on []key.Binding
			for _, b := range g {
				if b.Enabled() {
					on = append(on, b)
				}
			}
			for len(on) > 0 {
				n := min(rows, len(on))
				cols = append(cols, on[:n])
				on = on[n:]
			}
		}
		var lines []string
		var cur [][]key.Binding
		for _, c := range cols {
			try := append(append([][]key.Binding(nil), cur...), c)
			if len(cur) > 0 && lipgloss.Width(hm.FullHelpView(try)) > m.w {
				lines = append(lines, hm.FullHelpView(cur))
				cur = [][]key.Binding{c}
				continue
			}
			cur = try
		}
		if len(cur) > 0 {
			lines = append(lines, hm.FullHelpView(cur))
		}
		out = strings.Join(lines, "\n\n")
		if strings.Count(out, "\n")+1 <= bh-2 {
			break
		}
	}
	return out
}

// tabIndex is the active screen's position among the shown tabs.
func (m *Model) tabIndex() int {
	if m.active == ScreenCompare {
		return len(m.screenNames()) - 1
	}
	return m.active
}

func (m *Model) title() string {
	if m.opts.Name != "" {
		return m.opts.Name
	}
	name := strings.Join(m.set.Examples[0], " ")
	if m.set.Len() == 2 {
		name += "  vs  " + strings.Join(m.set.Examples[1], " ")
	} else if m.set.Len() > 2 {
		name += fmt.Sprintf(" (+%d examples)", m.set.Len()-1)
	}
	return name
}

// fitLines pads or cuts s to exactly h lines.
func fitLines(s string, h int) string {
	lines := strings.Split(s, "\n")
	if len(lines) > h {
		lines = lines[:h]
	}
	for len(lines) < h {
		lines = append(lines, "")
	}
	return strings.Join(lines, "\n")
}
