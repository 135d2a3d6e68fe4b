package main

import (
	"encoding/csv"
	"encoding/json"
	"fmt"
	"github.com/heed-dev/heed/internal/prose"
	"github.com/heed-dev/heed/internal/words"
	"io"
	"math"
	"slices"
	"strconv"
	"strings"
	"text/tabwriter"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/analysis/plan"
	"github.com/spf13/cobra"
)

// The columns of heed rank (JSON fields, CSV header, text table, --sort
// keys) come from the table of statistics (analysis.Statistics,
// analysis/statistic.go): a statistic added there shows up here by itself.

// rankColumns returns the per-head columns of heed rank, in output order.
func rankColumns() []string { return analysis.HeadColumns() }

// rankHead is one head's row of heed rank: its place, and the value of
// every statistic of stats (NaN = not defined: no gradients, no rows).
type rankHead struct {
	Block       string
	Layer, Head int
	stats       []analysis.Statistic
	vals        []float64
}

func newRankHead(stats []analysis.Statistic, block string, hs *analysis.HeadStats) rankHead {
	r := rankHead{Block: block, Layer: hs.Layer, Head: hs.Head, stats: stats, vals: make([]float64, len(stats))}
	for i := range stats {
		r.vals[i] = stats[i].Value(&hs.Stats, hs)
	}
	return r
}

// MarshalJSON writes the head's fields in column order, then the aliases
// (former names) of the statistics that have them; undefined values are null.
func (r rankHead) MarshalJSON() ([]byte, error) {
	b := []byte("{")
	field := func(name string, v any) error {
		if len(b) > 1 {
			b = append(b, ',')
		}
		k, err := json.Marshal(name)
		if err != nil {
			return err
		}
		x, err := json.Marshal(v)
		b = append(append(append(b, k...), ':'), x...)
		return err
	}
	value := func(i int) any {
		switch v := r.vals[i]; {
		case r.stats[i].Count:
			return int64(v)
		case math.IsNaN(v) || math.IsInf(v, 0):
			return nil
		default:
			return v
		}
	}
	for _, f := range []struct {
		name string
		v    any
	}{{"block", r.Block}, {"layer", r.Layer}, {"head", r.Head}} {
		if err := field(f.name, f.v); err != nil {
			return nil, err
		}
	}
	for i := range r.stats {
		if err := field(r.stats[i].Name, value(i)); err != nil {
			return nil, err
		}
	}
	for i := range r.stats {
		for _, a := range r.stats[i].Aliases {
			if err := field(a, value(i)); err != nil {
				return nil, err
			}
		}
	}
	return append(b, '}'), nil
}

// column returns the statistic named col (a name or an alias) among stats, or -1.
func column(stats []analysis.Statistic, col string) int {
	for i := range stats {
		if stats[i].Name == col || slices.Contains(stats[i].Aliases, col) {
			return i
		}
	}
	return -1
}

func (r *rankHead) value(col string) (float64, bool) {
	switch col {
	case "layer":
		return float64(r.Layer), true
	case "head":
		return float64(r.Head), true
	}
	i := column(r.stats, col)
	if i < 0 || math.IsNaN(r.vals[i]) || math.IsInf(r.vals[i], 0) {
		return math.NaN(), false
	}
	return r.vals[i], true
}

// count reports whether col is printed as an integer.
func (r *rankHead) count(col string) bool {
	if col == "layer" || col == "head" {
		return true
	}
	i := column(r.stats, col)
	return i >= 0 && r.stats[i].Count
}

func (r *rankHead) cell(col string) string {
	if col == "block" {
		return r.Block
	}
	v, ok := r.value(col)
	switch {
	case !ok:
		return ""
	case r.count(col):
		return strconv.Itoa(int(v))
	}
	return strconv.FormatFloat(v, 'g', 6, 64)
}

// rankReport is the JSON of heed rank (docs/json.md).
type rankReport struct {
	Examples int64      `json:"examples"`
	Metric   string     `json:"metric"`
	Score    rankScore  `json:"score"`
	Heads    []rankHead `json:"heads"`
	Plan     *plan.Plan `json:"plan,omitempty"`
	Warnings []string   `json:"warnings"`
	Caveat   string     `json:"caveat"`
}

type rankScore struct {
	Name string `json:"name"`
	Doc  string `json:"doc"`
}

