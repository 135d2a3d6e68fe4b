package tui

import (
	"context"
	"errors"
	"fmt"
	"github.com/heed-dev/heed/internal/words"
	"math"
	"strconv"
	"sync/atomic"
	"time"

	tea "charm.land/bubbletea/v2"
	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/analysis/trace"
	"github.com/heed-dev/heed/internal/prose"
	"github.com/heed-dev/heed/loader"
	"github.com/heed-dev/heed/views"
)

// Messages of the background work. Each job reports progress through a
// channel that a wait Cmd turns into messages, one at a time.

type progressMsg struct {
	job         string
	done, total int64
}

type analysisMsg struct {
	res *analysis.Result
	err error
}

type compareMsg struct {
	block int
	heads []views.HeadChange
	err   error
}

type traceKey struct{ block, batch, query int }

type traceMsg struct {
	key     traceKey
	data    *views.TraceData
	results map[trace.Method]error
}

// job is one background computation with its progress channel.
type job struct {
	name string
	prog chan progressMsg
	done chan tea.Msg
	ctx  context.Context
}

func newJob(ctx context.Context, name string) *job {
	return &job{name: name, prog: make(chan progressMsg, 1), done: make(chan tea.Msg, 1), ctx: ctx}
}

// report keeps only the latest progress value when the UI is behind.
func (j *job) report(done, total int64) {
	p := progressMsg{job: j.name, done: done, total: total}
	select {
	case <-j.prog:
	default:
	}
	select {
	case j.prog <- p:
	default:
	}
}

// wait returns the next progress or the final message; nil when canceled.
func (j *job) wait() tea.Cmd {
	return func() tea.Msg {
		select {
		case p := <-j.prog:
			return p
		case m := <-j.done:
			return m
		case <-j.ctx.Done():
			return nil
		}
	}
}

// runAnalysis computes statistics and checks over every example of the set.
func runAnalysis(j *job, set *loader.Set, opt analysis.Options) tea.Cmd {
	return func() tea.Msg {
		opt.Progress = j.report
		p, err := analysis.AnalyzeExamples(j.ctx, set, nil, opt)
		var msg analysisMsg
		if err != nil {
			msg.err = err
		} else {
			msg.res = p.Result()
			msg.res.WordGaps(words.WithOption)
		}
		j.done <- msg
		return nil
	}
}

// runCompare measures how much every head of one block differs between
// examples 0 and 1 of the set (batch item batch), with its own exports.
func runCompare(j *job, set *loader.Set, blockIdx int, blockName string, batch int) tea.Cmd {
	return func() tea.Msg {
		msg := compareMsg{block: blockIdx}
		msg.heads, msg.err = compareHeads(j, set, blockName, batch)
		j.done <- msg
		return nil
	}
}

func compareHeads(j *job, set *loader.Set, blockName string, batch int) ([]views.HeadChange, error) {
	a, err := set.Open(0)
	if err != nil {
		return nil, err
	}
	defer a.Close()
	b, err := set.Open(1)
	if err != nil {
		return nil, err
	}
	defer b.Close()
	ba, bb := a.Block(blockName), b.Block(blockName)
	if ba == nil || bb == nil {
		return nil, errors.New("block " + blockName + " missing")
	}
	hs, err := analysis.CompareBlocks(j.ctx, ba, bb, batch, j.report)
	if err != nil {
		return nil, err
	}
	out := make([]views.HeadChange, len(hs))
	for i, h := range hs {
		out[i] = views.HeadChange{Layer: h.Layer, Head: h.Head, TV: h.TV, MaxAbs: h.MaxAbs, Q: h.Q, K: h.K}
	}
	return out, nil
}

// traceMethods are the methods the Trace screen shows, in column order.
var traceMethods = []trace.Method{trace.MethodRollout, trace.MethodFlow, trace.MethodGrad}

// traceNote words a method's error for the Trace screen, which shows every
// method side by side: where analysis refuses attention flow (heed trace
// suggests another --method) it points to the other columns.
func traceNote(err error) string {
	var big *trace.FlowTooLargeError
	switch {
	case errors.Is(err, trace.ErrFlowCross):
		return "defined for self-attention stacks only; see the rollout and grad columns"
	case errors.As(err, &big):
		return fmt.Sprintf("too large here (layers*n^3 = %d > %d); see the rollout column", big.Work, trace.FlowLimit)
	}
	return err.Error()
}

// runTrace explains one query position with every method, with its own export.
func runTrace(ctx context.Context, set *loader.Set, k traceKey, blockName string) tea.Cmd {
	return func() tea.Msg {
		msg := traceMsg{key: k, results: map[trace.Method]error{}}
		ex, err := set.Open(0)
		if err != nil {
			msg.data = &views.TraceData{Block: blockName, Query: k.query, Note: err.Error()}
			return msg
		}
		defer ex.Close()
		td, err := TraceData(ctx, ex, blockName, k.batch, k.query)
		if err != nil {
			return nil // cancelled
		}
		msg.data = td
		return msg
	}
}

