package main

import (
	"encoding/json"
	"fmt"
	"github.com/heed-dev/heed/internal/words"
	"io"

	"github.com/spf13/cobra"
)

// reportsWanted says which reports one pass over the files prints: heed
// check's, heed rank's (rank not nil) or both (heed both).
type reportsWanted struct {
	check bool
	rank  *rankFlags
	json  bool
}

// bothReport is the JSON of heed both (docs/json.md): heed check's and heed
// rank's reports, each exactly what that command prints with --json.
type bothReport struct {
	Check *checkReport `json:"check"`
	Rank  *rankReport  `json:"rank"`
}

// runReports is what heed check, heed rank and heed both run: one pass over
// the files (or the merge of partials, or one shard's partial), then the
// reports asked for, built from the same result. The exit is check's when
// its report is printed (0 clean, 1 findings, 3 not judged), else 0.
func runReports(cmd *cobra.Command, args []string, lf *loadFlags, pf *passFlags, want reportsWanted) error {
	if want.rank != nil {
		if err := want.rank.validate(want.json); err != nil {
			return err
		}
	}
	p, set, err := runPass(cmd.Context(), args, lf, pf)
	if err != nil {
		return err
	}
	if pf.shard.wrotePartial() {
		return nil
	}
	res := p.Result()
	res.WordGaps(words.WithOption)
	var both bothReport
	if want.rank != nil {
		if both.Rank, err = want.rank.report(res, set.Warnings, pf.blocks); err != nil {
			return err
		}
	}
	if want.check {
		both.Check = checkReportOf(res, set.Warnings)
	}
	out := cmd.OutOrStdout()
	switch {
	case want.json && both.Check != nil && both.Rank != nil:
		err = writeJSON(out, &both)
	case want.json && both.Check != nil:
		err = writeJSON(out, both.Check)
	case want.json:
		err = writeJSON(out, both.Rank)
	case both.Rank != nil && want.rank.asCSV:
		err = writeRankCSV(out, both.Rank.Heads)
	default:
		if want.check {
			writeCheckText(out, res, set.Warnings)
		}
		if both.Check != nil && both.Rank != nil {
			fmt.Fprintln(out)
		}
		if both.Rank != nil {
			writeRankText(out, both.Rank)
		}
	}
	if err != nil || !want.check {
		return err
	}
	return checkExit(res)
}

// writeJSON writes v as indented JSON, as every --json of heed does.
func writeJSON(w io.Writer, v any) error {
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(v)
}

// newBothCmd returns "heed both": heed check and heed rank from one pass.
func newBothCmd() *cobra.Command {
	lf := &loadFlags{}
	pf := &passFlags{}
	rf := &rankFlags{}
	var asJSON bool
	cmd := &cobra.Command{
		Use:   "both FILE...",
		Short: "Check and rank in one pass over the files: both reports, check's exit status",
		Long: `both runs every check of "heed check" and every statistic of "heed rank"
from the same reads of the files (each head is read once, and every check and
statistic is computed from that read) and prints both reports: check's, then
rank's. With --json it prints one object {"check": ..., "rank": ...} whose two
parts are exactly what "heed check --json" and "heed rank --json" print for the
same files and flags (docs/json.md).

It takes check's flags (--rule, --tol, --sum-tol, --sum-below, --no-infer,
--block, the load overrides, --shard and --partial; merge the partials with
heed merge) and rank's (--sort, --prune, --prune-frac). With --rule, the
leak_mass of the rank report follows the rules given, as the check does.

Examples:
  heed both run.npz                      # check's text, then rank's table
  heed both run.npz --json > both.json   # for CI: one read of the file, both reports
  heed both runs/ --prune-frac 0.2       # a set of examples, with a pruning plan

Exit status: that of heed check: 0 clean (every block judged, nothing found),
1 findings, 2 bad input, 3 not judged.`,
		Args: cobra.MinimumNArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runReports(cmd, args, lf, pf, reportsWanted{check: true, rank: rf, json: asJSON})
		},
	}
	lf.register(cmd)
	pf.register(cmd, true)
	cmd.Flags().BoolVar(&asJSON, "json", false, `print {"check": ..., "rank": ...} (see docs/json.md)`)
	rf.register(cmd, false)
	return cmd
}
