package tui

import (
	"cmp"
	"fmt"
	"math"
	"slices"
	"strconv"
	"strings"

	"charm.land/bubbles/v2/key"
	tea "charm.land/bubbletea/v2"
	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/internal/words"
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

// --- Survey ---------------------------------------------------------------

// stat is one statistic the Survey can colour its grid by.
type stat struct {
	name, unit, hint string
	// lowFirst ranks the lowest values first in the list (prune candidates)
	lowFirst bool
	// log colours on a log scale (leak mass: one leaking cell stands apart from 0)
	log bool
	get func(*analysis.Stats, *analysis.HeadStats) float64
}

// surveyStats are the Survey's statistics; get reads the per-batch Stats
// (s) or, for what exists only over every batch item, the head's (h, nil
// for a batch item alone).
func surveyStats(hasGrad bool) []stat {
	imp := stat{"importance", "", "Michel et al. 2019, normalised per layer; low = prunable", true, false,
		func(_ *analysis.Stats, h *analysis.HeadStats) float64 {
			if h == nil {
				return math.NaN()
			}
			return h.ImportanceNorm
		}}
	if !hasGrad {
		imp = stat{analysis.ScoreName, "", "no gradients: confidence × distinctness, a heuristic; low = prunable", true, false,
			func(_ *analysis.Stats, h *analysis.HeadStats) float64 {
				if h == nil {
					return math.NaN()
				}
				return h.Score
			}}
	}
	return []stat{
		{"entropy", "nats", "low = focused, high = spread", false, false, func(s *analysis.Stats, _ *analysis.HeadStats) float64 { return s.Entropy }},
		{"confidence", "", "mean row maximum; high = peaked", false, false, func(s *analysis.Stats, _ *analysis.HeadStats) float64 { return s.Confidence }},
		imp,
		{"leak mass", "per row", "forbidden mass, log scale; 0 = clean, ! = any leak", false, true, func(s *analysis.Stats, _ *analysis.HeadStats) float64 { return s.LeakMass }},
		{"sink", "", "mass on key 0; > 0.3 = sink head", false, false, func(s *analysis.Stats, _ *analysis.HeadStats) float64 { return s.Sink }},
		{"distance", "positions", "mean |k - q| weighted by attention", false, false, func(s *analysis.Stats, _ *analysis.HeadStats) float64 { return s.Distance }},
		{"distinctness", "nats", "mean JS divergence to the layer's other heads; low = a duplicate", true, false, func(s *analysis.Stats, _ *analysis.HeadStats) float64 { return s.Distinctness }},
	}
}

type surveyScreen struct {
	base
	layout  views.SurveyLayout
	numbers bool // values written in the cells
	ranked  bool // the ranked list instead of the grid
	order   []int
}

func newSurvey(m *Model) *surveyScreen { return &surveyScreen{base: base{m: m}} }

func (s *surveyScreen) Name() string { return "Survey" }

func (s *surveyScreen) ShortHelp() []key.Binding {
	k := s.m.keys
	return []key.Binding{k.Up, k.Left, k.Enter, k.Stat, k.Order}
}

func (s *surveyScreen) FullHelp() [][]key.Binding {
	k := s.m.keys
	return [][]key.Binding{{k.Up, k.Down, k.Left, k.Right, k.Enter, k.Stat, k.Order, k.Numbers}}
}

// step moves the cursor d places along the ranked list.
func (s *surveyScreen) step(d int) {
	m := s.m
	heads := m.bi().blk.Heads
	cur := slices.Index(s.order, m.layer*heads+m.head)
	if len(s.order) == 0 {
		return
	}
	i := max(0, min(cur+d, len(s.order)-1))
	m.layer, m.head = s.order[i]/heads, s.order[i]%heads
}

func (s *surveyScreen) Update(msg tea.Msg) tea.Cmd {
	m := s.m
	k := m.keys
	switch msg := msg.(type) {
	case tea.KeyPressMsg:
		switch {
		case s.ranked && key.Matches(msg, k.Up):
			s.step(-1)
		case s.ranked && key.Matches(msg, k.Down):
			s.step(1)
		case s.ranked && key.Matches(msg, k.PageUp):
			s.step(-max(1, s.layout.ListRows))
		case s.ranked && key.Matches(msg, k.PageDown):
			s.step(max(1, s.layout.ListRows))
		case key.Matches(msg, k.Up):
			m.moveLayer(-1)
		case key.Matches(msg, k.Down):
			m.moveLayer(1)
		case key.Matches(msg, k.Left):
			m.moveHead(-1)
		case key.Matches(msg, k.Right):
			m.moveHead(1)
		case key.Matches(msg, k.Stat):
			n := len(surveyStats(m.bi().blk.HasGrad))
			m.statIndex = (m.statIndex + 1) % n
		case key.Matches(msg, k.Order):
			s.ranked = !s.ranked
		case key.Matches(msg, k.Numbers):
			s.numbers = !s.numbers
		case key.Matches(msg, k.Enter):
			m.switchTo(ScreenMap)
		}
	case tea.MouseClickMsg:
		if l, h, ok := s.layout.HeadAt(msg.X, msg.Y); ok {
			if l == m.layer && h == m.head {
				m.switchTo(ScreenMap)
			}
			m.layer, m.head = l, h
		}
	case tea.MouseWheelMsg:
		d := 0
		if msg.Button == tea.MouseWheelUp {
			d = -1
		} else if msg.Button == tea.MouseWheelDown {
			d = 1
		}
		if s.ranked {
			s.step(d)
		} else if d != 0 {
			m.moveLayer(d)
		}
	}
	return nil
}

func (s *surveyScreen) Refresh() {
	m := s.m
	b := m.bi().blk
	stats := surveyStats(b.HasGrad)
	st := stats[m.statIndex%len(stats)]
	d := &views.SurveyData{Block: b.Name, Layers: b.Layers, Heads: b.Heads, Stat: st.name, Unit: st.unit, Hint: st.hint,
		Values: make([]float64, b.Layers*b.Heads), Log: st.log, Numbers: s.numbers}
	var br *analysis.BlockResult
	if m.res != nil {
		br = m.res.Block(b.Name)
	}
	// one batch item's statistics once the user picks one (b / B), else
	// every batch item's together
	perBatch := b.Batch > 1 && m.batchPicked
	switch {
	case perBatch:
		d.Scope = fmt.Sprintf("batch item %d of %d", m.batch, b.Batch)
	case b.Batch > 1:
		d.Scope = fmt.Sprintf("all %d batch items (b: one)", b.Batch)
	}
	get := func(i int) (*analysis.Stats, *analysis.HeadStats) {
		hs := &br.Stats[i]
		if perBatch && m.batch < len(hs.Batch) {
			return &hs.Batch[m.batch], nil
		}
		return &hs.Stats, hs
	}
	for i := range d.Values {
		d.Values[i] = math.NaN()
		if br != nil {
			d.Values[i] = st.get(get(i))
		}
	}
	if br != nil {
		d.Marks = make([]bool, len(d.Values))
		for i := range d.Marks {
			ps, _ := get(i)
			d.Marks[i] = ps.LeakCells > 0
		}
		hs := br.Head(m.layer, m.head)
		ps, ph := get(m.layer*b.Heads + m.head)
		for _, x := range stats {
			d.Details = append(d.Details, views.Field{Name: x.name, Value: views.FormatValue(x.get(ps, ph))})
		}
		d.Details = append(d.Details, views.Field{Name: "rows", Value: strconv.FormatInt(ps.Rows, 10)})
		if ps.LeakCells > 0 {
			d.Details = append(d.Details, views.Field{Name: "leaking cells", Value: strconv.FormatInt(ps.LeakCells, 10)})
		}
		if hs.NaNRows > 0 {
			d.Details = append(d.Details, views.Field{Name: "NaN rows", Value: strconv.FormatInt(hs.NaNRows, 10)})
		}
		d.Note = fmt.Sprintf("over %s; suggestions are evidence to confirm by re-evaluating the model",
			words.Count(int(m.res.Examples), "example", "examples"))
		if b.Heads == 1 {
			d.Note = "one head: heads were probably averaged at export, so these describe the average"
		}
	} else if m.anaErr != nil {
		d.Note = "statistics failed: " + m.anaErr.Error()
	} else {
		d.Note = "computing statistics in the background…"
	}
	s.order = nil
	if s.ranked {
		s.order = make([]int, len(d.Values))
		for i := range s.order {
			s.order[i] = i
		}
		// NaN last; ties by position
		slices.SortStableFunc(s.order, func(a, b int) int {
			va, vb := d.Values[a], d.Values[b]
			switch {
			case math.IsNaN(va) || math.IsNaN(vb):
				return cmp.Compare(boolInt(math.IsNaN(va)), boolInt(math.IsNaN(vb)))
			case st.lowFirst:
				return cmp.Compare(va, vb)
			}
			return cmp.Compare(vb, va)
		})
		d.Order = s.order
	}
	c, l := views.Survey(d, s.w, s.h, m.layer, m.head, m.st)
	s.layout = l
	s.show(c)
}

func boolInt(b bool) int {
	if b {
		return 1
	}
	return 0
}

// --- Map ------------------------------------------------------------------

type mapMemo struct {
	key  headKey
	md   *views.MapData
	err  error
	made bool
}

type mapScreen struct {
	base
	memo    mapMemo
	layout  views.MapLayout
	inspect bool // the row inspector beside (or under) the map
}

func newMapScreen(m *Model) *mapScreen { return &mapScreen{base: base{m: m}} }

func (s *mapScreen) Name() string { return "Map" }

func mapShort(k KeyMap) []key.Binding {
	return []key.Binding{k.Up, k.Left, k.PrevLayer, k.NextLayer, k.PrevHead, k.NextHead, k.ZoomIn, k.ZoomOut}
}

func mapFull(k KeyMap) []key.Binding {
	return []key.Binding{k.Up, k.Down, k.Left, k.Right, k.PageUp, k.PageDown, k.ZoomIn, k.ZoomOut, k.Agg, k.Scale, k.Sink}
}

func (s *mapScreen) ShortHelp() []key.Binding { return append(mapShort(s.m.keys), s.m.keys.Inspect) }
func (s *mapScreen) FullHelp() [][]key.Binding {
	return [][]key.Binding{append(mapFull(s.m.keys), s.m.keys.Inspect)}
}

// mapUpdate handles the keys and mouse of a heat map (Map and Compare).
func mapUpdate(m *Model, l views.MapLayout, msg tea.Msg) (handled bool) {
	b := m.bi().blk
	k := m.keys
	step := max(1, l.Block)
	clampQ := func(q int) int { return max(0, min(q, b.Queries-1)) }
	clampK := func(x int) int { return max(l.KeyStart, min(x, b.Keys-1)) }
	zoom := func(d int) {
		m.mapOpt.Zoom = max(0, min(l.Zoom+d, l.MaxZoom))
	}
	switch msg := msg.(type) {
	case tea.KeyPressMsg:
		switch {
		case key.Matches(msg, k.Up):
			m.q = clampQ(m.q - step)
		case key.Matches(msg, k.Down):
			m.q = clampQ(m.q + step)
		case key.Matches(msg, k.Left):
			m.k = clampK(m.k - step)
		case key.Matches(msg, k.Right):
			m.k = clampK(m.k + step)
		case key.Matches(msg, k.PageUp):
			m.q = clampQ(m.q - l.PageRows())
		case key.Matches(msg, k.PageDown):
			m.q = clampQ(m.q + l.PageRows())
		case key.Matches(msg, k.ZoomIn):
			zoom(1)
		case key.Matches(msg, k.ZoomOut):
			zoom(-1)
		case key.Matches(msg, k.Agg):
			m.mapOpt.Agg = 1 - m.mapOpt.Agg
			m.setMsg("zoomed-out pixels show the "+m.mapOpt.Agg.String()+" weight", m.st.Text)
		case key.Matches(msg, k.Scale):
			m.mapOpt.Scale = 1 - m.mapOpt.Scale
			m.setMsg(m.mapOpt.Scale.String()+" colour scale", m.st.Text)
		case key.Matches(msg, k.Sink):
			m.mapOpt.HideSink = !m.mapOpt.HideSink
			if m.mapOpt.HideSink {
				m.k = max(m.k, 1)
				m.setMsg("sink column (key 0) hidden; the scale ignores it", m.st.Text)
			} else {
				m.setMsg("sink column shown", m.st.Text)
			}
		default:
			return false
		}
	case tea.MouseClickMsg:
		if q, kk, ok := l.CellAt(msg.X, msg.Y); ok {
			m.q, m.k = q, kk
		}
	case tea.MouseWheelMsg:
		switch msg.Button {
		case tea.MouseWheelUp:
			zoom(1)
		case tea.MouseWheelDown:
			zoom(-1)
		}
	default:
		return false
	}
	return true
}

func (s *mapScreen) Update(msg tea.Msg) tea.Cmd {
	if km, ok := msg.(tea.KeyPressMsg); ok && key.Matches(km, s.m.keys.Inspect) {
		s.inspect = !s.inspect
		return nil
	}
	mapUpdate(s.m, s.layout, msg)
	return nil
}

// rowPanelW is the row inspector's width beside the map; below
// rowPanelMinW columns of body it goes under the map instead.
const (
	rowPanelW    = 40
	rowPanelMinW = 110
)

// rowData prepares the row inspector of the cursor's query.
func (m *Model) rowData(md *views.MapData, top int) *views.RowData {
	bi := m.bi()
	b := bi.blk
	q := m.q
	row := make([]float32, b.Keys)
	for k := range row {
		row[k] = md.At(q, k)
	}
	var rules []analysis.Rule
	judged := true
	if r := bi.rules; r != nil && len(r.Active()) > 0 {
		judged = r.Judged(m.batch, q)
		if judged {
			rules = make([]analysis.Rule, b.Keys)
			if err := r.CellRow(m.batch, m.head, q, rules); err != nil {
				rules = nil
			}
		}
	}
	sum := analysis.SummarizeRow(row, rules, top, float32(m.anaOpt.Tol))
	qt, kt := bi.tokens(m.batch)
	d := &views.RowData{Query: q, Position: q + b.QueryOffset, Judged: judged, Sum: sum.Sum, Entropy: sum.Entropy,
		Forbidden: sum.Forbidden, ForbidKeys: sum.ForbiddenKeys, Keys: b.Keys}
	if bi.rules != nil {
		d.Position = bi.rules.Pos(m.batch, q)
	}
	if q < len(qt) {
		d.QueryToken = qt[q]
	}
	for _, rk := range sum.Top {
		k := views.RowKey{Key: rk.Key, Weight: rk.Weight, Status: "allowed"}
		if rk.Key < len(kt) {
			k.Token = kt[rk.Key]
		}
		switch {
		case !judged:
			k.Status = "not judged"
		case rk.Rule != analysis.RuleNone:
			k.Status, k.Forbidden = "forbidden by "+rk.Rule.String(), true
		}
		d.Top = append(d.Top, k)
	}
	return d
}

// mapData returns the MapData of the current head of example 0, memoised.
func (m *Model) mapData(memo *mapMemo) (*views.MapData, error) {
	hk := m.headKey(0)
	if memo.made && memo.key == hk {
		return memo.md, memo.err
	}
	memo.key, memo.made = hk, true
	m.d.pinned = hk // its patterns stay this head's while md reads them
	bi := m.bi()
	var md *views.MapData
	if r, ok, err := m.d.raw(hk); err != nil {
		memo.md, memo.err = nil, err
		return nil, err
	} else if ok {
		md = views.NewMapData16(bi.blk.Queries, bi.blk.Keys, r.p, r.value)
	} else {
		w, err := m.d.head(hk)
		if err != nil {
			memo.md, memo.err = nil, err
			return nil, err
		}
		md = views.NewMapData(bi.blk.Queries, bi.blk.Keys, w)
	}
	md.QueryTokens, md.KeyTokens = bi.tokens(m.batch)
	md.QueryOffset = bi.blk.QueryOffset
	md.Rule = bi.ruleFunc(m.batch, m.head)
	md.RowRuns = bi.rowRunsFunc(m.batch, m.head)
	md.Tol = float32(m.anaOpt.Tol)
	memo.md, memo.err = md, nil
	return md, nil
}

// drawMap lays out md in w x h, syncing the cursor and origin with the
// layout, and returns the canvas.
func (m *Model) drawMap(md *views.MapData, hk headKey, isDiff bool, w, h int) (*views.Canvas, views.MapLayout) {
	m.mapOpt.CursorQ, m.mapOpt.CursorK = m.q, m.k
	l := views.LayoutMap(md, w, h, m.mapOpt, m.st)
	m.mapOpt.Zoom, m.mapOpt.Q0, m.mapOpt.K0 = l.Zoom, l.Q0, l.K0
	if m.k < l.KeyStart {
		m.k = l.KeyStart
		m.mapOpt.CursorK = m.k
	}
	var px *views.Pixels
	if !l.TooSmall {
		px = m.d.window(hk, md, l, m.mapOpt.Agg, isDiff)
	}
	return views.Map(md, px, l, m.mapOpt, m.st), l
}

func (s *mapScreen) Refresh() {
	m := s.m
	md, err := m.mapData(&s.memo)
	if err != nil {
		s.canvas, s.view = nil, m.st.Bad.Lip().Render("cannot read this head: "+err.Error())
		return
	}
	if !s.inspect {
		c, l := m.drawMap(md, m.headKey(0), false, s.w, s.h)
		s.layout = l
		s.show(c)
		return
	}
	// the map beside the inspector when wide, above it when not; the
	// map keeps the top-left corner, so mouse positions stay its own
	mw, mh := s.w-rowPanelW-1, s.h
	px, py, pw, ph := mw+1, 0, rowPanelW, s.h
	if s.w < rowPanelMinW {
		ph = min(16, max(6, s.h/3))
		mw, mh = s.w, s.h-ph-1
		px, py, pw = 0, mh+1, s.w
	}
	c, l := m.drawMap(md, m.headKey(0), false, mw, mh)
	s.layout = l
	all := views.NewCanvas(s.w, s.h)
	all.Blit(0, 0, c)
	all.Blit(px, py, views.RowPanel(m.rowData(md, max(3, ph-5)), pw, ph, m.st))
	s.show(all)
}

// --- Findings -------------------------------------------------------------

type findingsScreen struct {
	base
	sel    int
	layout views.FindingsLayout
}

func newFindings(m *Model) *findingsScreen { return &findingsScreen{base: base{m: m}} }

func (s *findingsScreen) Name() string { return "Findings" }

func (s *findingsScreen) ShortHelp() []key.Binding {
	k := s.m.keys
	return []key.Binding{k.Up, k.Down, k.Enter}
}

func (s *findingsScreen) FullHelp() [][]key.Binding {
	k := s.m.keys
	return [][]key.Binding{{k.Up, k.Down, k.PageUp, k.PageDown, k.Enter}}
}

func (s *findingsScreen) findings() []analysis.Finding {
	if s.m.res == nil {
		return nil
	}
	return s.m.res.Findings
}

func (s *findingsScreen) Update(msg tea.Msg) tea.Cmd {
	m := s.m
	k := m.keys
	n := len(s.findings())
	switch msg := msg.(type) {
	case tea.KeyPressMsg:
		switch {
		case key.Matches(msg, k.Up):
			s.sel--
		case key.Matches(msg, k.Down):
			s.sel++
		case key.Matches(msg, k.PageUp):
			s.sel -= max(1, s.layout.Visible)
		case key.Matches(msg, k.PageDown):
			s.sel += max(1, s.layout.Visible)
		case key.Matches(msg, k.Enter):
			if n > 0 {
				m.showFinding(max(0, min(s.sel, n-1)))
			}
		}
	case tea.MouseClickMsg:
		if i, ok := s.layout.RowAt(msg.Y); ok && i < n {
			if i == s.sel {
				m.showFinding(i)
			}
			s.sel = i
		}
	case tea.MouseWheelMsg:
		if msg.Button == tea.MouseWheelUp {
			s.sel--
		} else if msg.Button == tea.MouseWheelDown {
			s.sel++
		}
	}
	s.sel = max(0, min(s.sel, n-1))
	return nil
}

func offsetsText(os []analysis.OffsetCount) string {
	var parts []string
	for i, o := range os {
		if i == 3 {
			parts = append(parts, "…")
			break
		}
		parts = append(parts, fmt.Sprintf("%+d ×%d", o.Offset, o.Count))
	}
	return strings.Join(parts, ", ")
}

func (s *findingsScreen) Refresh() {
	m := s.m
	d := &views.FindingsData{Done: m.anaDone, Progress: fmt.Sprintf("%.0f%%", 100*m.anaFrac)}
	if m.anaErr != nil {
		d.Notes = append(d.Notes, "the checks failed: "+m.anaErr.Error())
	}
	d.Notes = append(d.Notes, m.set.Warnings...)
	if m.res != nil {
		for _, f := range m.res.Findings {
			bl := m.res.Block(f.Block)
			L, H, B := 0, 0, 0
			if bl != nil {
				L, H, B = bl.Layers, bl.Heads, bl.Batch
			}
			w := f.Worst
			worst := w.String()
			d.Rows = append(d.Rows, views.FindingRow{Block: f.Block, Rule: f.Rule.String(),
				Layers: words.Ranges(f.Layers, L), Heads: words.Ranges(f.Heads, H), Batches: words.Ranges(f.Batches, B),
				Mass: f.Mass, Max: f.Max, Cells: f.Cells, Rows: f.Rows, Worst: worst, Offsets: offsetsText(f.Offsets)})
		}
		for _, dg := range m.res.Diagnoses {
			d.Diagnosis = append(d.Diagnosis, strings.TrimSpace(strings.TrimSuffix(dg.Text, analysis.Caveat)))
		}
		d.Caveat = analysis.Caveat
		d.Notes = append(d.Notes, m.res.Notes...)
		for _, c := range m.res.Coverage {
			for _, g := range c.NotJudged {
				d.NotJudged = append(d.NotJudged, fmt.Sprintf("%s: %s: %s. To judge it: %s", g.Block, g.What, g.Why, g.Fix))
			}
			if c.KindFrom == "inferred" {
				d.Inferred = append(d.Inferred, c.Block+": "+c.Evidence)
			}
		}
	}
	s.sel = max(0, min(s.sel, len(d.Rows)-1))
	c, l := views.Findings(d, s.w, s.h, s.sel, m.st)
	s.layout = l
	s.show(c)
}

// --- Trace ----------------------------------------------------------------

type traceScreen struct {
	base
	sel     int
	byShare bool
	layout  views.TraceLayout
}

func newTrace(m *Model) *traceScreen { return &traceScreen{base: base{m: m}} }

func (s *traceScreen) Name() string { return "Trace" }

func (s *traceScreen) ShortHelp() []key.Binding {
	k := s.m.keys
	return []key.Binding{k.Up, k.Left, k.Order, k.Enter}
}

func (s *traceScreen) FullHelp() [][]key.Binding {
	k := s.m.keys
	up, left, right := k.Up, k.Left, k.Right
	up.SetHelp("↑/↓", "pick an input token")
	left.SetHelp("←/h", "previous output position")
	right.SetHelp("→/l", "next output position")
	return [][]key.Binding{{up, left, right, k.PageUp, k.PageDown, k.Order, k.Enter}}
}

func (s *traceScreen) data() *views.TraceData {
	m := s.m
	return m.traces[traceKey{m.block, m.batch, m.q}]
}

func (s *traceScreen) Update(msg tea.Msg) tea.Cmd {
	m := s.m
	k := m.keys
	d := s.data()
	var order []int
	if d != nil {
		order = views.TraceOrder(d, s.byShare)
	}
	idx := 0
	for i, p := range order {
		if p == s.sel {
			idx = i
		}
	}
	moveSel := func(delta int) {
		if len(order) > 0 {
			s.sel = order[max(0, min(idx+delta, len(order)-1))]
		}
	}
	switch msg := msg.(type) {
	case tea.KeyPressMsg:
		switch {
		case key.Matches(msg, k.Up):
			moveSel(-1)
		case key.Matches(msg, k.Down):
			moveSel(1)
		case key.Matches(msg, k.PageUp):
			moveSel(-max(1, len(s.layout.Order)))
		case key.Matches(msg, k.PageDown):
			moveSel(max(1, len(s.layout.Order)))
		case key.Matches(msg, k.Left):
			m.q = max(0, m.q-1)
		case key.Matches(msg, k.Right):
			m.q = min(m.bi().blk.Queries-1, m.q+1)
		case key.Matches(msg, k.Order):
			s.byShare = !s.byShare
		case key.Matches(msg, k.Enter):
			if d != nil && (d.Side == m.bi().blk.KeySide || d.Side == "") && s.sel < m.bi().blk.Keys {
				m.k = s.sel
				m.switchTo(ScreenMap)
			} else if d != nil {
				m.setMsg("the trace is over "+d.Side+" tokens; the map of "+m.bi().blk.Name+" has other keys", m.st.Warn)
			}
		}
	case tea.MouseClickMsg:
		if p, ok := s.layout.PosAt(msg.Y); ok {
			s.sel = p
		}
	case tea.MouseWheelMsg:
		if msg.Button == tea.MouseWheelUp {
			moveSel(-3)
		} else if msg.Button == tea.MouseWheelDown {
			moveSel(3)
		}
	}
	return nil
}

func (s *traceScreen) Refresh() {
	m := s.m
	d := s.data()
	if d == nil {
		qt, _ := m.bi().tokens(m.batch)
		tok := ""
		if m.q < len(qt) {
			tok = qt[m.q]
		}
		d = &views.TraceData{Block: m.bi().blk.Name, Query: m.q, QueryToken: tok, Note: "tracing… (rollout, flow, gradient relevance)"}
	} else if d.QueryToken == "" {
		if qt, _ := m.bi().tokens(m.batch); m.q < len(qt) {
			d.QueryToken = qt[m.q]
		}
	}
	c, l := views.Trace(d, s.w, s.h, views.TraceOptions{Selected: s.sel, ByShare: s.byShare}, m.st)
	s.layout = l
	s.show(c)
}

// --- Compare --------------------------------------------------------------

type compareScreen struct {
	base
	memoKey headKey
	memoMD  *views.MapData
	memoErr error
	made    bool
	layout  views.CompareLayout
	next    int  // table row the last enter went to
	landed  bool // opened on the most changed head already
}

func newCompare(m *Model) *compareScreen { return &compareScreen{base: base{m: m}, next: -1} }

func (s *compareScreen) Name() string { return "Compare" }

func (s *compareScreen) ShortHelp() []key.Binding {
	k := s.m.keys
	return []key.Binding{k.Up, k.Left, k.PrevHead, k.NextHead, k.Enter}
}

func (s *compareScreen) FullHelp() [][]key.Binding {
	return [][]key.Binding{append(mapFull(s.m.keys), s.m.keys.Enter)}
}

func (s *compareScreen) Update(msg tea.Msg) tea.Cmd {
	m := s.m
	heads := m.cmp[m.block]
	if km, ok := msg.(tea.KeyPressMsg); ok && key.Matches(km, m.keys.Enter) {
		if len(heads) == 0 {
			return nil
		}
		// The first enter goes to the most changed head, each next one down the table.
		s.next = (s.next + 1) % len(heads)
		s.goHead(heads[s.next])
		return nil
	}
	if cm, ok := msg.(tea.MouseClickMsg); ok {
		if i, ok := s.layout.HeadAt(cm.X, cm.Y); ok && i < len(heads) {
			s.next = i
			s.goHead(heads[i])
			return nil
		}
		mouse := cm.Mouse()
		mouse.X -= s.layout.MapX
		mouse.Y -= s.layout.MapY
		mapUpdate(m, s.layout.Map, tea.MouseClickMsg(mouse))
		return nil
	}
	mapUpdate(m, s.layout.Map, msg)
	return nil
}

func (s *compareScreen) goHead(h views.HeadChange) {
	m := s.m
	m.layer, m.head, m.q, m.k = h.Layer, h.Head, h.Q, h.K
	rank := "most changed head"
	if s.next > 0 {
		rank = fmt.Sprintf("changed head %d", s.next+1)
	}
	m.setMsg(fmt.Sprintf("%s: L%d H%d, mean total variation %s (0 = same, 1 = disjoint), largest |A−B| %s at q%d k%d · enter: the next", rank, h.Layer, h.Head,
		views.FormatValue(h.TV), views.FormatValue(h.MaxAbs), h.Q, h.K), m.st.Accent)
}

// land opens Compare on the most changed head the first time its table is
// there (not on layer 0 head 0, which often did not change at all).
func (s *compareScreen) land() {
	m := s.m
	if s.landed || m.active != ScreenCompare {
		return
	}
	if heads := m.cmp[m.block]; len(heads) > 0 {
		s.landed = true
		s.next = 0
		s.goHead(heads[0])
	}
}

func (s *compareScreen) Refresh() {
	m := s.m
	if !m.hasCompare() {
		s.canvas, s.view = nil, m.compareWhyNot()
		return
	}
	hk := m.headKey(0)
	if !s.made || s.memoKey != hk {
		s.made, s.memoKey = true, hk
		a, b, diff, err := m.d.diff(hk)
		s.memoErr = err
		if err == nil {
			bi := m.bi()
			md := views.NewMapData(bi.blk.Queries, bi.blk.Keys, diff)
			md.QueryTokens, md.KeyTokens = bi.tokens(m.batch)
			md.QueryOffset = bi.blk.QueryOffset
			md.Rule = bi.ruleFunc(m.batch, m.head)
			md.RowRuns = bi.rowRunsFunc(m.batch, m.head)
			md.Tol = float32(m.anaOpt.Tol)
			md.Measure = "|A−B|"
			K := bi.blk.Keys
			md.Describe = func(q, k int) string {
				return "A " + views.FormatWeight(a[q*K+k]) + " → B " + views.FormatWeight(b[q*K+k])
			}
			s.memoMD = md
		}
	}
	if s.memoErr != nil {
		s.canvas, s.view = nil, "cannot read this head: "+s.memoErr.Error()
		return
	}
	cd := &views.CompareData{NameA: strings.Join(m.set.Examples[0], " "), NameB: strings.Join(m.set.Examples[1], " "),
		Block: m.bi().blk.Name, Layer: m.layer, Head: m.head, Diff: s.memoMD, Explain: analysis.TVDoc}
	heads, done := m.cmp[m.block]
	cd.Heads, cd.Done = heads, done
	switch {
	case m.cmpErr != nil:
		cd.Progress = "failed: " + m.cmpErr.Error()
	case !done:
		cd.Progress = fmt.Sprintf("measuring %.0f%%", 100*m.cmpFrac)
	}
	sel := -1
	for i, h := range heads {
		if h.Layer == m.layer && h.Head == m.head {
			sel = i
		}
	}
	// The difference map uses the shared map state: draw it through drawMap
	// so that cursor and zoom stay in step with the layout.
	c, l := views.Compare(cd, s.w, s.h, m.syncedMapOpt(s.memoMD, s.w, s.h), sel, m.st)
	s.layout = l
	s.show(c)
}

// syncedMapOpt lays out md the way views.Compare will (its map area) and
// stores the origin and zoom, so that keys move in step with what is drawn.
func (m *Model) syncedMapOpt(md *views.MapData, w, h int) views.MapOptions {
	mw, mh := w, h-1
	if w >= 100 {
		mw = w - 38 - 1
	} else {
		rows := min(len(m.cmp[m.block]), 5, max(0, h/3-1))
		mh = h - 1 - rows - 2
	}
	m.mapOpt.CursorQ, m.mapOpt.CursorK = m.q, m.k
	if mh > 0 {
		l := views.LayoutMap(md, mw, mh, m.mapOpt, m.st)
		m.mapOpt.Zoom, m.mapOpt.Q0, m.mapOpt.K0 = l.Zoom, l.Q0, l.K0
	}
	return m.mapOpt
}
