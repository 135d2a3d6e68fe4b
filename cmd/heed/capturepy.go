package main

import (
	"bytes"
	"fmt"
	"os"
	"path/filepath"

	pycapture "github.com/heed-dev/heed/python"
	"github.com/spf13/cobra"
)

// newCapturePyCmd returns "heed capture-py [DIR]": writes the Python module
// that records a live PyTorch model into a heed export.
func newCapturePyCmd() *cobra.Command {
	var force bool
	cmd := &cobra.Command{
		Use:   "capture-py [DIR]",
		Short: "Write heed_capture.py, the module that records a PyTorch model's attention, into DIR",
		Long: `capture-py writes heed_capture.py (the copy carried by this binary) into DIR
(default: the current directory). It needs only torch (1.13 or later) and numpy:

    import heed_capture
    with heed_capture.record(model, "run.npz", tokens={"target": words}) as rec:
        out = model(ids)           # forward
        loss.backward()            # optional: dL/dA for head importance
    # then: heed check run.npz ; heed rank run.npz --prune-frac 0.2 --json > plan.json
    heed_capture.prune(model, "plan.json")   # zero the planned heads, re-evaluate

An existing file with other contents is not replaced without --force.`,
		Args: cobra.MaximumNArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			dir := "."
			if len(args) == 1 {
				dir = args[0]
			}
			path := filepath.Join(dir, pycapture.FileName)
			if old, err := os.ReadFile(path); err == nil {
				if bytes.Equal(old, pycapture.Source) {
					fmt.Fprintf(cmd.OutOrStdout(), "heed capture-py: %s is already this version\n", path)
					return nil
				}
				if !force {
					return fmt.Errorf("%s exists with other contents: pass --force to replace it", path)
				}
			}
			tmp, err := os.CreateTemp(dir, ".heed_capture-*.py")
			if err != nil {
				return err
			}
			if _, err := tmp.Write(pycapture.Source); err != nil {
				tmp.Close()
				os.Remove(tmp.Name())
				return err
			}
			if err := tmp.Close(); err != nil {
				os.Remove(tmp.Name())
				return err
			}
			if err := os.Chmod(tmp.Name(), 0o644); err != nil {
				os.Remove(tmp.Name())
				return err
			}
			if err := os.Rename(tmp.Name(), path); err != nil {
				os.Remove(tmp.Name())
				return err
			}
			fmt.Fprintf(cmd.OutOrStdout(), "heed capture-py: wrote %s (import heed_capture; see its docstring and the README)\n", path)
			return nil
		},
	}
	cmd.Flags().BoolVar(&force, "force", false, "replace an existing heed_capture.py with other contents")
	return cmd
}