// TraceData explains query q of block blockName (batch item batch) with
// every method the Trace screen shows, as the screen's input: the one
// place that turns trace.Trace's results into views.TraceData (heed
// render's trace figure uses it too). A method that cannot explain the
// query gets a note; err is only the context's.
func TraceData(ctx context.Context, ex *loader.Export, blockName string, batch, q int) (*views.TraceData, error) {
	td := &views.TraceData{Block: blockName, Query: q}
	blk := ex.Block(blockName)
	if blk == nil {
		td.Note = "no block " + blockName
		return td, nil
	}
	if qt := ex.Side(blk.QuerySide); qt != nil {
		td.QueryToken = qt.Token(batch, q+blk.QueryOffset)
	}
	for _, m := range traceMethods {
		tm := views.TraceMethod{Name: string(m)}
		if m == trace.MethodGrad && !blk.HasGrad {
			tm.Note = "needs " + blockName + "/grad in the export"
			td.Methods = append(td.Methods, tm)
			continue
		}
		res, err := trace.Trace(ctx, ex, trace.Options{Method: m, Block: blockName, Batch: batch, Query: q})
		if err != nil {
			if ctx.Err() != nil {
				return nil, ctx.Err()
			}
			tm.Note = traceNote(err)
			td.Methods = append(td.Methods, tm)
			continue
		}
		if td.Tokens == nil {
			td.Side = res.Side
			td.Predicted = predictedWords(res.Predicted)
			td.Summary = prose.TraceSummary(res)
			n := 0
			for _, t := range res.Tokens {
				n = max(n, t.Index+1)
			}
			td.Tokens = make([]string, n)
			for i := range td.Tokens {
				td.Tokens[i] = "#" + strconv.Itoa(i)
			}
			for _, t := range res.Tokens {
				if t.Token != "" {
					td.Tokens[t.Index] = t.Token
				}
				if t.Status != "" {
					if td.Status == nil {
						td.Status = make([]string, n)
					}
					td.Status[t.Index] = t.Status
				}
			}
		}
		tm.Shares = make([]float64, len(td.Tokens))
		for i := range tm.Shares {
			tm.Shares[i] = math.NaN()
		}
		for _, t := range res.Tokens {
			if t.Index >= 0 && t.Index < len(tm.Shares) {
				tm.Shares[t.Index] = t.Share
			}
		}
		// unnormalised shares (flow, grad, rollout through
		// cross-attention) show as % of their total (views.TraceMethod)
		tm.Normalised = res.Normalised
		if tm.Note == "" && res.LessIdentity {
			tm.Note = "relevance the layers add (R less its identity start)"
		}
		td.Methods = append(td.Methods, tm)
	}
	if td.Tokens == nil && td.Note == "" {
		td.Note = "no method could explain this query"
	}
	return td, nil
}

// predictedWords says what the model predicted at the traced position.
func predictedWords(p trace.Prediction) string {
	switch p.From {
	case "logits":
		tok := fmt.Sprintf("index %d", p.ID)
		if p.Token != "" {
			tok = strconv.Quote(p.Token)
		}
		return fmt.Sprintf("%s, p %.3g (logits)", tok, *p.Prob)
	case "next token":
		return strconv.Quote(p.Token) + " (the next input token; no logits exported)"
	}
	return "not known (no logits exported, and no input token after this one)"
}

// holdFor is how long the background statistics stand still after a key or
// a mouse event: long enough for the model to draw the new frame and the
// terminal to show it, short enough that they go on as soon as the user
// stops to look.
const holdFor = 150 * time.Millisecond

// hold lets the UI hold the background statistics (analysis.Options.Yield)
// while it answers the user: on a small machine the pass and the frame
// compete for the processors and the memory (a lower priority for the
// pass did not keep a head switch under 50 ms on two processors), and a key
// should not wait for statistics.
type hold struct {
	until atomic.Int64 // Unix nanoseconds before which the pass waits
}

// push holds the pass for holdFor from now.
func (h *hold) push() {
	if h != nil {
		h.until.Store(time.Now().Add(holdFor).UnixNano())
	}
}

// wait returns when the hold has passed or ctx is done.
func (h *hold) wait(ctx context.Context) {
	for {
		d := time.Until(time.Unix(0, h.until.Load()))
		if d <= 0 || ctx.Err() != nil {
			return
		}
		time.Sleep(min(d, 10*time.Millisecond))
	}
}
