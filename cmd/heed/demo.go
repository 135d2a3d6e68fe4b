package main

import (
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"

	"github.com/heed-dev/heed/demo"
	"github.com/spf13/cobra"
)

// newDemoCmd returns "heed demo": heed on the exports embedded in the binary
// (package demo), or, with --export DIR, those exports written to DIR.
func newDemoCmd() *cobra.Command {
	var dir string
	var force bool
	cmd := &cobra.Command{
		Use:   "demo [--export DIR [--force]]",
		Short: "Try heed on exports of a small model trained with a leaking mask",
		Long: `demo runs heed on exports embedded in the binary: a small encoder-decoder
transformer that rewrites dates written in words into ISO 8601 ("the fourth
of july twenty twenty" -> 2020-07-04), trained twice with the same seed, once
with a correct decoder mask and once with a mask that lets each position see
one position ahead; and a decoder-only model's greedy generation (prefill and
KV-cache decode steps). The training losses and accuracies it prints were
measured by the PyTorch generator (testdata/demo/generate.py).

With --export DIR it writes the exports to DIR (never over existing files
unless --force) and prints commands to try on them.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, args []string) error {
			if force && dir == "" {
				return errors.New("--force needs --export DIR")
			}
			res, err := demo.LoadResults()
			if err != nil {
				return err
			}
			if dir != "" {
				paths, err := demo.Export(dir, force)
				if err != nil {
					return fmt.Errorf("demo --export: %w", err)
				}
				writeDemoStory(cmd.OutOrStdout(), res, dir, paths)
				return nil
			}
			return runDemo(cmd, res)
		},
	}
	cmd.Flags().StringVar(&dir, "export", "", "write the demo exports to `DIR` instead (created if missing)")
	cmd.Flags().BoolVar(&force, "force", false, "with --export: overwrite files that exist")
	return cmd
}

// runDemo writes the exports to a temporary directory (the loader reads
// files) and shows heed's findings on the leaking run there.
func runDemo(cmd *cobra.Command, res *demo.Results) error {
	tmp, err := os.MkdirTemp("", "heed-demo-")
	if err != nil {
		return err
	}
	defer os.RemoveAll(tmp)
	if _, err := demo.Export(tmp, false); err != nil {
		return err
	}
	out := cmd.OutOrStdout()
	fmt.Fprintln(out, "heed demo: "+res.Demo.Hint)
	fmt.Fprintln(out)
	check := newCheckCmd()
	check.SilenceErrors, check.SilenceUsage = true, true
	check.SetOut(out)
	check.SetErr(cmd.ErrOrStderr())
	check.SetArgs([]string{filepath.Join(tmp, res.Demo.Open)})
	err = check.ExecuteContext(cmd.Context())
	var f *findingsError
	if err != nil && !errors.As(err, &f) {
		return err
	}
	fmt.Fprintln(out)
	fmt.Fprintln(out, `Run "heed demo --export DIR" to write the exports and try every command on them.`)
	return nil
}

// writeDemoStory says what was written and the commands to try on it.
func writeDemoStory(w io.Writer, res *demo.Results, dir string, paths []string) {
	fmt.Fprintf(w, "heed demo: wrote %d files to %s\n", len(paths), dir)
	clean, leaky := res.Runs["clean"], res.Runs["leaky"]
	g := res.Generation
	rows := [][2]string{
		{"clean.npz", fmt.Sprintf("decoder mask %s: training loss %.4f, held-out greedy exact match %.1f%%", clean.DecoderMask, clean.TrainLoss, 100*clean.ExactMatch)},
		{"leaky.npz", fmt.Sprintf("decoder mask %s: training loss %.4f, held-out greedy exact match %.1f%%", leaky.DecoderMask, leaky.TrainLoss, 100*leaky.ExactMatch)},
		{"clean.h5, leaky.h5", "the same two exports as HDF5 (float16)"},
		{"generation.npz", fmt.Sprintf("a decoder-only model's greedy generation: prefill and %d KV-cache decode steps", g.Steps)},
		{demo.ResultsFile, "the generator's measurements"},
	}
	for _, r := range rows {
		fmt.Fprintf(w, "  %-20s %s\n", r[0], r[1])
	}
	fmt.Fprintf(w, "The model: %s,\ntrained twice with %s.\n", res.Model, res.Training)
	fmt.Fprintf(w, "Training loss is per target character; a model that cannot see ahead cannot go below %.4f\n", res.LossFloor)
	fmt.Fprintln(w, "on this data (ISO 8601's basic and extended formats are mixed at random): a loss far below")
	fmt.Fprintln(w, "that is itself a symptom of a leak.")
	fmt.Fprintln(w)
	p := func(name string) string { return shellQuote(filepath.Join(dir, name)) }
	cmds := [][2]string{
		{"heed check " + p("clean.npz"), "no leak (exit 0)"},
		{"heed check " + p("leaky.npz"), "the mask shifted by +1 (exit 1), and where to look"},
		{"heed check " + p("generation.npz"), "decode-step queries are the last of the cached keys"},
		{"heed info " + p("leaky.h5"), "blocks, sides and the rules that apply"},
		{"heed rank " + p("clean.npz"), "per-head statistics and importance from the exported dL/dA"},
	}
	if len(res.Batch) > 0 {
		// the decoder input "-" after the year predicts the month's first digit
		if q := strings.Index(res.Batch[0].Target, "-") + 1; q > 0 {
			cmds = append(cmds,
				[2]string{fmt.Sprintf("heed trace %s --query %d", p("clean.npz"), q), fmt.Sprintf("which source words the month of %s comes from", res.Batch[0].Target)},
				[2]string{fmt.Sprintf("heed trace %s --query %d", p("leaky.npz"), q), "the same in the leaking run"})
		}
	}
	fmt.Fprintln(w, "Try:")
	for _, c := range cmds {
		fmt.Fprintf(w, "  %-48s %s\n", c[0], c[1])
	}
	fmt.Fprintln(w, "Findings are evidence to confirm by re-evaluating the model, not verdicts.")
}

// shellQuote quotes s for a POSIX shell when it holds anything but safe characters.
func shellQuote(s string) string {
	safe := func(r rune) bool {
		return r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || strings.ContainsRune("/._-+:=@,%", r)
	}
	if s != "" && strings.IndexFunc(s, func(r rune) bool { return !safe(r) }) < 0 {
		return s
	}
	return "'" + strings.ReplaceAll(s, "'", `'\''`) + "'"
}
