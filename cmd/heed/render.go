package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"strings"

	tea "charm.land/bubbletea/v2"
	"github.com/charmbracelet/colorprofile"
	"github.com/charmbracelet/x/ansi"
	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/loader"
	"github.com/heed-dev/heed/picture"
	"github.com/heed-dev/heed/tui"
	"github.com/heed-dev/heed/views"
	"github.com/spf13/cobra"
)

// renderFlags are heed render's own flags.
type renderFlags struct {
	at, out, screen, colormap, background string
	colour, force                         bool
	width, height                         int
	// from, to page the positions of a figure (inclusive; -1 = automatic)
	from, to int
}

// renderScreen is a screen heed render draws: the TUI's screen, its jump
// key and what it shows (the title says it).
type renderScreen struct {
	index int
	key   rune
	what  string
}

// renderScreens maps --screen to the TUI's screen and its jump key.
var renderScreens = map[string]renderScreen{
	"map":      {tui.ScreenMap, '2', "attention weight"},
	"survey":   {tui.ScreenSurvey, '1', "per-head statistics, layers × heads"},
	"findings": {tui.ScreenFindings, '3', "mask and row checks"},
	"trace":    {tui.ScreenTrace, '4', "input tokens' share of the query"},
	"compare":  {tui.ScreenCompare, '5', "|A−B| between the two exports"},
}

func newRenderCmd() *cobra.Command {
	lf := &loadFlags{}
	rf := &renderFlags{}
	cmd := &cobra.Command{
		Use:   "render FILE... --at LOC -o OUT.{png,svg,txt}",
		Short: "Write a picture of one screen (PNG, SVG or text) for a chat or a report",
		Long: `render writes one screen at a location to a file, chosen by the extension
of -o: a PNG or SVG figure for a slide or a report, or the terminal screen as
text (plain, or with ANSI colours with --color).

A figure is drawn with the Go Mono font built into heed (the same picture on
every machine), at most 1600 pixels wide, with the location as its title. The
Map (default) plots one head's query x key weights with token labels on both
axes (the keys' turned to read upwards), a colour bar "attention weight" from
0 to the head's largest weight, and forbidden cells that carry weight in the
alarm colour; --screen picks the Survey (entropy of every head, layers x
heads), Findings, Trace (bars of each input token's share, by rollout, flow
and gradient relevance) or, with two exports, Compare (|A−B|) instead.
Findings are evidence to confirm by re-evaluating the model, not verdicts.

A Map, Compare or Trace figure shows at most 64 positions unless told: for a
longer sequence, the 64 ending at the query, with a note saying so; --from
and --to (inclusive, up to 256 positions) pick others.

The file is written atomically. An existing file is replaced only when it is
a previous heed render, or with --force.`,
		Example: `  heed render run.npz --at decoder:L3:H7:q12 -o leak.png
  heed render run.npz --at decoder:L3:H7:q700 --from 640 --to 703 -o late.svg
  heed render run.npz --at decoder:L3:H7 --screen survey -o survey.svg
  heed render run.npz --at decoder:L0:H0 --screen findings -o findings.txt`,
		Args: cobra.MinimumNArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runRender(cmd.Context(), args, lf, rf)
		},
	}
	f := cmd.Flags()
	f.StringVar(&rf.at, "at", "", "location BLOCK:L<layer>:H<head>[:B<batch>][:q<query>] (required)")
	f.StringVarP(&rf.out, "output", "o", "", "output file: .png, .svg or .txt (required)")
	f.StringVar(&rf.screen, "screen", "map", "screen: map, survey, findings, trace or compare")
	f.BoolVar(&rf.colour, "color", false, "text output with ANSI (true-colour) escapes instead of plain text")
	f.BoolVar(&rf.force, "force", false, "replace OUT even when it is not a previous heed render")
	f.StringVar(&rf.colormap, "colormap", views.DefaultColormap, "colormap: "+strings.Join(views.ColormapNames(), ", "))
	f.StringVar(&rf.background, "background", "light", "page background of PNG and SVG: light or dark")
	f.IntVar(&rf.width, "width", 0, "width in terminal columns of a text render or the Findings picture (0: enough for the screen, up to 320)")
	f.IntVar(&rf.height, "height", 0, "height in terminal lines of a text render or the Findings picture (0: enough for the screen, up to 200)")
	f.IntVar(&rf.from, "from", -1, "first position a PNG/SVG of the map, compare or trace shows (default: the 64 ending at the query)")
	f.IntVar(&rf.to, "to", -1, "last position it shows (inclusive; at most 256 positions)")
	lf.register(cmd)
	return cmd
}

