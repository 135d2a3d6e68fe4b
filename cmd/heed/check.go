package main

import (
	"context"
	"fmt"
	"github.com/heed-dev/heed/internal/prose"
	"github.com/heed-dev/heed/internal/words"
	"io"
	"math"
	"slices"
	"strings"
	"text/tabwriter"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/loader"
	"github.com/spf13/cobra"
)

// passFlags are the analysis options check and rank share.
type passFlags struct {
	rules    []string
	tol      float64
	sumTol   float64
	sumBelow bool
	noInfer  bool
	blocks   []string
	shard    shardFlags // --shard, --partial (shard.go)
	// noRedundancy: check prints no statistics, so it skips the pass over
	// head pairs and the row statistics (analysis.Options.NoStats).
	noRedundancy bool
}

func (pf *passFlags) register(cmd *cobra.Command, withRules bool) {
	f := cmd.Flags()
	if withRules {
		f.StringArrayVar(&pf.rules, "rule", nil, "run only this check (repeatable): causal, window, prefix, padding, segments, explicit, nan_rows, row_sum, negative, cut (give cut with the mask rules that say what is allowed)")
	}
	f.Float64Var(&pf.tol, "tol", analysis.DefaultTol, "a forbidden cell holding more than this mass is a leak")
	f.Float64Var(&pf.sumTol, "sum-tol", 0, "row-sum tolerance; 0 = by dtype (bf16 1e-2, f16 1e-3, f32 and f64 1e-5)")
	f.BoolVar(&pf.sumBelow, "sum-below", false, "rows may sum below 1 (models with learned sink logits)")
	f.StringArrayVar(&pf.blocks, "block", nil, "only this block (repeatable)")
	f.BoolVar(&pf.noInfer, "no-infer", false, "never infer a block's mask from its zeros: a block whose kind nobody gave is not judged (exit 3 from check)")
	pf.shard.register(cmd)
}

func (pf *passFlags) options() (analysis.Options, error) {
	opt := analysis.DefaultOptions()
	opt.Tol, opt.SumTol, opt.SumBelow, opt.Blocks = pf.tol, pf.sumTol, pf.sumBelow, pf.blocks
	opt.NoRedundancy, opt.NoStats = pf.noRedundancy, pf.noRedundancy
	opt.NoInfer = pf.noInfer
	if pf.tol < 0 || math.IsNaN(pf.tol) || pf.sumTol < 0 || math.IsNaN(pf.sumTol) {
		return opt, fmt.Errorf("--tol and --sum-tol must not be negative")
	}
	for _, r := range pf.rules {
		for _, name := range strings.Split(r, ",") {
			rule, err := analysis.ParseRule(name)
			if err != nil {
				return opt, fmt.Errorf("--rule: %w", err)
			}
			if rule == analysis.RuleInvariance {
				return opt, fmt.Errorf("--rule invariance: the causal-invariance check runs with --against B")
			}
			opt.Rules = append(opt.Rules, rule)
		}
	}
	return opt, nil
}

// runPass opens the examples and runs the analysis pass over all of them
// (without shard flags: one shard of one) or, with them, over one shard or
// the merge of partial files (shardFlags.runPass).
func runPass(ctx context.Context, args []string, lf *loadFlags, pf *passFlags) (*analysis.Partial, *loader.Set, error) {
	return pf.shard.runPass(ctx, args, lf, pf)
}

