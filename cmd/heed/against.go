package main

import (
	"context"
	"errors"
	"fmt"
	"github.com/heed-dev/heed/internal/prose"
	"github.com/heed-dev/heed/internal/words"
	"io"
	"math"
	"strings"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/analysis/invariance"
	"github.com/heed-dev/heed/loader"
	"github.com/spf13/cobra"
)

// againstFlags are heed check's flags for the causal-invariance check:
// `heed check A --against B [--from P]`.
type againstFlags struct {
	against []string
	from    int
}

func (af *againstFlags) register(cmd *cobra.Command) {
	f := cmd.Flags()
	f.StringSliceVar(&af.against, "against", nil, "export B of the same model on inputs that agree with A's before P and differ from P on: check that nothing before P changed (causal invariance; needs BLOCK/out, logits or attention in both)")
	f.IntVar(&af.from, "from", -1, "with --against: the first changed position P (default: the first token that differs)")
}

// active reports whether the invariance check takes over the check command
// (--against or --from given).
func (af *againstFlags) active(cmd *cobra.Command) bool {
	return cmd.Flags().Changed("against") || cmd.Flags().Changed("from")
}

// run is what check's RunE calls when active: check's --tol, when given,
// becomes the invariance tolerance (otherwise it depends on the dtype).
func (af *againstFlags) run(cmd *cobra.Command, args []string, lf *loadFlags, tol float64, asJSON bool) error {
	if !cmd.Flags().Changed("tol") {
		tol = 0
	} else if tol == 0 {
		return fmt.Errorf("--tol 0 with --against: give a tolerance > 0, or leave --tol out for the dtype's")
	}
	o, err := lf.options()
	if err != nil {
		return err
	}
	return runAgainst(cmd.Context(), cmd.OutOrStdout(), args, af, o, tol, asJSON)
}

// runAgainst opens A (args) and B (--against), compares them with
// invariance.Check and prints the result as text or JSON to w. It
// returns a *findingsError when a position before P changed (exit 1) and
// any other error for input that cannot be compared (exit 2). tol > 0
// replaces the dtype's tolerance.
func runAgainst(ctx context.Context, w io.Writer, args []string, af *againstFlags, opt loader.Options, tol float64, asJSON bool) error {
	switch {
	case len(af.against) == 0:
		return fmt.Errorf("--from needs --against B (the second export to compare A with)")
	case len(args) == 0:
		return fmt.Errorf("--against needs the export A to compare: heed check A --against B")
	case af.from < -1:
		return fmt.Errorf("--from %d: want a position >= 0", af.from)
	case tol < 0 || math.IsNaN(tol) || math.IsInf(tol, 0):
		return fmt.Errorf("--tol %v: want a finite tolerance > 0", tol)
	}
	a, err := loader.Open(args, opt)
	if err != nil {
		return err
	}
	defer a.Close()
	b, err := loader.Open(af.against, opt)
	if err != nil {
		return err
	}
	defer b.Close()
	o := invariance.NewOptions()
	o.From = af.from
	o.Tol = tol
	res, err := invariance.Check(ctx, a, b, o)
	if errors.Is(err, invariance.ErrNeedFrom) {
		err = fmt.Errorf("%w with --from P", err)
	}
	if err != nil {
		return err
	}
	warnings := append(append([]string{}, a.Warnings...), b.Warnings...)
	if asJSON {
		if err := writeInvarianceJSON(w, res, warnings); err != nil {
			return err
		}
	} else {
		writeInvarianceText(w, res, strings.Join(args, " "), strings.Join(af.against, " "), warnings)
	}
	if !res.Clean() {
		return &findingsError{n: len(res.Findings)}
	}
	return nil
}

