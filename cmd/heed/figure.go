package main

// Figures: heed render's PNG and SVG of the Map, the Trace, the Survey and
// Compare are plots drawn by package picture from the data the screens
// draw (views.MapData, views.TraceData, views.SurveyData), prepared here;
// Findings stays the screen's cells, without the cursor.

import (
	"cmp"
	"context"
	"fmt"
	"math"
	"path/filepath"
	"strings"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/internal/words"
	"github.com/heed-dev/heed/loader"
	"github.com/heed-dev/heed/picture"
	"github.com/heed-dev/heed/tui"
	"github.com/heed-dev/heed/views"
)

// figurePage is how many positions a Map or Trace figure shows when
// neither --from nor --to is given: enough to read every label at a
// slide's width.
const figurePage = 64

// span is a window of positions [lo, hi) of an axis of n positions.
type span struct{ lo, hi, n int }

func (s span) cut() bool { return s.lo > 0 || s.hi < s.n }

func (s span) String() string { return fmt.Sprintf("%d–%d of %d", s.lo, s.hi-1, s.n) }

// pageSpan returns the positions a figure shows on an axis of n positions:
// --from..--to (inclusive; either may be left out, -1) or, by default, the
// figurePage positions ending at cur (the location's query), all when n is
// at most figurePage.
func pageSpan(n, cur, from, to int) (span, error) {
	if from < 0 && to < 0 {
		if n <= figurePage {
			return span{0, n, n}, nil
		}
		hi := min(n, max(cur+1, figurePage))
		return span{hi - figurePage, hi, n}, nil
	}
	lo, hi := from, to+1
	switch {
	case from < 0:
		lo = max(0, hi-figurePage)
	case to < 0:
		hi = lo + figurePage
	}
	if lo >= n {
		return span{}, fmt.Errorf("render: --from %d: the axis has positions 0–%d", lo, n-1)
	}
	hi = min(hi, n)
	if hi <= lo {
		return span{}, fmt.Errorf("render: --to %d is before --from %d", to, lo)
	}
	if hi-lo > picture.MaxLabelled {
		return span{}, fmt.Errorf("render: --from %d --to %d is %d positions; a figure shows at most %d", lo, hi-1, hi-lo, picture.MaxLabelled)
	}
	return span{lo, hi, n}, nil
}

// pageNote says which positions a figure leaves out and how to page:
// names[i] names the axis of s[i].
func pageNote(names []string, s ...span) string {
	const how = " shown; --from/--to pick the positions"
	if len(s) == 2 && s[0] == s[1] && s[0].cut() {
		return names[0] + " and " + names[1] + " " + s[0].String() + how
	}
	var parts []string
	for i, sp := range s {
		if sp.cut() {
			parts = append(parts, names[i]+" "+sp.String())
		}
	}
	if len(parts) == 0 {
		return ""
	}
	return strings.Join(parts, " and ") + how
}

// figureEnv is what every figure needs: the open export, the location, the
// flags and the styles.
type figureEnv struct {
	ctx    context.Context
	m      *tui.Model // the TUI's model at the location: the data its screens show
	set    *loader.Set
	ex     *loader.Export
	blk    *loader.Block
	loc    words.Loc
	batch  int
	rf     *renderFlags
	st     views.Styles
	locStr string
}

func (e *figureEnv) sides() (q, k *loader.Side) {
	return e.ex.Side(e.blk.QuerySide), e.ex.Side(e.blk.KeySide)
}

// ruleNames names the mask rules the checks judge the block by ("causal +
// padding"), "" for none.
func (e *figureEnv) ruleNames() string {
	qs, ks := e.sides()
	rules, err := analysis.NewRules(e.blk, qs, ks, nil)
	if err != nil {
		return ""
	}
	var names []string
	for _, r := range rules.Active() {
		names = append(names, r.String())
	}
	return strings.Join(names, " + ")
}

// headWords is "layer 1 head 2" (and the batch item when there are several).
func (e *figureEnv) headWords() string {
	s := fmt.Sprintf("%s layer %d head %d", e.blk.Name, e.loc.Layer, e.loc.Head)
	if e.blk.Batch > 1 {
		s += fmt.Sprintf(", batch item %d", e.batch)
	}
	return s
}

// mapFigure draws the Map (or Compare's |A−B|, diff) of the location.
func (e *figureEnv) mapFigure(md *views.MapData, ruleNames string, what string, lines []string) (*picture.Figure, error) {
	b := e.blk
	qs, err := pageSpan(b.Queries, e.loc.Query, e.rf.from, e.rf.to)
	if err != nil {
		return nil, err
	}
	// keys follow the queries' window (the keys a causal query sees end at it)
	ks, err := pageSpan(b.Keys, min(qs.hi-1+b.QueryOffset, b.Keys-1), e.rf.from, e.rf.to)
	if err != nil {
		return nil, err
	}
	lines = append([]string{what}, lines...)
	if ruleNames != "" {
		lines = append(lines, "Mask rules: "+ruleNames+"; a cell they forbid that carries weight is drawn in the alarm colour.")
	}
	return picture.MapFigure(md, picture.MapFigureOptions{
		Title: e.locStr, Lines: lines, Note: pageNote([]string{"queries", "keys"}, qs, ks),
		Q0: qs.lo, Q1: qs.hi, K0: ks.lo, K1: ks.hi, CursorQ: e.loc.Query, CursorK: e.loc.Key,
		QueryAxis: "query (" + cmp.Or(b.QuerySide, "query") + " token, row)",
		KeyAxis:   "key (" + cmp.Or(b.KeySide, "key") + " token, position)",
		RuleName:  ruleNames, Styles: e.st,
	})
}