func runRender(ctx context.Context, args []string, lf *loadFlags, rf *renderFlags) error {
	if rf.at == "" {
		return errors.New("render: --at LOC is required, e.g. --at decoder:L3:H7:q12")
	}
	if rf.out == "" {
		return errors.New("render: -o OUT.png, OUT.svg or OUT.txt is required")
	}
	format, err := picture.FormatOf(rf.out)
	if err != nil {
		return err
	}
	if rf.colour && format != picture.FormatTXT {
		return fmt.Errorf("render: --color is for text output; %s is %s", rf.out, format)
	}
	scr, ok := renderScreens[rf.screen]
	if !ok {
		return fmt.Errorf("render: --screen %q: want map, survey, findings, trace or compare", rf.screen)
	}
	if rf.background != "light" && rf.background != "dark" {
		return fmt.Errorf("render: --background %q: want light or dark", rf.background)
	}
	cm, ok := views.ColormapByName(rf.colormap)
	if !ok {
		return fmt.Errorf("render: unknown colormap %q (want one of %s)", rf.colormap, strings.Join(views.ColormapNames(), ", "))
	}
	if rf.width < 0 || rf.height < 0 || (rf.width > 0 && rf.width < 40) || (rf.height > 0 && rf.height < 12) || rf.width > 2000 || rf.height > 2000 {
		return fmt.Errorf("render: --width %d --height %d: want 0 (automatic) or 40..2000 columns and 12..2000 lines", rf.width, rf.height)
	}
	figure := format != picture.FormatTXT && rf.screen != "findings"
	if (rf.from != -1 || rf.to != -1) && !figure {
		return fmt.Errorf("render: --from/--to page the positions of a PNG or SVG of the map, compare or trace, not of %s", rf.out)
	}
	if rf.from < -1 || rf.to < -1 || (rf.from >= 0 && rf.to >= 0 && rf.to < rf.from) {
		return fmt.Errorf("render: --from %d --to %d: want positions with --from <= --to", rf.from, rf.to)
	}
	// Refuse early, before any work, to replace a file that is not ours.
	if !rf.force {
		if _, err := os.Lstat(rf.out); err == nil {
			if ok, err := picture.IsRender(rf.out); err != nil || !ok {
				return fmt.Errorf("%s %w (use --force to replace it)", rf.out, picture.ErrExists)
			}
		}
	}

	set, err := openSetChecked(args, lf)
	if err != nil {
		return err
	}
	// Plain text has no colour: draw for a profile without it, so that the
	// glyph ramp carries the values (as the TUI does under NO_COLOR).
	profile := colorprofile.TrueColor
	if format == picture.FormatTXT && !rf.colour {
		profile = colorprofile.Ascii
	}
	dark := rf.background == "dark"
	// the statistics only for the screens that show them
	noStats := scr.index != tui.ScreenSurvey && scr.index != tui.ScreenFindings
	// the first example, opened once for the screen, its size and a figure,
	// with the mask rules the checks infer
	ex, err := openFirst(ctx, set)
	if err != nil {
		return err
	}
	defer ex.Close()
	m, err := tui.New(set, tui.Options{At: rf.at, Colormap: cm.Name, Background: rf.background, Profile: profile, Context: ctx, NoStatistics: noStats, Export: ex})
	if err != nil {
		return err
	}
	defer m.Close()
	if scr.index == tui.ScreenCompare && set.Len() != 2 {
		return errors.New("render: --screen compare needs two exports of the same shape (heed render A B ...)")
	}
	loc := m.Location()
	blk := ex.Block(loc.Block)
	w, h := rf.width, rf.height
	if blk != nil && (w == 0 || h == 0) {
		aw, ah := autoSize(blk, rf.screen)
		if w == 0 {
			w = aw
		}
		if h == 0 {
			h = ah
		}
	}
	if w == 0 {
		w = 100
	}
	if h == 0 {
		h = 40
	}

	locStr := m.LocationString()
	if scr.index == tui.ScreenSurvey || scr.index == tui.ScreenFindings {
		l := m.Location() // these screens show a head, not a query
		l.Query, l.Key = -1, -1
		locStr = l.String()
	}
	name := strings.Join(set.Examples[0], " ")
	out := renderOutput{format: format, dark: dark, screen: rf.screen, what: scr.what, name: name}
	shot := screenShot{m: m, ex: ex, scr: scr, w: w, h: h}
	st := views.NewStyles(profile, dark, cm)
	if figure {
		return renderFigure(ctx, set, shot, rf, st, locStr, out)
	}

	body, err := drawScreen(ctx, shot)
	if err != nil {
		return err
	}
	opt := out.options(locStr)
	title := opt.Title
	body = crop(body)
	c := views.NewCanvas(max(body.W, views.StringWidth(title)), body.H+2)
	c.Text(0, 0, title, st.Title, -1)
	c.Blit(0, 2, body)
	if format != picture.FormatTXT {
		// a picture of a screen (Findings): no cursor, no empty band
		c = tidy(c)
	}
	data, err := picture.Encode(c, format, rf.colour, opt)
	if err != nil {
		return err
	}
	return picture.WriteFile(rf.out, data, rf.force)
}

