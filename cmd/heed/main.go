// Command heed inspects exported attention probabilities of transformer
// models: it finds leaking masks, ranks heads for pruning and explains
// predictions, in a terminal UI or as scriptable commands.
package main

import (
	"context"
	"errors"
	"fmt"
	"github.com/heed-dev/heed/analysis"
	"os"
	"os/signal"
	"regexp"
	"runtime"
	"runtime/debug"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"

	"github.com/heed-dev/heed/internal/kernels"
	"github.com/heed-dev/heed/loader"
	"github.com/spf13/cobra"
)

// version is set with -ldflags "-X main.version=..."; otherwise taken from the build info.
var version = ""

func versionString() string {
	bi, _ := debug.ReadBuildInfo()
	return versionFrom(version, bi)
}

// pseudoVersion matches the version the go command gives a build of a commit
// that carries no release tag (v0.0.0-20251204040700-f53f4b693b59, with
// +dirty for uncommitted changes): the commit says more.
var pseudoVersion = sync.OnceValue(func() *regexp.Regexp { return regexp.MustCompile(`[0-9]{14}-[0-9a-f]{12}(\+dirty)?$`) })

// versionFrom says which heed this is: the version set at link time, or the
// module's version (a release installed with go install MODULE@VERSION),
// and, for a build from a git checkout, the commit, its time and whether
// the tree had uncommitted changes, from the VCS information the go command
// stamps (vcs.revision, vcs.time, vcs.modified; go help buildvcs).
func versionFrom(ldflags string, bi *debug.BuildInfo) string {
	if ldflags != "" {
		return ldflags
	}
	v := "devel"
	if bi == nil {
		return v + " (no build information)"
	}
	if mv := bi.Main.Version; mv != "" && mv != "(devel)" && !pseudoVersion().MatchString(mv) {
		v = strings.TrimSuffix(mv, "+dirty")
	}
	var rev, at, modified string
	for _, s := range bi.Settings {
		switch s.Key {
		case "vcs.revision":
			rev = s.Value
		case "vcs.time":
			at = s.Value
		case "vcs.modified":
			modified = s.Value
		}
	}
	if rev == "" {
		if v == "devel" {
			v += " (no VCS information: built outside a git clone, e.g. in a git worktree, or with -buildvcs=false)"
		}
		return v
	}
	v += " (commit " + rev[:min(12, len(rev))]
	if at != "" {
		v += ", " + at
	}
	if modified == "true" {
		v += ", with uncommitted changes"
	}
	return v + ")"
}

// newVersionCmd returns "heed version": what --version prints, and how the
// binary was built.
func newVersionCmd() *cobra.Command {
	return &cobra.Command{
		Use:   "version",
		Short: "Print heed's version (the commit it was built from) and how it was built",
		Args:  cobra.NoArgs,
		RunE: func(cmd *cobra.Command, args []string) error {
			hdf5 := "yes"
			if !loader.HDF5Supported {
				hdf5 = "no (built without cgo, or with -tags nohdf5: rebuild with cgo and libhdf5-dev to read .h5 files)"
			}
			fmt.Fprintf(cmd.OutOrStdout(), "heed version %s\n%s %s/%s, HDF5 support: %s\nkernels: %s\n", versionString(), runtime.Version(), runtime.GOOS, runtime.GOARCH, hdf5, kernels.Paths())
			return nil
		},
	}
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
	root.AddCommand(newVersionCmd())
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
	msg := inOptions(err)
	var rn *analysis.RuleNeedsError
	if errors.As(err, &rn) {
		switch rn.Rule {
		case analysis.RulePrefix:
			msg += " or --prefix P"
		case analysis.RuleWindow:
			msg += " or --window W"
		}
	}
	fmt.Fprintln(os.Stderr, "heed: "+msg)
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
