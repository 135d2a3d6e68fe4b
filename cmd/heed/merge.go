package main

import (
	"errors"
	"fmt"

	"github.com/spf13/cobra"
	"github.com/spf13/pflag"
)

// mergeOutputFlags are the flags of heed merge that it hands to the command
// the partials came from, replacing what the shards recorded.
var mergeOutputFlags = []string{"json", "csv", "sort", "prune", "prune-frac"}

// newMergeCmd returns "heed merge PARTIAL.json...": the partials of a
// sharded heed check, heed rank or heed both, combined and printed as one run over the
// whole set would print them (docs/scale.md).
func newMergeCmd() *cobra.Command {
	var (
		asJSON, asCSV bool
		sortCol       string
		prune         int
		pruneFrac     float64
	)
	cmd := &cobra.Command{
		Use:   "merge PARTIAL.json...",
		Short: "Combine the partial results of sharded check, rank or both runs",
		Long: `merge reads the partial files that "heed check", "heed rank" or "heed both" wrote with
--shard I/N --partial OUT.json, checks that they are every shard of one job
exactly once (same command, flags and set of examples), adds their exact sums
and counts, and prints what one run over the whole set prints: the same text,
or with --json the same JSON, whatever the number of shards. Partials may be
given in any order.

The flags the shards were run with are used again (--rule, --tol, --block,
--prune, --sort, ...); --prune, --prune-frac and --sort given here replace
theirs. The output is text unless --json (or, for rank, --csv) is given.

Exit status: that of the command over the whole set (check: 0 clean,
1 findings); 2 when the partials do not belong together.`,
		Args: cobra.MinimumNArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			first, err := readPartial(args[0])
			if err != nil {
				return err
			}
			var sub *cobra.Command
			switch first.Command {
			case "check":
				sub = newCheckCmd()
			case "rank":
				sub = newRankCmd()
			case "both":
				sub = newBothCmd()
			default:
				return fmt.Errorf("%s: a partial of %q, which heed merge does not know", args[0], first.Command)
			}
			mine := map[string]bool{}
			var given []string
			cmd.Flags().Visit(func(f *pflag.Flag) {
				mine[f.Name] = true
				if sub.Flags().Lookup(f.Name) == nil {
					given = append(given, "--"+f.Name)
				}
			})
			if len(given) > 0 {
				return fmt.Errorf("%v: not an option of heed %s", given, first.Command)
			}
			if asJSON && asCSV {
				return errors.New("--json and --csv exclude each other")
			}
			// The shards' flags, without output formats (merge's own say how
			// to print) and without those given here.
			var argv []string
			for _, f := range first.Flags {
				switch {
				case f.Name == "json" || f.Name == "csv":
					continue
				case mine[f.Name], (f.Name == "prune" || f.Name == "prune-frac") && (mine["prune"] || mine["prune-frac"]):
					continue
				}
				for _, v := range f.Values {
					argv = append(argv, "--"+f.Name+"="+v)
				}
			}
			for _, name := range mergeOutputFlags {
				if mine[name] {
					argv = append(argv, "--"+name+"="+cmd.Flags().Lookup(name).Value.String())
				}
			}
			argv = append(argv, "--from-partials", "--")
			argv = append(argv, args...)
			sub.SetArgs(argv)
			sub.SetOut(cmd.OutOrStdout())
			sub.SetErr(cmd.ErrOrStderr())
			sub.SilenceUsage, sub.SilenceErrors = true, true
			return sub.ExecuteContext(cmd.Context())
		},
	}
	f := cmd.Flags()
	f.BoolVar(&asJSON, "json", false, "print JSON, as the command's --json does (see docs/json.md)")
	f.BoolVar(&asCSV, "csv", false, "rank partials: print the head table as CSV")
	f.StringVar(&sortCol, "sort", "", "rank partials: sort heads by this column (replaces the shards' --sort)")
	f.IntVar(&prune, "prune", -1, "rank partials: plan pruning N heads (replaces the shards' --prune/--prune-frac)")
	f.Float64Var(&pruneFrac, "prune-frac", 0, "rank partials: plan pruning this fraction of all heads")
	return cmd
}