// newRankCmd returns "heed rank": per-head statistics, importance and a pruning plan.
func newRankCmd() *cobra.Command {
	lf := &loadFlags{}
	pf := &passFlags{}
	rf := &rankFlags{}
	var asJSON bool
	cmd := &cobra.Command{
		Use:   "rank FILE...",
		Short: "Rank heads: statistics, importance, a pruning plan",
		Long: `rank prints every head's statistics aggregated over all examples given (each
batch item of each file is one example): entropy, normalised entropy,
confidence, positional shares, mean distance, sink mass, distinctness (mean
Jensen-Shannon divergence to the layer's other heads: low = a duplicate) and, when the export has
gradients (BLOCK/grad), Michel et al. (2019)'s head importance. Without
gradients there is no importance; the heuristic score ` + analysis.ScoreName + `
orders heads instead.

--prune N or --prune-frac F adds a plan {block: {layer: [heads]}}: lowest first
model-wide, never every head of a layer, whole KV groups when kv_heads is set.
A plan is a hypothesis to confirm by re-evaluating the model, and masking a
head saves no compute until the model is rebuilt without it.

"heed both" prints this report and heed check's from one pass over the files.`,
		Args: cobra.MinimumNArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runReports(cmd, args, lf, pf, reportsWanted{rank: rf, json: asJSON})
		},
	}
	lf.register(cmd)
	pf.register(cmd, false)
	cmd.Flags().BoolVar(&asJSON, "json", false, "print JSON (see docs/json.md)")
	rf.register(cmd, true)
	return cmd
}

// rankFlags are the flags of the head report (heed rank, heed both).
type rankFlags struct {
	cmd       *cobra.Command
	asCSV     bool
	sortCol   string
	prune     int
	pruneFrac float64
}

func (rf *rankFlags) register(cmd *cobra.Command, csv bool) {
	rf.cmd = cmd
	f := cmd.Flags()
	if csv {
		f.BoolVar(&rf.asCSV, "csv", false, "print the head table as CSV")
	}
	f.StringVar(&rf.sortCol, "sort", "", "sort heads by this column, ascending (prefix - for descending): "+strings.Join(rankColumns()[1:], ", "))
	f.IntVar(&rf.prune, "prune", -1, "plan pruning N heads")
	f.Float64Var(&rf.pruneFrac, "prune-frac", 0, "plan pruning this fraction of all heads (e.g. 0.2)")
}

// validate refuses flags that cannot be meant, before anything is read.
func (rf *rankFlags) validate(asJSON bool) error {
	f := rf.cmd.Flags()
	if asJSON && rf.asCSV {
		return fmt.Errorf("--json and --csv exclude each other")
	}
	if f.Changed("prune") && f.Changed("prune-frac") {
		return fmt.Errorf("--prune and --prune-frac exclude each other")
	}
	if rf.prune < -1 || (f.Changed("prune-frac") && (rf.pruneFrac < 0 || rf.pruneFrac > 1)) {
		return fmt.Errorf("--prune must be >= 0 and --prune-frac in [0, 1]")
	}
	stats := analysis.Statistics()
	if c := strings.TrimPrefix(rf.sortCol, "-"); c != "" {
		if i := column(stats, c); i >= 0 && stats[i].Name != c { // a former name
			rf.sortCol = strings.TrimSuffix(rf.sortCol, c) + stats[i].Name
		}
	}
	if rf.sortCol != "" && !slices.Contains(rankColumns(), strings.TrimPrefix(rf.sortCol, "-")) {
		return fmt.Errorf("--sort %q: want one of %s (prefix - for descending)", rf.sortCol, strings.Join(rankColumns(), ", "))
	}
	return nil
}