// renderOutput is the picture heed render writes: its format and look
// (dark), and what it says about itself: the screen (--screen) and what it
// shows, and the names of the inputs.
type renderOutput struct {
	format             picture.Format
	dark               bool
	screen, what, name string
}

// options are the picture's title, description and marker when it shows
// location loc.
func (o renderOutput) options(loc string) picture.Options {
	return picture.Options{
		Dark:        o.dark,
		Title:       fmt.Sprintf("heed · %s · %s · %s", o.screen, loc, o.what),
		Description: "heed " + versionString() + " render of " + o.name,
		Marker:      fmt.Sprintf("%s %s %s · heed %s", picture.MarkerPrefix, loc, o.screen, versionString()),
	}
}

// screenShot is a screen of the TUI's model drawn with a body of w x h
// cells.
type screenShot struct {
	m    *tui.Model
	ex   *loader.Export // what m shows: the set's first example, its mask rules inferred
	scr  renderScreen
	w, h int
}

// blank reports whether a cell shows nothing: a space in the default colours.
func blank(c views.Cell) bool {
	return (c.Ch == ' ' || c.Ch == 0) && !c.BG.IsSet() && c.Attr&(views.Reverse|views.Underline) == 0
}

// crop drops the blank columns at the right and the blank lines at the
// bottom, which a screen sized for the largest case leaves.
func crop(c *views.Canvas) *views.Canvas {
	w, h := 1, 1
	for y := 0; y < c.H; y++ {
		for x := 0; x < c.W; x++ {
			if !blank(c.At(x, y)) {
				w, h = max(w, x+1), max(h, y+1)
			}
		}
	}
	if w == c.W && h == c.H {
		return c
	}
	out := views.NewCanvas(w, h)
	for y := 0; y < h; y++ {
		copy(out.Cells[y*w:(y+1)*w], c.Cells[y*c.W:y*c.W+w])
	}
	// a wide rune cut in half at the new edge becomes a space
	for y := 0; y < h; y++ {
		if x := w - 1; out.Cells[y*w+x].Ch != 0 && x+1 < c.W && c.At(x+1, y).Ch == 0 {
			out.Cells[y*w+x].Ch = ' '
		}
	}
	return out
}

// autoSize is a canvas large enough to show a block's matrices without
// downsampling, within 320 x 200 cells: one column a key (plus the query
// labels), two queries a line with half blocks (plus the key labels and the
// legend).
func autoSize(b *loader.Block, screen string) (w, h int) {
	switch screen {
	case "map", "compare":
		w = b.Keys + 20
		h = (b.Queries+1)/2 + 14
	case "survey":
		w = 2*b.Heads + 40
		h = b.Layers + 16
	case "trace":
		w = 100
		h = min(b.Keys, 60) + 10
	default:
		w, h = 110, 40
	}
	return max(80, min(w, 320)), max(24, min(h, 200))
}

