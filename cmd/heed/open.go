package main

import (
	"errors"
	"fmt"
	"strings"

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

// runTUI opens args and runs the TUI until the user quits.
func runTUI(cmd *cobra.Command, args []string, lf *loadFlags, tf *tuiFlags) error {
	opts, err := tf.options()
	if err != nil {
		return err
	}
	set, err := openSetChecked(args, lf)
	if err != nil {
		return err
	}
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
