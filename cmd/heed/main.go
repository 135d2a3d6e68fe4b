// Command heed inspects exported attention probabilities of transformer
// models: it finds leaking masks, ranks heads for pruning and explains
// predictions, in a terminal UI or as scriptable commands.
package main

import (
	"context"
	"errors"
	"fmt"
	"os"
	"os/signal"
	"runtime/debug"
	"sync/atomic"
	"syscall"

	"github.com/spf13/cobra"
)

// version is set with -ldflags "-X main.version=..."; otherwise taken from the build info.
var version = ""

func versionString() string {
	if version != "" {
		return version
	}
	if bi, ok := debug.ReadBuildInfo(); ok && bi.Main.Version != "" {
		return bi.Main.Version
	}
	return "devel"
}

func newRootCmd() *cobra.Command {
	root := newOpenCmd()
	root.Use = "heed [FILE...]"
	root.Short = "Find leaking attention masks, rank heads, explain predictions"
	root.Long = `heed reads attention probabilities exported from a transformer (NPY, NPZ,
safetensors, HDF5; see the README for the export convention) and helps you
find leaking causal / padding / window / packed-sequence masks, decide which
heads to prune, and explain a prediction.

Its suggestions (likely bugs, heads to prune) are evidence to confirm by
re-evaluating the model, not verdicts.

Run "heed demo" to try it on an export embedded in the binary.`
	root.Version = versionString()
	root.SilenceUsage = true
	root.SilenceErrors = true
	root.AddCommand(newOpenCmd())
	root.AddCommand(newInfoCmd())
	root.AddCommand(newCheckCmd())
	root.AddCommand(newCapturePyCmd())
	root.AddCommand(newRankCmd())
	root.AddCommand(newBothCmd())
	root.AddCommand(newTraceCmd())
	root.AddCommand(newDemoCmd())
	root.AddCommand(newMergeCmd())
	root.AddCommand(newRenderCmd())
	root.AddCommand(newShareCmd())
	return root
}

func main() {
	// ctrl-c (SIGINT) and SIGTERM (what a service manager or a batch
	// scheduler sends to stop a task) both cancel the work
	ctx, cancel := context.WithCancel(context.Background())
	sigs := make(chan os.Signal, 1)
	signal.Notify(sigs, os.Interrupt, syscall.SIGTERM)
	var got atomic.Value // the signal received
	go func() {
		if sig, ok := <-sigs; ok {
			got.Store(sig)
			cancel()
		}
	}()
	cmd, err := newRootCmd().ExecuteContextC(ctx)
	interrupted := ctx.Err() != nil && !stoppedByInterrupt(cmd, err)
	signal.Stop(sigs)
	code := exitCode(err, interrupted)
	if sig, _ := got.Load().(os.Signal); code == 130 && sig == syscall.SIGTERM {
		code = 143 // 128 + SIGTERM, the shell's convention
	}
	cancel()
	os.Exit(code)
}

// servesUntilInterrupted is the annotation of a command whose work is to run
// until the operator interrupts it (heed share): for it, an interrupt is the
// normal way to stop.
const servesUntilInterrupted = "heed/serves-until-interrupted"

// stoppedByInterrupt reports whether an interrupt ended cmd's normal work
// rather than cutting it short: cmd serves until interrupted and returned no
// error (it shut down cleanly). Such a run exits 0; any other interrupted
// run exits 130.
func stoppedByInterrupt(cmd *cobra.Command, err error) bool {
	return err == nil && cmd != nil && cmd.Annotations[servesUntilInterrupted] == "true"
}

// exitCode maps an error to the command contract's exit codes: 0 success,
// 1 findings, 2 bad input (any other error), 3 not judged (heed check found
// nothing but could not judge some block's mask), 130 interrupted (143 when by
// SIGTERM, set by main; but see stoppedByInterrupt).
func exitCode(err error, interrupted bool) int {
	if interrupted {
		if err != nil {
			fmt.Fprintln(os.Stderr, "heed: interrupted")
		}
		return 130
	}
	if err == nil {
		return 0
	}
	var f *findingsError
	if errors.As(err, &f) {
		return 1
	}
	var nj *notJudgedError
	if errors.As(err, &nj) {
		return 3
	}
	fmt.Fprintln(os.Stderr, "heed: "+err.Error())
	return 2
}

// findingsError is returned by commands that completed but found problems
// (heed check): exit code 1, nothing more printed.
type findingsError struct{ n int }

func (f *findingsError) Error() string { return fmt.Sprintf("%d findings", f.n) }

// notJudgedError is returned by heed check when it found nothing but could
// not judge the mask of some block (analysis.VerdictNotJudged): exit code 3,
// nothing more printed (the report says what was not judged and why).
type notJudgedError struct{ blocks int }

func (e *notJudgedError) Error() string { return fmt.Sprintf("%d blocks not judged", e.blocks) }
