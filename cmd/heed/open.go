package main

import (
	"errors"
	"fmt"
	"github.com/heed-dev/heed/internal/words"
	"os"
	"strings"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/loader"

	tea "charm.land/bubbletea/v2"
	"github.com/heed-dev/heed/tui"
	"github.com/heed-dev/heed/views"
	"github.com/spf13/cobra"
)

// tuiFlags are the TUI's own flags.
type tuiFlags struct {
	at, colormap, background string
}

func (tf *tuiFlags) register(cmd *cobra.Command) {
	f := cmd.Flags()
	f.StringVar(&tf.at, "at", "", "start at a location BLOCK:L<layer>:H<head>[:B<batch>][:q<query>], e.g. decoder:L3:H7:q12")
	f.StringVar(&tf.colormap, "colormap", views.DefaultColormap, "colormap: "+strings.Join(views.ColormapNames(), ", "))
	f.StringVar(&tf.background, "background", "auto", "terminal background: auto, dark or light")
}

func (tf *tuiFlags) options() (tui.Options, error) {
	o := tui.Options{At: tf.at, Colormap: tf.colormap}
	switch tf.background {
	case "auto", "":
	case "dark", "light":
		o.Background = tf.background
	default:
		return o, fmt.Errorf("--background %q: must be auto, dark or light", tf.background)
	}
	return o, nil
}

// noUI says why the terminal UI cannot run here ("" when it can): a dumb
// terminal, or input or output that is not a terminal (a pipe, a file, a
// CI log).
func noUI(cmd *cobra.Command) string {
	switch {
	case os.Getenv("TERM") == "dumb":
		return "TERM is dumb"
	case !isTerminal(cmd.OutOrStdout()):
		return "the output is not a terminal"
	case !isTerminal(cmd.InOrStdin()):
		return "the input is not a terminal"
	}
	return ""
}

// textReport is what heed FILE prints where the UI cannot run: heed info's
// and heed check's text, and one line on stderr saying how to get the UI.
func textReport(cmd *cobra.Command, set *loader.Set, why string) error {
	out := cmd.OutOrStdout()
	ex, err := openFirst(cmd.Context(), set)
	if err != nil {
		return err
	}
	defer ex.Close()
	newInfoReport(set, ex).writeText(out)
	fmt.Fprintln(out)
	p, err := analysis.AnalyzeExamples(cmd.Context(), set, nil, analysis.DefaultOptions())
	if err != nil {
		return err
	}
	res := p.Result()
	res.WordGaps(words.WithOption)
	writeCheckText(out, res, set.Warnings)
	fmt.Fprintf(cmd.ErrOrStderr(), "heed: %s, so this is the text report (heed info and heed check); run heed in a terminal for the UI, or heed render for a picture\n", why)
	return nil
}

// runTUI opens args and runs the TUI until the user quits (or prints the
// text report where no UI can run).
func runTUI(cmd *cobra.Command, args []string, lf *loadFlags, tf *tuiFlags) error {
	opts, err := tf.options()
	if err != nil {
		return err
	}
	set, err := openSetChecked(args, lf)
	if err != nil {
		return err
	}
	if why := noUI(cmd); why != "" {
		return textReport(cmd, set, why)
	}
	return runModel(cmd, set, opts)
}

// runModel runs the TUI on set in this terminal until the user quits.
func runModel(cmd *cobra.Command, set *loader.Set, opts tui.Options) error {
	opts.Context = cmd.Context()
	m, err := tui.New(set, opts)
	if err != nil {
		return err
	}
	defer m.Close()
	p := tea.NewProgram(m, tea.WithContext(cmd.Context()), tea.WithFPS(tui.FPS))
	if _, err := p.Run(); err != nil && !errors.Is(err, tea.ErrProgramKilled) {
		return err
	}
	return nil
}

// newOpenCmd returns "heed open FILE...": the TUI (the root command runs it too).
func newOpenCmd() *cobra.Command {
	lf := &loadFlags{}
	tf := &tuiFlags{}
	cmd := &cobra.Command{
		Use:   "open FILE...",
		Short: "Open exports in the terminal UI",
		Long: `open shows exports in the terminal UI: Survey (layers x heads), Map (one
head's heat map), Findings (mask checks and diagnosis), Trace (which input
tokens an output position draws on) and, for two exports of the same shape
(heed A B), Compare. Press ? for the keys.`,
		// Any arguments: the root command takes file names, not only subcommands.
		Args: cobra.ArbitraryArgs,
		RunE: func(cmd *cobra.Command, args []string) error {
			if len(args) == 0 {
				return cmd.Help()
			}
			return runTUI(cmd, args, lf, tf)
		},
	}
	lf.register(cmd)
	tf.register(cmd)
	return cmd
}