// newCheckCmd returns "heed check": every mask and row check; exit 0 clean,
// 1 findings, 2 bad input.
func newCheckCmd() *cobra.Command {
	lf := &loadFlags{}
	pf := &passFlags{noRedundancy: true}
	af := &againstFlags{}
	var asJSON bool
	cmd := &cobra.Command{
		Use:   "check FILE...",
		Short: "Check masks and rows: leaks, NaN rows, un-normalised rows; name the likely bug",
		Long: `check runs every mask rule that follows from each block's kind and metadata
(causal, sliding window, prefix, padding, packed-document segments, explicit
allow mask), every row check (NaN rows, rows not summing to 1, negative
values) and the cut check (an under-allowing mask: cross-attention rows, or
prefix rows of a prefix-LM, whose mass stops at k = q although later keys
are allowed) over all examples given, groups what it finds so that one bug is a
few findings, and names the likely bug with what to look at in the model
code. Its diagnoses are evidence to confirm by re-evaluating the model, not
verdicts.

With --against B it runs the causal-invariance check instead: A and B are
the same model on inputs that differ from position P on, and nothing before
P may change (see --against, --from and the README).

When nobody said a block's kind (no metadata, no --kind), check infers
its mask from where the exact zeros are (causal, sliding window, prefix, or
none) and says so; a block it cannot decide, or whose queries' positions
are unknown, is "not judged", never "clean".

Examples:
  heed check run.npz                          # metadata says the kinds
  heed check attn.npy --kind causal           # a bare array
  heed check attn.npy --axes "batch head query key"   # one layer saved alone
  heed check step.npz --query-start 17        # a decode step from a static cache
  heed check run.npz --compute-dtype bfloat16 # a bf16 model saved as float32
  heed check run.npz --json                   # verdict, coverage, findings

Exit status: 0 clean (every block judged, nothing found), 1 findings,
2 bad input, 3 not judged (nothing found, but some block's mask could not
be judged: the report names the flag or metadata key that would let heed
judge it).

"heed both" prints this report and heed rank's from one pass over the files.`,
		Args: cobra.MinimumNArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			if af.active(cmd) {
				return af.run(cmd, args, lf, pf.tol, asJSON)
			}
			return runReports(cmd, args, lf, pf, reportsWanted{check: true, json: asJSON})
		},
	}
	lf.register(cmd)
	pf.register(cmd, true)
	af.register(cmd)
	cmd.Flags().BoolVar(&asJSON, "json", false, "print JSON (see docs/json.md)")
	return cmd
}

// checkReport is the JSON of heed check (docs/json.md).
type checkReport struct {
	Verdict   string              `json:"verdict"`
	Clean     bool                `json:"clean"`
	Coverage  []analysis.Coverage `json:"coverage"`
	Examples  int64               `json:"examples"`
	Findings  []analysis.Finding  `json:"findings"`
	Diagnosis []prose.Diagnosis   `json:"diagnosis"`
	Rules     map[string][]string `json:"rules"`
	Notes     []string            `json:"notes"`
	Warnings  []string            `json:"warnings"`
	Caveat    string              `json:"caveat"`
}

// checkReportOf builds heed check's JSON report from the pass's result.
func checkReportOf(res *analysis.Result, warnings []string) *checkReport {
	coverage := slices.Clone(res.Coverage)
	for i := range coverage {
		c := &coverage[i]
		c.KindFrom, c.AxesFrom, c.Positions = givenBy("kind", c.KindFrom), givenBy("axes", c.AxesFrom), givenBy("query_start", c.Positions)
	}
	rep := &checkReport{Verdict: res.Verdict(), Clean: res.Verdict() == analysis.VerdictClean, Coverage: coverage, Examples: res.Examples, Findings: res.Findings, Diagnosis: prose.Diagnoses(res.Diagnoses),
		Rules: map[string][]string{}, Notes: prose.Notes(res.Notes), Warnings: warnings, Caveat: prose.Caveat}
	if rep.Findings == nil {
		rep.Findings = []analysis.Finding{}
	}
	if rep.Warnings == nil {
		rep.Warnings = []string{}
	}
	for _, b := range res.Blocks {
		rs := []string{}
		for _, r := range b.Rules {
			rs = append(rs, r.String())
		}
		rep.Rules[b.Name] = rs
	}
	return rep
}

// checkExit is heed check's exit for its result: nil (0) clean, a
// findingsError (1) or a notJudgedError (3).
func checkExit(res *analysis.Result) error {
	switch res.Verdict() {
	case analysis.VerdictFindings:
		return &findingsError{len(res.Findings)}
	case analysis.VerdictNotJudged:
		return &notJudgedError{len(notJudged(res))}
	}
	return nil
}

func rulesLine(res *analysis.Result) string {
	var parts []string
	for _, b := range res.Blocks {
		rs := make([]string, len(b.Rules))
		for i, r := range b.Rules {
			rs[i] = r.String()
		}
		if len(rs) == 0 {
			rs = []string{"row checks only"}
			if b.Kind == string(loader.KindUnknown) {
				rs[0] += " (kind unknown)"
			}
		}
		parts = append(parts, b.Name+": "+strings.Join(rs, ", "))
	}
	return strings.Join(parts, "; ")
}

// notJudged lists the gaps of every block that was not judged.
func notJudged(res *analysis.Result) []analysis.Gap {
	var out []analysis.Gap
	for _, c := range res.Coverage {
		out = append(out, c.NotJudged...)
	}
	return out
}

