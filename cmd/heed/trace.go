package main

import (
	"errors"
	"fmt"
	"io"
	"strconv"
	"strings"

	"github.com/heed-dev/heed/analysis/trace"
	"github.com/heed-dev/heed/internal/prose"
	"github.com/spf13/cobra"
)

// newTraceCmd returns "heed trace": the explanation of one output position.
func newTraceCmd() *cobra.Command {
	lf := &loadFlags{}
	var (
		asJSON  bool
		method  string
		block   string
		batch   int
		query   int
		example int
	)
	cmd := &cobra.Command{
		Use:   "trace FILE... --query Q",
		Short: "Explain one output position by the input tokens",
		Long: `trace propagates attention from query position Q back to the input tokens:
  rollout  attention rollout (Abnar & Zuidema 2020): shares sum to 1
  flow     attention flow (Abnar & Zuidema 2020), max-flow per input token:
           shares are flows in [0, 1], not normalised across tokens; limited
           to layers * n^3 <= ` + fmt.Sprint(trace.FlowLimit) + ` (n positions reachable from Q)
  grad     gradient-weighted relevance (Chefer, Gur & Wolf 2021): needs
           BLOCK/grad, the gradient of the loss at the traced position
For an encoder-decoder export the default block is the cross block: a target
position is explained by source tokens through cross-attention (rollout and
grad). Shares that are not normalised (flow, grad, rollout through
cross-attention) print with 4 significant digits and as a percentage of
their total: the grad relevance of a dL/dA exported for a whole loss is
tiny. An explanation is evidence to confirm by re-evaluating the model.`,
		Args: cobra.MinimumNArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			if !cmd.Flags().Changed("query") {
				return fmt.Errorf("--query Q is required")
			}
			switch trace.Method(method) {
			case trace.MethodRollout, trace.MethodFlow, trace.MethodGrad:
			default:
				return fmt.Errorf("--method %q: want rollout, flow or grad", method)
			}
			set, err := openSet(args, lf)
			if err != nil {
				return err
			}
			if example < 0 || example >= set.Len() {
				return fmt.Errorf("--example %d: the input has %d examples", example, set.Len())
			}
			ex, err := set.Open(example)
			if err != nil {
				return err
			}
			defer ex.Close()
			res, err := trace.Trace(cmd.Context(), ex, trace.Options{Method: trace.Method(method), Block: block, Batch: batch, Query: query})
			if err != nil {
				return traceAdvice(err)
			}
			res.Scale = prose.TraceScale(res)
			if asJSON {
				return writeJSON(cmd.OutOrStdout(), res)
			}
			writeTraceText(cmd.OutOrStdout(), res)
			return nil
		},
	}
	lf.register(cmd)
	f := cmd.Flags()
	f.BoolVar(&asJSON, "json", false, `print JSON {"block", "query", "method", "tokens": [{"index", "token", "share"}]} (docs/json.md)`)
	f.StringVar(&method, "method", "rollout", "rollout, flow or grad")
	f.StringVar(&block, "block", "", "block whose query is explained (default: cross if present, else the causal block)")
	f.IntVar(&batch, "batch", 0, "batch item")
	f.IntVar(&query, "query", 0, "query position to explain (row of the block)")
	f.IntVar(&example, "example", 0, "which example when several are given")
	return cmd
}

// traceAdvice adds to analysis's refusals of the flow method the --method
// to use instead (the Trace screen words them for its columns).
func traceAdvice(err error) error {
	var big *trace.FlowTooLargeError
	switch {
	case errors.Is(err, trace.ErrFlowCross):
		return fmt.Errorf("%w; through cross-attention use --method rollout or grad", err)
	case errors.As(err, &big):
		return fmt.Errorf("%w: use --method rollout", err)
	case errors.Is(err, trace.ErrNoGrad):
		return fmt.Errorf("%w: use --method rollout or flow, or export BLOCK/grad", err)
	}
	return err
}

func writeTraceText(w io.Writer, r *trace.Result) {
	var top, total float64
	width := 5
	for _, t := range r.Tokens {
		if t.Status == "" {
			top = max(top, t.Share)
			total += t.Share
		}
		width = max(width, len([]rune(t.Token)))
	}
	q := fmt.Sprintf("query %d", r.Query)
	if r.QueryToken != "" {
		q += fmt.Sprintf(" %q", r.QueryToken)
	}
	fmt.Fprintf(w, "heed trace: %s %s (batch %d) by %s tokens, method %s: %s\n", r.Block, q, r.Batch, r.Side, r.Method, r.Scale)
	fmt.Fprintf(w, "predicted: %s\n", predictedText(r.Predicted))
	// Unnormalised shares (grad relevance from an exported dL/dA of a whole
	// loss, flow, cross rollout) can be tiny or above 1: print them with
	// significant digits and as a percentage of their total; keys the query
	// may not see are marked, not given a bar.
	const bar = 40
	for _, t := range r.Tokens {
		n := 0
		if top > 0 && t.Share > 0 && t.Status == "" {
			n = int(t.Share/top*bar + 0.5)
		}
		tok := t.Token
		if tok == "" {
			tok = "-"
		}
		b := strings.Repeat("█", n)
		if t.Status != "" {
			b = "(" + t.Status + ": not seen)"
		}
		if r.Normalised {
			fmt.Fprintf(w, "%5d  %-*s  %-*s  %.4f\n", t.Index, width, tok, bar, b, t.Share)
			continue
		}
		pct := "-"
		if total > 0 && t.Status == "" {
			pct = fmt.Sprintf("%.1f%%", 100*t.Share/total)
		}
		fmt.Fprintf(w, "%5d  %-*s  %-*s  %10s  %6s\n", t.Index, width, tok, bar, b, strconv.FormatFloat(t.Share, 'g', 4, 64), pct)
	}
	fmt.Fprintf(w, "summary: %s.\n", prose.TraceSummary(r))
	fmt.Fprintln(w, prose.Caveat)
}

// predictedText says what the model predicted at the explained position.
func predictedText(p trace.Prediction) string {
	switch p.From {
	case "logits":
		tok := fmt.Sprintf("vocabulary index %d", p.ID)
		if p.Token != "" {
			tok = fmt.Sprintf("%q (index %d)", p.Token, p.ID)
		}
		return fmt.Sprintf("%s with probability %.3g (the exported logits)", tok, *p.Prob)
	case "next token":
		return fmt.Sprintf("%q, the next input token (no logits in the export: what the model was trained to predict there)", p.Token)
	}
	return "unknown (no logits and no next token in the export)"
}