// report builds heed rank's report from the pass's result.
func (rf *rankFlags) report(res *analysis.Result, warnings []string, blocks []string) (*rankReport, error) {
	rep := &rankReport{Examples: res.Examples, Score: rankScore{analysis.ScoreName, analysis.ScoreDoc},
		Warnings: append([]string{}, warnings...), Caveat: prose.Caveat}
	grad := true
	stats := analysis.Statistics()
	for _, b := range res.Blocks {
		grad = grad && b.HasGrad
		for i := range b.Stats {
			rep.Heads = append(rep.Heads, newRankHead(stats, b.Name, &b.Stats[i]))
		}
	}
	rep.Metric = "importance"
	if !grad {
		rep.Metric = analysis.ScoreName
		rep.Warnings = append(rep.Warnings, noGradients+": no importance; "+analysis.ScoreDoc)
	}
	for _, c := range res.Coverage {
		if c.KindFrom == "inferred" {
			rep.Warnings = append(rep.Warnings, fmt.Sprintf("%s: kind inferred from the data (%s); masked keys and leak mass follow it (--kind or meta blocks.%s.kind to say otherwise)", c.Block, c.Evidence, c.Block))
		}
		for _, g := range c.NotJudged {
			rep.Warnings = append(rep.Warnings, fmt.Sprintf("%s: %s not judged: %s. To judge it: %s", g.Block, g.What, g.Why, g.Fix))
		}
	}
	if !res.Clean() {
		rep.Warnings = append(rep.Warnings, fmt.Sprintf("heed check finds %d problems in these exports (leaks or bad rows): statistics of a buggy export describe the bug too; run heed check", len(res.Findings)))
	}
	if f := rf.cmd.Flags(); f.Changed("prune") || f.Changed("prune-frac") {
		n := rf.prune
		if f.Changed("prune-frac") {
			n = -1
		}
		p, err := plan.Make(res, plan.Options{Heads: n, Frac: rf.pruneFrac, Blocks: blocks})
		if err != nil {
			return nil, err
		}
		rep.Plan = p
	}
	sortHeads(rep.Heads, rf.sortCol)
	if rep.Heads == nil {
		rep.Heads = []rankHead{}
	}
	return rep, nil
}

// noGradients starts the warning heed rank gives without gradients; a
// pruning plan made without them starts its own warning the same way.
const noGradients = "no gradients in the export"

// sortHeads sorts by a column (ascending, "-col" descending; the order of
// analysis.Order): heads without a value go last; ties keep block, layer,
// head order.
func sortHeads(hs []rankHead, col string) {
	if col == "" || col == "block" {
		return
	}
	desc := strings.HasPrefix(col, "-")
	col = strings.TrimPrefix(col, "-")
	vals := make([]float64, len(hs))
	for i := range hs {
		vals[i], _ = hs[i].value(col) // NaN when the head has none
	}
	sorted := make([]rankHead, len(hs))
	for i, j := range analysis.Order(vals, desc) {
		sorted[i] = hs[j]
	}
	copy(hs, sorted)
}

func writeRankCSV(w io.Writer, hs []rankHead) error {
	cw := csv.NewWriter(w)
	cols := rankColumns()
	if err := cw.Write(cols); err != nil {
		return err
	}
	for i := range hs {
		row := make([]string, len(cols))
		for j, c := range cols {
			row[j] = hs[i].cell(c)
		}
		if err := cw.Write(row); err != nil {
			return err
		}
	}
	cw.Flush()
	return cw.Error()
}

func writeRankText(w io.Writer, rep *rankReport) {
	cols := analysis.TextColumns(rep.Metric == "importance")
	fmt.Fprintf(w, "heed rank: %d heads over %d %s; ordering metric %s\n", len(rep.Heads), rep.Examples, words.Plural(int(rep.Examples), "example", "examples"), rep.Metric)
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, strings.Join(cols, "\t")+"\t")
	for i := range rep.Heads {
		row := make([]string, len(cols))
		for j, c := range cols {
			row[j] = rep.Heads[i].cell(c)
			if v, ok := rep.Heads[i].value(c); ok && c != "layer" && c != "head" {
				row[j] = strconv.FormatFloat(v, 'f', 3, 64)
			} else if row[j] == "" {
				row[j] = "-"
			}
		}
		fmt.Fprintln(tw, strings.Join(row, "\t")+"\t")
	}
	tw.Flush()
	planNoGrad := false // the plan's warnings already say there are no gradients
	if p := rep.Plan; p != nil {
		js, _ := json.Marshal(p.Heads)
		fmt.Fprintf(w, "\npruning plan (%d of %d heads, lowest %s first):\n%s\n", p.Pruned, p.Total, p.Metric, js)
		fmt.Fprintln(w, "cumulative "+p.Metric+" removed:")
		for _, pt := range p.Curve {
			mark := " "
			if pt.Heads <= p.Pruned {
				mark = "*"
			}
			fmt.Fprintf(w, " %s %3d heads  %6.1f%%  (%s layer %d heads %s)\n", mark, pt.Heads, 100*pt.RemovedFrac, pt.Block, pt.Layer, words.Ranges(pt.Unit, 0))
		}
		for _, x := range p.Warnings {
			fmt.Fprintf(w, "warning: %s\n", x)
			planNoGrad = planNoGrad || strings.HasPrefix(x, noGradients)
		}
	}
	for _, x := range rep.Warnings {
		if planNoGrad && strings.HasPrefix(x, noGradients) {
			continue // said once, under the plan
		}
		fmt.Fprintf(w, "warning: %s\n", x)
	}
	fmt.Fprintln(w, prose.Caveat)
}
