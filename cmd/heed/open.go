package main

import (
	"errors"

	"github.com/spf13/cobra"
)

// newOpenCmd returns "heed open FILE...": the TUI. (The TUI issue fills in RunE.)
func newOpenCmd() *cobra.Command {
	lf := &loadFlags{}
	cmd := &cobra.Command{
		Use:   "open FILE...",
		Short: "Open exports in the terminal UI",
		RunE: func(cmd *cobra.Command, args []string) error {
			if len(args) == 0 {
				return cmd.Help()
			}
			return errors.New("the terminal UI is not built yet")
		},
	}
	lf.register(cmd)
	return cmd
}
