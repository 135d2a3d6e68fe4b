package main

import (
	"errors"
	"fmt"
	"github.com/heed-dev/heed/internal/words"
	"io"
	"os"
	"path/filepath"
	"strings"

	"github.com/heed-dev/heed/demo"
	"github.com/heed-dev/heed/loader"
	"github.com/spf13/cobra"
)

// newDemoCmd returns "heed demo": heed on the exports embedded in the binary
// (package demo), or, with --export DIR, those exports written to DIR.
func newDemoCmd() *cobra.Command {
	var dir string
	var force bool
	tf := &tuiFlags{}
	cmd := &cobra.Command{
		Use:   "demo [--export DIR [--force]]",
		Short: "Try heed on exports of a small model trained with a leaking mask",
		Long: `demo opens the terminal UI on exports embedded in the binary, at the cell
where the leak shows (without a terminal it prints heed check's report).
They come from a small encoder-decoder transformer that rewrites dates
written in words into ISO 8601 ("the fourth of july twenty twenty" ->
2020-07-04), trained twice with the same seed: once with a correct decoder
mask and once with a mask that lets each position see one position ahead;
and from a decoder-only model's greedy generation (prefill and KV-cache
decode steps). The training losses and accuracies it prints were measured by
the PyTorch generator (testdata/demo/generate.py).

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
			return runDemo(cmd, res, tf)
		},
	}
	cmd.Flags().StringVar(&dir, "export", "", "write the demo exports to `DIR` instead (created if missing)")
	cmd.Flags().BoolVar(&force, "force", false, "with --export: overwrite files that exist")
	tf.register(cmd)
	return cmd
}

// runDemo writes the exports to a temporary directory (the loader reads
// files) and opens the TUI on the leaking run, on the Map at the cell where
// the +1 leak is strongest. When the output is not a terminal it prints the
// hint and heed check's findings instead.
func runDemo(cmd *cobra.Command, res *demo.Results, tf *tuiFlags) error {
	tmp, err := os.MkdirTemp("", "heed-demo-")
	if err != nil {
		return err
	}
	defer os.RemoveAll(tmp)
	if _, err := demo.Export(tmp, false); err != nil {
		return err
	}
	path := filepath.Join(tmp, res.Demo.Open)
	if !isTerminal(cmd.OutOrStdout()) {
		return demoText(cmd, res, path)
	}
	opts, err := tf.options()
	if err != nil {
		return err
	}
	if opts.At == "" {
		if opts.At, err = demoStart(path, res.Demo.At); err != nil {
			return err
		}
	}
	// the tab bar's right end: short enough for 80 columns ("+1 leak: ...")
	opts.Name = strings.TrimPrefix(res.Runs["leaky"].DecoderMask, "k <= q") + " leak: right of the diagonal"
	set, err := loader.OpenSet([]string{path}, newLoaderOptions())
	if err != nil {
		return err
	}
	if err := runModel(cmd, set, opts); err != nil {
		return err
	}
	fmt.Fprintln(cmd.OutOrStdout(), "heed demo: "+res.Demo.Hint+`. Run "heed demo --export DIR" to try every command on the exports.`)
	return nil
}

// isTerminal reports whether w (a reader or a writer) is a character
// device (a terminal).
func isTerminal(w any) bool {
	f, ok := w.(*os.File)
	if !ok {
		return false
	}
	st, err := f.Stat()
	return err == nil && st.Mode()&os.ModeCharDevice != 0
}

// demoStart turns the generator's BLOCK:L:H:B location into a Map cell: the
// real query of that head and batch item with the most mass on key q+1,
// read from the export itself.
func demoStart(path, at string) (string, error) {
	loc, err := words.ParseLoc(at)
	if err != nil {
		return "", err
	}
	ex, err := loader.Open([]string{path}, newLoaderOptions())
	if err != nil {
		return "", err
	}
	defer ex.Close()
	loc.Batch = max(loc.Batch, 0)
	b := ex.Block(loc.Block)
	if b == nil || loc.Layer >= b.Layers || loc.Head >= b.Heads || loc.Batch >= b.Batch {
		return "", fmt.Errorf("demo: %s: no %s in %s", path, at, blockNames(ex))
	}
	a := make([]float32, b.Queries*b.Keys)
	if err := b.ReadAttn(loc.Layer, loc.Batch, loc.Head, a); err != nil {
		return "", err
	}
	side := ex.Side(b.KeySide)
	best, bestQ := float32(-1), 0
	for q := 0; q+1 < b.Keys && q < b.Queries; q++ {
		if side.IsValid(loc.Batch, q) && side.IsValid(loc.Batch, q+1) && a[q*b.Keys+q+1] > best {
			best, bestQ = a[q*b.Keys+q+1], q
		}
	}
	loc.Query, loc.Key = bestQ, bestQ+1
	return loc.String(), nil
}

// blockNames names the blocks of ex, for messages.
func blockNames(ex *loader.Export) string {
	var names []string
	for _, b := range ex.Blocks {
		names = append(names, b.Name)
	}
	return strings.Join(names, ", ")
}

// demoText prints the hint and heed check's report on the leaking run.
func demoText(cmd *cobra.Command, res *demo.Results, path string) error {
	out := cmd.OutOrStdout()
	fmt.Fprintln(out, "heed demo: "+res.Demo.Hint)
	fmt.Fprintln(out)
	check := newCheckCmd()
	check.SilenceErrors, check.SilenceUsage = true, true
	check.SetOut(out)
	check.SetErr(cmd.ErrOrStderr())
	check.SetArgs([]string{path})
	err := check.ExecuteContext(cmd.Context())
	var f *findingsError
	if err != nil && !errors.As(err, &f) {
		return err
	}
	fmt.Fprintln(out)
	fmt.Fprintln(out, `Run "heed demo" in a terminal for the interactive view, or "heed demo --export DIR" to write`)
	fmt.Fprintln(out, "the exports and try every command on them.")
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
	infoOn := "leaky.h5"
	if c, err := loader.OpenFile(filepath.Join(dir, infoOn)); errors.Is(err, loader.ErrNoHDF5) {
		fmt.Fprintln(w, "This heed was built without HDF5 support (cgo): the .h5 files need a build with it.")
		infoOn = "leaky.npz"
	} else if err == nil {
		c.Close()
	}
	cmds := [][2]string{
		{"heed check " + p("clean.npz"), "no leak (exit 0)"},
		{"heed check " + p("leaky.npz"), "the mask shifted by +1 (exit 1), and where to look"},
		{"heed check " + p("generation.npz"), "decode-step queries are the last of the cached keys"},
		{"heed info " + p(infoOn), "blocks, sides and the rules that apply"},
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