// invariancePartJSON summarises one invariance.Part per layer.
type invariancePartJSON struct {
	Block     string  `json:"block"`
	Kind      string  `json:"kind"`
	DType     string  `json:"dtype"`
	Tol       float64 `json:"tol"`
	Layers    int     `json:"layers"`
	Batch     int     `json:"batch"`
	Positions int     `json:"positions"`
	From      []int   `json:"from"`
	// FirstLayer per batch item, -1 when nothing before P changed.
	FirstLayer []int `json:"first_layer"`
	// MaxAbs and MaxRel per layer, over batch items and positions before P.
	MaxAbs []float64 `json:"max_abs"`
	MaxRel []float64 `json:"max_rel"`
	// Changed[layer][batch] are the positions before P that changed.
	Changed [][][]int `json:"changed"`
}

type invarianceDetailJSON struct {
	Side  string                `json:"side"`
	From  []int                 `json:"from"`
	Parts []invariancePartJSON  `json:"parts"`
	Heads []analysis.HeadChange `json:"heads"`
}

type invarianceJSON struct {
	Clean     bool                 `json:"clean"`
	Findings  []invariance.Finding `json:"findings"`
	Diagnosis []prose.Diagnosis    `json:"diagnosis"`
	Detail    invarianceDetailJSON `json:"invariance"`
	Notes     []string             `json:"notes"`
	Warnings  []string             `json:"warnings"`
	Caveat    string               `json:"caveat"`
}

// jsonNum keeps a number encodable: JSON has no infinity.
func jsonNum(x float64) float64 {
	if math.IsInf(x, 0) || math.IsNaN(x) {
		return math.MaxFloat64
	}
	return x
}

func partJSON(p *invariance.Part) invariancePartJSON {
	j := invariancePartJSON{Block: p.Block, Kind: string(p.Kind), DType: p.DType.String(), Tol: p.Tol,
		Layers: p.Layers, Batch: p.Batch, Positions: p.Positions, From: p.From,
		FirstLayer: make([]int, p.Batch), MaxAbs: make([]float64, p.Layers), MaxRel: make([]float64, p.Layers),
		Changed: make([][][]int, p.Layers)}
	for b := 0; b < p.Batch; b++ {
		j.FirstLayer[b] = p.FirstLayer(b)
	}
	for l := 0; l < p.Layers; l++ {
		j.Changed[l] = make([][]int, p.Batch)
		for b := 0; b < p.Batch; b++ {
			j.Changed[l][b] = p.Changed(l, b)
			if j.Changed[l][b] == nil {
				j.Changed[l][b] = []int{}
			}
			for pos := 0; pos < p.From[b]; pos++ {
				if p.Pad != nil && p.Pad[b][pos] {
					continue
				}
				j.MaxAbs[l] = math.Max(j.MaxAbs[l], jsonNum(p.Abs[l][b][pos]))
				j.MaxRel[l] = math.Max(j.MaxRel[l], jsonNum(p.Rel[l][b][pos]))
			}
		}
	}
	return j
}

func writeInvarianceJSON(w io.Writer, res *invariance.Result, warnings []string) error {
	out := invarianceJSON{Clean: res.Clean(), Findings: res.Findings, Diagnosis: prose.Diagnoses(res.Diagnoses),
		Detail: invarianceDetailJSON{Side: res.Side, From: res.From, Parts: []invariancePartJSON{}, Heads: res.Heads},
		Notes:  res.Notes, Warnings: warnings, Caveat: prose.Caveat}
	if out.Findings == nil {
		out.Findings = []invariance.Finding{}
	}
	if out.Detail.Heads == nil {
		out.Detail.Heads = []analysis.HeadChange{}
	}
	if out.Notes == nil {
		out.Notes = []string{}
	}
	if out.Warnings == nil {
		out.Warnings = []string{}
	}
	for i := range out.Detail.Heads {
		out.Detail.Heads[i].MaxAbs = jsonNum(out.Detail.Heads[i].MaxAbs)
		out.Detail.Heads[i].MaxRel = jsonNum(out.Detail.Heads[i].MaxRel)
	}
	for _, p := range res.Parts {
		out.Detail.Parts = append(out.Detail.Parts, partJSON(p))
	}
	return writeJSON(w, out)
}