// drawScreen runs the TUI's model in a tea.Program without a terminal or a
// renderer, the program that heed FILE runs: it gets the size, the screen's
// jump key, and its background work (statistics, trace, comparison) runs
// as in the terminal; when the focused screen has nothing left to wait for,
// the program quits and the screen's cells are returned.
func drawScreen(ctx context.Context, shot screenShot) (*views.Canvas, error) {
	m, w, h := shot.m, shot.w, shot.h
	rm := &renderModel{m: m, screen: shot.scr.index, jump: shot.scr.key}
	// the body gets w x h: the window has room for the TUI's chrome too
	p := tea.NewProgram(rm, tea.WithContext(ctx), tea.WithInput(nil), tea.WithOutput(io.Discard), tea.WithoutRenderer(),
		tea.WithoutSignalHandler(), tea.WithWindowSize(w, h+tui.ChromeLines))
	if _, err := p.Run(); err != nil {
		if errors.Is(err, tea.ErrProgramKilled) && ctx.Err() != nil {
			return nil, ctx.Err()
		}
		return nil, err
	}
	if rm.err != nil {
		return nil, rm.err
	}
	c := m.Canvas()
	if c == nil {
		return nil, fmt.Errorf("render: nothing to draw at %s: %s", m.LocationString(), strings.TrimSpace(ansi.Strip(m.View().Content)))
	}
	return c, nil
}

// renderModel wraps the TUI's model for drawScreen: it presses the
// screen's jump key once the size is known and quits when the screen is
// no longer busy.
type renderModel struct {
	m      *tui.Model
	screen int
	jump   rune
	sized  bool
	err    error
}

func (r *renderModel) Init() tea.Cmd { return r.m.Init() }

func (r *renderModel) Update(msg tea.Msg) (tea.Model, tea.Cmd) {
	_, cmd := r.m.Update(msg)
	if _, ok := msg.(tea.WindowSizeMsg); ok && !r.sized {
		r.sized = true
		if r.m.Screen() != r.screen {
			_, c := r.m.Update(tea.KeyPressMsg{Code: r.jump, Text: string(r.jump)})
			cmd = tea.Batch(cmd, c)
			if r.m.Screen() != r.screen {
				r.err = fmt.Errorf("render: the %s screen is not available here", strings.ToLower([]string{"Survey", "Map", "Findings", "Trace", "Compare"}[r.screen]))
				return r, tea.Quit
			}
		}
	}
	if r.sized && !r.m.Busy() {
		return r, tea.Quit
	}
	return r, cmd
}

func (r *renderModel) View() tea.View { return r.m.View() }

// renderFigure writes a PNG or SVG figure of the Map, Compare, Trace or
// Survey (figure.go) of shot's screen at the location locStr names, from
// shot's export; the Survey's statistics come from the TUI's own pass, run
// as shot.
func renderFigure(ctx context.Context, set *loader.Set, shot screenShot, rf *renderFlags, st views.Styles, locStr string, out renderOutput) error {
	ex := shot.ex
	m := shot.m
	var res *analysis.Result
	if shot.scr.index == tui.ScreenSurvey {
		if _, err := drawScreen(ctx, shot); err != nil {
			return err
		}
		res = m.Result()
	}
	loc := m.Location()
	blk := ex.Block(loc.Block)
	if blk == nil {
		return fmt.Errorf("render: no block %s", loc.Block)
	}
	env := &figureEnv{ctx: ctx, m: m, set: set, ex: ex, blk: blk, loc: loc, batch: max(0, loc.Batch), rf: rf, st: st, locStr: locStr}
	fig, err := env.figure(rf.screen, res)
	if err != nil {
		return err
	}
	// the figure may name the location more exactly (a trace: the query it explains)
	data, err := picture.EncodeFigure(fig, out.format, out.options(env.locStr))
	if err != nil {
		return err
	}
	return picture.WriteFile(rf.out, data, rf.force)
}

// tidy makes a screen's cells a picture: the cursor's reverse video goes
// (a picture has no cursor) and a run of empty lines is closed up to one.
func tidy(c *views.Canvas) *views.Canvas {
	var keep []int
	empty := 0
	for y := 0; y < c.H; y++ {
		blankLine := true
		for x := 0; x < c.W; x++ {
			if !blank(c.At(x, y)) {
				blankLine = false
				break
			}
		}
		if blankLine {
			empty++
			if empty > 1 {
				continue
			}
		} else {
			empty = 0
		}
		keep = append(keep, y)
	}
	out := views.NewCanvas(c.W, len(keep))
	for i, y := range keep {
		for x := 0; x < c.W; x++ {
			cell := c.At(x, y)
			cell.Attr &^= views.Reverse
			out.Cells[i*c.W+x] = cell
		}
	}
	return out
}
