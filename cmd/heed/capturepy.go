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
// heed_capture.py that the binary carries.
func newCapturePyCmd() *cobra.Command {
	var force bool
	cmd := &cobra.Command{
		Use:   "capture-py [DIR]",
		Short: "Write heed_capture.py, the Python module that records a PyTorch model's attention",
		Long: `capture-py writes heed_capture.py (the module this heed carries) into DIR, the
current directory by default. It needs torch (1.13 or later) and numpy:

    import heed_capture
    with heed_capture.record(model, "run.npz") as rec:
        loss = loss_fn(model(inputs), labels)
        loss.backward()                 # optional: gradients for head importance
    heed_capture.prune(model, "rank.json")   # the plan of heed rank --json --prune N

An existing heed_capture.py with other contents is not replaced without --force.`,
		Args: cobra.MaximumNArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			dir := "."
			if len(args) == 1 {
				dir = args[0]
			}
			st, err := os.Stat(dir)
			if err != nil {
				return fmt.Errorf("capture-py: %v", err)
			}
			if !st.IsDir() {
				return fmt.Errorf("capture-py: %s is not a directory", dir)
			}
			path := filepath.Join(dir, pycapture.FileName)
			old, err := os.ReadFile(path)
			switch {
			case err == nil && bytes.Equal(old, pycapture.Source):
				fmt.Fprintf(cmd.OutOrStdout(), "%s is already this heed's heed_capture.py\n", path)
				return nil
			case err == nil && !force:
				return fmt.Errorf("capture-py: %s exists and differs from this heed's heed_capture.py; pass --force to replace it", path)
			case err != nil && !os.IsNotExist(err):
				return fmt.Errorf("capture-py: %v", err)
			}
			tmp, err := os.CreateTemp(dir, ".heed_capture-*.tmp")
			if err != nil {
				return fmt.Errorf("capture-py: %v", err)
			}
			_, werr := tmp.Write(pycapture.Source)
			if cerr := tmp.Close(); werr == nil {
				werr = cerr
			}
			if werr == nil {
				werr = os.Chmod(tmp.Name(), 0o644)
			}
			if werr == nil {
				werr = os.Rename(tmp.Name(), path)
			}
			if werr != nil {
				os.Remove(tmp.Name())
				return fmt.Errorf("capture-py: %v", werr)
			}
			abs, _ := filepath.Abs(path)
			fmt.Fprintf(cmd.OutOrStdout(), "wrote %s (import heed_capture; needs torch >= 1.13 and numpy)\n", abs)
			return nil
		},
	}
	cmd.Flags().BoolVar(&force, "force", false, "replace an existing heed_capture.py that differs")
	return cmd
}