func fromText(res *invariance.Result) string {
	same := true
	for _, f := range res.From {
		same = same && f == res.From[0]
	}
	if len(res.From) == 0 {
		return "P unknown"
	}
	if same {
		return fmt.Sprintf("P = %d", res.From[0])
	}
	parts := make([]string, len(res.From))
	for i, f := range res.From {
		parts[i] = fmt.Sprintf("%d for item %d", f, i)
	}
	return "P = " + strings.Join(parts, ", ")
}

func writeInvarianceText(w io.Writer, res *invariance.Result, nameA, nameB string, warnings []string) {
	where := "given by --from"
	if res.Side != "" {
		where = "the first differing token of tokens/" + res.Side
	}
	if res.Clean() {
		fmt.Fprintf(w, "heed check: causal invariance clean: nothing before P changed between %s and %s (%s, %s).\n", nameA, nameB, fromText(res), where)
	} else {
		fmt.Fprintf(w, "heed check: causal invariance: %d %s between %s and %s (%s, %s). %s\n", len(res.Findings), words.Plural(len(res.Findings), "finding", "findings"),
			nameA, nameB, fromText(res), where, "These are evidence to confirm by re-evaluating the model, not verdicts.")
	}
	for _, p := range res.Parts {
		j := partJSON(p)
		state := "agrees before P"
		for _, fl := range j.FirstLayer {
			if fl >= 0 {
				state = "CHANGED before P"
			}
		}
		fmt.Fprintf(w, "\n%s  %s, tolerance %.3g: %s\n", p.Block, p.DType, p.Tol, state)
		fmt.Fprintf(w, "  %-6s %-12s %-12s %s\n", "layer", "max |a-b|", "max rel", "changed before P")
		for l := 0; l < p.Layers; l++ {
			var ch []string
			for b := 0; b < p.Batch; b++ {
				if len(j.Changed[l][b]) > 0 {
					ch = append(ch, fmt.Sprintf("item %d: %s", b, words.Span(j.Changed[l][b], 2)))
				}
			}
			label := fmt.Sprint(l)
			if p.Block == "logits" {
				label = "-"
			}
			fmt.Fprintf(w, "  %-6s %-12.3g %-12.3g %s\n", label, j.MaxAbs[l], j.MaxRel[l], strings.Join(ch, "; "))
		}
	}
	if len(res.Heads) > 0 {
		fmt.Fprintf(w, "\nheads whose rows before P changed:\n")
		for _, h := range res.Heads {
			fmt.Fprintf(w, "  %s layer %d head %d item %d: rows %s (max |a-b| %.3g)\n", h.Block, h.Layer, h.Head, h.Batch, words.Span(h.Rows, 2), jsonNum(h.MaxAbs))
		}
	}
	for _, n := range res.Notes {
		fmt.Fprintf(w, "note: %s\n", n)
	}
	if len(res.Diagnoses) > 0 {
		fmt.Fprintln(w)
		for i, d := range prose.Diagnoses(res.Diagnoses) {
			fmt.Fprintf(w, "%d. %s\n", i+1, strings.TrimSuffix(d.Text, " "+prose.Caveat))
			fmt.Fprintf(w, "   look at:  %s\n", lookAt(d.At))
			if d.Check != "" {
				fmt.Fprintf(w, "   check:    %s\n", d.Check)
			}
			for _, e := range d.Evidence {
				fmt.Fprintf(w, "   evidence: %s\n", e)
			}
		}
	}
	for _, n := range warnings {
		fmt.Fprintf(w, "warning: %s\n", n)
	}
	if res.Clean() {
		fmt.Fprintf(w, "\nOne pair tests one change of the input: other inputs or lengths may still leak. %s\n", prose.Caveat)
	}
}

// lookAt is a LOC when the location has a head, else the layer output's
// coordinates in words (a LOC names a head).
func lookAt(l analysis.Location) string {
	if l.Head >= 0 {
		return l.String()
	}
	if l.Block == "logits" {
		return fmt.Sprintf("logits, batch item %d, position %d", l.Batch, l.Query)
	}
	return fmt.Sprintf("%s layer %d output, batch item %d, position %d", l.Block, l.Layer, l.Batch, l.Query)
}