// coverageLines says, per block, how its kind and positions were known
// when heed had to infer or assume them (guessed axes are in the warnings),
// then what was not judged.
func coverageLines(w io.Writer, res *analysis.Result) {
	for _, c := range res.Coverage {
		if c.KindFrom == "inferred" {
			fmt.Fprintf(w, "inferred: %s: %s (say the kind with --kind or meta blocks.%s.kind to override)\n", c.Block, c.Evidence, c.Block)
		}
		if c.Positions == "offset" {
			fmt.Fprintf(w, "positions: %s: queries taken as the last of the keys (a KV-cache step); say otherwise with meta blocks.%s.query_start, %s/qpos or --query-start\n", c.Block, c.Block, c.Block)
		}
	}
	for _, g := range notJudged(res) {
		fmt.Fprintf(w, "not judged: %s: %s: %s. To judge it: %s\n", g.Block, g.What, g.Why, g.Fix)
	}
}

func writeCheckText(w io.Writer, res *analysis.Result, warnings []string) {
	ex := fmt.Sprintf("%d %s", res.Examples, words.Plural(int(res.Examples), "example", "examples"))
	switch res.Verdict() {
	case analysis.VerdictClean:
		fmt.Fprintf(w, "heed check: clean: no mask leaks, cut-off rows, NaN rows or un-normalised rows in %s.\n", ex)
		fmt.Fprintf(w, "rules checked: %s\n", rulesLine(res))
		coverageLines(w, res)
	case analysis.VerdictNotJudged:
		gaps := notJudged(res)
		var blocks []string
		for _, g := range gaps {
			if !slices.Contains(blocks, g.Block) {
				blocks = append(blocks, g.Block)
			}
		}
		fmt.Fprintf(w, "heed check: NOT JUDGED: %s %s could not be judged, so this is not a clean result; nothing was found in what was judged (%s).\n",
			words.Plural(len(blocks), "block", "blocks"), strings.Join(blocks, ", "), ex)
		fmt.Fprintf(w, "rules checked: %s\n", rulesLine(res))
		coverageLines(w, res)
	default:
		fmt.Fprintf(w, "heed check: %d %s (%d %s) in %s. %s\n\n", len(res.Diagnoses), words.Plural(len(res.Diagnoses), "likely bug", "likely bugs"),
			len(res.Findings), words.Plural(len(res.Findings), "finding", "findings"), ex, "These are evidence to confirm by re-evaluating the model, not verdicts.")
		for i, d := range prose.Diagnoses(res.Diagnoses) {
			text := strings.TrimSuffix(d.Text, " "+prose.Caveat)
			fmt.Fprintf(w, "%d. %s\n", i+1, text)
			at := d.At
			if d.Rule == analysis.RuleNaNRows {
				at.Key = -1 // a row, not a cell
			}
			loc := at.String()
			switch {
			case d.Rule == analysis.RuleCut:
				loc += " (this key and the allowed keys after it are exactly 0)"
			case at.Key >= 0:
				loc += fmt.Sprintf(" (weight %.3g)", d.At.Value)
			}
			if res.Examples > 1 && at.Example != "" {
				loc += " in " + at.Example // which file of the set
			}
			fmt.Fprintf(w, "   look at:  %s\n", loc)
			fmt.Fprintf(w, "   check:    %s\n", d.Check)
			for _, e := range d.Evidence {
				fmt.Fprintf(w, "   evidence: %s\n", e)
			}
			fmt.Fprintln(w)
		}
		fmt.Fprintln(w, "findings, worst first:")
		tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
		fmt.Fprintln(tw, "block\trule\tlayers\theads\tbatch\tmass\tcells\tmax\trows\toffsets\tworst")
		for _, f := range res.Findings {
			fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%s\t%.4g\t%d\t%.3g\t%d/%d\t%s\t%s\n", f.Block, f.Rule, words.Ranges(f.Layers, 0), words.Ranges(f.Heads, 0), words.Ranges(f.Batches, 0),
				f.Mass, f.Cells, f.Max, f.Rows, f.JudgedRows, offsetsShort(f.Offsets), f.Worst)
		}
		tw.Flush()
		fmt.Fprintf(w, "rules checked: %s\n", rulesLine(res))
		coverageLines(w, res)
	}
	for _, n := range prose.Notes(res.Notes) {
		fmt.Fprintf(w, "note: %s\n", n)
	}
	for _, n := range warnings {
		fmt.Fprintf(w, "warning: %s\n", n)
	}
}

func offsetsShort(os []analysis.OffsetCount) string {
	switch {
	case len(os) == 0:
		return "-"
	case len(os) <= 3:
		s := make([]string, len(os))
		for i, o := range os {
			s[i] = fmt.Sprintf("%+d:%d", o.Offset, o.Count)
		}
		return strings.Join(s, " ")
	}
	return fmt.Sprintf("%+d..%+d (%d)", os[0].Offset, os[len(os)-1].Offset, len(os))
}
