package main

import (
	"encoding/csv"
	"encoding/json"
	"fmt"
	"github.com/heed-dev/heed/internal/words"
	"io"
	"math"
	"sort"
	"strconv"
	"strings"
	"text/tabwriter"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/analysis/plan"
	"github.com/spf13/cobra"
)

// rankColumns are the per-head columns of heed rank, in output order; the
// JSON field names are the same (docs/json.md).
var rankColumns = []string{"block", "layer", "head", "entropy", "entropy_norm", "confidence", "prev_share", "self_share",
	"distance", "sink", "doc_sink", "distinctness", "importance", "importance_norm", analysis.ScoreName, "leak_mass", "rows", "nan_rows"}

// renamedColumns are the names --sort still takes for one version, and the
// JSON fields still written beside the new ones (docs/json.md).
var renamedColumns = map[string]string{"redundancy": "distinctness", "confidence_x_js": analysis.ScoreName}

// rankHead is one head's row of heed rank; nil = not defined (no gradients, no rows).
type rankHead struct {
	Block          string   `json:"block"`
	Layer          int      `json:"layer"`
	Head           int      `json:"head"`
	Entropy        *float64 `json:"entropy"`
	EntropyNorm    *float64 `json:"entropy_norm"`
	Confidence     *float64 `json:"confidence"`
	PrevShare      *float64 `json:"prev_share"`
	SelfShare      *float64 `json:"self_share"`
	Distance       *float64 `json:"distance"`
	Sink           *float64 `json:"sink"`
	DocSink        *float64 `json:"doc_sink"`
	Distinctness   *float64 `json:"distinctness"`
	Importance     *float64 `json:"importance"`
	ImportanceNorm *float64 `json:"importance_norm"`
	Score          *float64 `json:"keep_score"`
	LeakMass       *float64 `json:"leak_mass"`
	Rows           int64    `json:"rows"`
	NaNRows        int64    `json:"nan_rows"`
	// the names of distinctness and keep_score before December 2026,
	// written for one more version (renamedColumns)
	OldRedundancy *float64 `json:"redundancy"`
	OldScore      *float64 `json:"confidence_x_js"`
}

func num(x float64) *float64 {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return nil
	}
	return &x
}

func (r *rankHead) value(col string) (float64, bool) {
	var p *float64
	switch col {
	case "layer":
		return float64(r.Layer), true
	case "head":
		return float64(r.Head), true
	case "rows":
		return float64(r.Rows), true
	case "nan_rows":
		return float64(r.NaNRows), true
	case "entropy":
		p = r.Entropy
	case "entropy_norm":
		p = r.EntropyNorm
	case "confidence":
		p = r.Confidence
	case "prev_share":
		p = r.PrevShare
	case "self_share":
		p = r.SelfShare
	case "distance":
		p = r.Distance
	case "sink":
		p = r.Sink
	case "doc_sink":
		p = r.DocSink
	case "distinctness":
		p = r.Distinctness
	case "importance":
		p = r.Importance
	case "importance_norm":
		p = r.ImportanceNorm
	case analysis.ScoreName:
		p = r.Score
	case "leak_mass":
		p = r.LeakMass
	}
	if p == nil {
		return math.NaN(), false
	}
	return *p, true
}

func (r *rankHead) cell(col string) string {
	switch col {
	case "block":
		return r.Block
	case "layer", "head", "rows", "nan_rows":
		v, _ := r.value(col)
		return strconv.Itoa(int(v))
	}
	v, ok := r.value(col)
	if !ok {
		return ""
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
	f.StringVar(&rf.sortCol, "sort", "", "sort heads by this column, ascending (prefix - for descending): "+strings.Join(rankColumns[1:], ", "))
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
	if c := strings.TrimPrefix(rf.sortCol, "-"); renamedColumns[c] != "" {
		rf.sortCol = strings.TrimSuffix(rf.sortCol, c) + renamedColumns[c]
	}
	if rf.sortCol != "" && !validColumn(strings.TrimPrefix(rf.sortCol, "-")) {
		return fmt.Errorf("--sort %q: want one of %s (prefix - for descending)", rf.sortCol, strings.Join(rankColumns, ", "))
	}
	return nil
}

// report builds heed rank's report from the pass's result.
func (rf *rankFlags) report(res *analysis.Result, warnings []string, blocks []string) (*rankReport, error) {
	rep := &rankReport{Examples: res.Examples, Score: rankScore{analysis.ScoreName, analysis.ScoreDoc},
		Warnings: append([]string{}, warnings...), Caveat: analysis.Caveat}
	grad := true
	for _, b := range res.Blocks {
		grad = grad && b.HasGrad
		for _, hs := range b.Stats {
			rep.Heads = append(rep.Heads, rankHead{Block: b.Name, Layer: hs.Layer, Head: hs.Head,
				Entropy: num(hs.Entropy), EntropyNorm: num(hs.EntropyNorm), Confidence: num(hs.Confidence),
				PrevShare: num(hs.PrevShare), SelfShare: num(hs.SelfShare), Distance: num(hs.Distance),
				Sink: num(hs.Sink), DocSink: num(hs.DocSink), Distinctness: num(hs.Distinctness), OldRedundancy: num(hs.Distinctness),
				Importance: num(hs.Importance), ImportanceNorm: num(hs.ImportanceNorm), Score: num(hs.Score), OldScore: num(hs.Score),
				LeakMass: num(hs.LeakMass), Rows: hs.Rows, NaNRows: hs.NaNRows})
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

func validColumn(c string) bool {
	for _, x := range rankColumns {
		if x == c {
			return true
		}
	}
	return false
}

// sortHeads sorts by a column (ascending, "-col" descending); heads without
// a value go last; ties keep block, layer, head order.
func sortHeads(hs []rankHead, col string) {
	if col == "" || col == "block" {
		return
	}
	desc := strings.HasPrefix(col, "-")
	col = strings.TrimPrefix(col, "-")
	sort.SliceStable(hs, func(i, j int) bool {
		a, aok := hs[i].value(col)
		b, bok := hs[j].value(col)
		if aok != bok {
			return aok
		}
		if desc {
			return a > b
		}
		return a < b
	})
}

func writeRankCSV(w io.Writer, hs []rankHead) error {
	cw := csv.NewWriter(w)
	if err := cw.Write(rankColumns); err != nil {
		return err
	}
	for i := range hs {
		row := make([]string, len(rankColumns))
		for j, c := range rankColumns {
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
	cols := []string{"block", "layer", "head", "entropy", "entropy_norm", "confidence", "prev_share", "self_share", "distance", "sink", "distinctness"}
	if rep.Metric == "importance" {
		cols = append(cols, "importance", "importance_norm")
	} else {
		cols = append(cols, analysis.ScoreName)
	}
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
	fmt.Fprintln(w, analysis.Caveat)
}