// figure draws a screen as a figure; res is the analysis result for the
// Survey (nil for the others).
func (e *figureEnv) figure(screen string, res *analysis.Result) (*picture.Figure, error) {
	switch screen {
	case "map":
		// the head as the Map shows it (one place: tui's Model.HeadData)
		md, err := e.m.HeadData(false)
		if err != nil {
			return nil, err
		}
		md.Measure = "attention weight"
		return e.mapFigure(md, e.ruleNames(), fmt.Sprintf("Attention weight of %s: each query row over the keys, scale 0 to the head's largest weight %s.",
			e.headWords(), views.FormatWeight(md.VMax)), nil)
	case "compare":
		md, err := e.m.HeadData(true)
		if err != nil {
			return nil, fmt.Errorf("render: %w", err)
		}
		md.Measure = "|A−B| of the attention weights"
		na, nb := filepath.Base(e.set.Examples[0][0]), filepath.Base(e.set.Examples[1][0])
		return e.mapFigure(md, e.ruleNames(), fmt.Sprintf("|A−B| of %s between A %s and B %s, scale 0 to the largest change %s.",
			e.headWords(), na, nb, views.FormatWeight(md.VMax)), nil)
	case "trace":
		td, err := e.traceData()
		if err != nil {
			return nil, err
		}
		cur := td.Query + e.blk.QueryOffset
		if td.Side != e.blk.QuerySide {
			cur = len(td.Tokens) - 1
		}
		sp, err := pageSpan(len(td.Tokens), cur, e.rf.from, e.rf.to)
		if err != nil {
			return nil, err
		}
		return picture.TraceFigure(td, picture.TraceFigureOptions{Title: e.locStr, From: sp.lo, To: sp.hi,
			Note: pageNote([]string{cmp.Or(td.Side, "input") + " tokens"}, sp), Styles: e.st})
	case "survey":
		sd := e.surveyData(res)
		return picture.SurveyFigure(sd, picture.SurveyFigureOptions{Title: e.locStr, Layer: e.loc.Layer, Head: e.loc.Head, Styles: e.st})
	}
	return nil, fmt.Errorf("render: no figure of the %s screen", screen)
}

// surveyData is the Survey's first statistic, the mean row entropy of
// every head (over every batch item), with the heads that carry forbidden
// mass marked, as the Survey screen opens.
func (e *figureEnv) surveyData(res *analysis.Result) *views.SurveyData {
	b := e.blk
	d := &views.SurveyData{Block: b.Name, Layers: b.Layers, Heads: b.Heads, Stat: "entropy", Unit: "nats",
		Hint: "mean row entropy; low = focused, high = spread", Values: make([]float64, b.Layers*b.Heads)}
	if b.Batch > 1 {
		d.Scope = fmt.Sprintf("all %d batch items", b.Batch)
	}
	var br *analysis.BlockResult
	if res != nil {
		br = res.Block(b.Name)
	}
	for i := range d.Values {
		d.Values[i] = math.NaN()
	}
	if br == nil {
		d.Note = "no statistics for this block"
		return d
	}
	d.Marks = make([]bool, len(d.Values))
	for i := range d.Values {
		d.Values[i] = br.Stats[i].Entropy
		d.Marks[i] = br.Stats[i].LeakCells > 0
	}
	return d
}

// traceData explains the location's query by every method, as the Trace
// screen shows it (tui's runTrace prepares the same views.TraceData).
func (e *figureEnv) traceData() (*views.TraceData, error) {
	b := e.blk
	q := e.loc.Query
	if l, err := words.ParseLoc(e.rf.at); err != nil || l.Query < 0 {
		// as the Trace screen chooses without statistics: the last real position
		q = -1
		qs, _ := e.sides()
		for p := b.Queries - 1; p >= 0; p-- {
			if qs.IsValid(e.batch, p+b.QueryOffset) {
				q = p
				break
			}
		}
		if q < 0 {
			return nil, fmt.Errorf("render: %s batch item %d has no real query position to trace", b.Name, e.batch)
		}
		e.loc.Query = q
	}
	// a trace explains a query, whatever the key
	e.loc.Key = -1
	e.locStr = e.loc.String()
	// the same data as the Trace screen shows (one place: tui.TraceData)
	return tui.TraceData(e.ctx, e.ex, b.Name, e.batch, q)
}
