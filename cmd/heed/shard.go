package main

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"math/rand/v2"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/internal/words"
	"github.com/heed-dev/heed/loader"
	"github.com/spf13/cobra"
	"github.com/spf13/pflag"
)

// Sharded runs (docs/scale.md): `heed check|rank ... --shard I/N --partial
// OUT.json` analyses only the examples i with i mod N = I and writes the
// exact state of the pass (analysis.Partial) with what is needed to check
// that partials belong together; `heed merge` reads them back through the
// same command with the hidden flag --from-partials, so its output is the
// command's own output over the merged state: a single run's, byte for byte.

// partialFormat names the partial file layout; merge refuses others.
const partialFormat = "heed-partial-file/1"

// shardFlags are the flags check and rank get for sharding.
type shardFlags struct {
	cmd          *cobra.Command
	shard        string
	partial      string
	fromPartials bool
}

func (sf *shardFlags) register(cmd *cobra.Command) {
	sf.cmd = cmd
	f := cmd.Flags()
	f.StringVar(&sf.shard, "shard", "", "analyse only shard I of N (I/N, 0 <= I < N): the examples i with i mod N = I")
	f.StringVar(&sf.partial, "partial", "", "write the exact partial result to this file instead of the report (combine with heed merge)")
	f.BoolVar(&sf.fromPartials, "from-partials", false, "the arguments are partial files to merge (what heed merge runs)")
	_ = f.MarkHidden("from-partials")
}

// parseShard reads "I/N".
func parseShard(s string) (i, n int, err error) {
	a, b, ok := strings.Cut(s, "/")
	if ok {
		i, err = strconv.Atoi(strings.TrimSpace(a))
		if err == nil {
			n, err = strconv.Atoi(strings.TrimSpace(b))
		}
	}
	if !ok || err != nil || n < 1 || i < 0 || i >= n {
		return 0, 0, fmt.Errorf("--shard %q: want I/N with 0 <= I < N, e.g. 0/4", s)
	}
	return i, n, nil
}

// partialFile is the JSON a sharded run writes.
type partialFile struct {
	Format  string `json:"format"`
	Command string `json:"command"`
	// Flags are the command-line flags of the run (without --shard and
	// --partial), which every shard of one job must share; merge passes them
	// back to the command.
	Flags    []recordedFlag    `json:"flags"`
	Shard    shardSpec         `json:"shard"`
	Set      setSpec           `json:"set"`
	Warnings []string          `json:"warnings"`
	Partial  *analysis.Partial `json:"partial"`
}

type recordedFlag struct {
	Name   string   `json:"name"`
	Values []string `json:"values"`
}

type shardSpec struct {
	Index    int   `json:"index"`
	Count    int   `json:"count"`
	Examples []int `json:"examples"` // indices into the set
}

// setSpec identifies the set the shards were cut from.
type setSpec struct {
	Examples int    `json:"examples"`
	SHA256   string `json:"sha256"` // of the example names in order, one a line
}

// shardFlagNames are not recorded: they differ between the shards of a job.
var shardFlagNames = map[string]bool{"shard": true, "partial": true, "from-partials": true, "help": true}

// recordFlags lists the flags set on the command line, by name.
func (sf *shardFlags) recordFlags() []recordedFlag {
	var out []recordedFlag
	sf.cmd.Flags().Visit(func(f *pflag.Flag) {
		if shardFlagNames[f.Name] {
			return
		}
		r := recordedFlag{Name: f.Name}
		if sv, ok := f.Value.(pflag.SliceValue); ok {
			r.Values = sv.GetSlice()
		} else {
			r.Values = []string{f.Value.String()}
		}
		out = append(out, r)
	})
	return out
}

func setOf(set *loader.Set) setSpec {
	h := sha256.New()
	for i := range set.Examples {
		fmt.Fprintln(h, set.Name(i))
	}
	return setSpec{Examples: set.Len(), SHA256: hex.EncodeToString(h.Sum(nil))}
}

// runPass is the pass over shard I of N of the examples (0 of 1 without
// --shard: all of them), writing its partial when asked, or the merge of
// partial files (--from-partials).
func (sf *shardFlags) runPass(ctx context.Context, args []string, lf *loadFlags, pf *passFlags) (*analysis.Partial, *loader.Set, error) {
	if sf.fromPartials {
		if sf.shard != "" || sf.partial != "" {
			return nil, nil, errors.New("--from-partials excludes --shard and --partial")
		}
		return sf.merge(args, pf)
	}
	idx, n := 0, 1
	if sf.shard != "" {
		var err error
		if idx, n, err = parseShard(sf.shard); err != nil {
			return nil, nil, err
		}
	}
	opt, err := pf.options()
	if err != nil {
		return nil, nil, err
	}
	set, err := openSet(args, lf)
	if err != nil {
		return nil, nil, err
	}
	if sf.partial != "" {
		if err := notAnInput(sf.partial, set); err != nil {
			return nil, nil, err
		}
	}
	var mine []int
	for i := idx; i < set.Len(); i += n {
		mine = append(mine, i)
	}
	if mine == nil {
		mine = []int{} // a shard past the last example: none of them
	}
	p, err := analysis.AnalyzeExamples(ctx, set, mine, opt)
	if err != nil {
		return nil, nil, err
	}
	if sf.partial == "" {
		return p, set, nil
	}
	pfile := partialFile{Format: partialFormat, Command: sf.cmd.Name(), Flags: sf.recordFlags(),
		Shard: shardSpec{Index: idx, Count: n, Examples: mine}, Set: setOf(set),
		Warnings: append([]string{}, set.Warnings...), Partial: p}
	if pfile.Shard.Examples == nil {
		pfile.Shard.Examples = []int{}
	}
	if err := writePartial(sf.partial, &pfile); err != nil {
		return nil, nil, err
	}
	fmt.Fprintf(sf.cmd.ErrOrStderr(), "heed %s: shard %d/%d: %d of %d examples; partial written to %s\n",
		sf.cmd.Name(), idx, n, len(mine), set.Len(), sf.partial)
	return p, set, nil
}

// wrotePartial reports whether the run wrote a partial instead of a report.
func (sf *shardFlags) wrotePartial() bool { return sf.partial != "" }

// notAnInput refuses a partial path that is one of the input files: inputs
// are never written.
func notAnInput(out string, set *loader.Set) error {
	o, err := filepath.Abs(out)
	if err != nil {
		return err
	}
	for _, ex := range set.Examples {
		for _, f := range ex {
			if a, err := filepath.Abs(f); err == nil && a == o {
				return fmt.Errorf("--partial %s is one of the input files", out)
			}
		}
	}
	return nil
}

// writePartial writes the file next to its final name and renames it, so a
// killed task leaves no half-written partial for merge to trip on. The file
// is created with mode 0666 less the umask, as a shell redirection would
// make it, so that a colleague's merge on shared storage can read it (a
// temporary file from os.CreateTemp would stay 0600).
func writePartial(path string, pf *partialFile) error {
	b, err := json.Marshal(pf)
	if err != nil {
		return fmt.Errorf("partial %s: %w", path, err)
	}
	tmp, err := createBeside(path)
	if err != nil {
		return fmt.Errorf("partial: %w", err)
	}
	_, err = tmp.Write(append(b, '\n'))
	if cerr := tmp.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Rename(tmp.Name(), path)
	}
	if err != nil {
		os.Remove(tmp.Name())
		return fmt.Errorf("partial %s: %w", path, err)
	}
	return nil
}

// createBeside creates a new hidden file in path's directory, named after
// it, with mode 0666 less the umask.
func createBeside(path string) (*os.File, error) {
	dir, base := filepath.Dir(path), filepath.Base(path)
	for try := 0; ; try++ {
		name := filepath.Join(dir, fmt.Sprintf(".%s.%d-%08x", base, os.Getpid(), rand.Uint32()))
		f, err := os.OpenFile(name, os.O_WRONLY|os.O_CREATE|os.O_EXCL, 0o666)
		if errors.Is(err, fs.ErrExist) && try < 100 {
			continue
		}
		return f, err
	}
}

// readPartial reads and checks the envelope of one partial file.
func readPartial(path string) (*partialFile, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, err
	}
	var pf partialFile
	if err := json.Unmarshal(b, &pf); err != nil {
		return nil, fmt.Errorf("%s: not a heed partial: %w", path, err)
	}
	switch {
	case pf.Format != partialFormat:
		return nil, fmt.Errorf("%s: not a heed partial (format %q, want %q)", path, pf.Format, partialFormat)
	case pf.Partial == nil:
		return nil, fmt.Errorf("%s: the partial has no analysis state", path)
	case pf.Partial.Version != analysis.PartialVersion:
		return nil, fmt.Errorf("%s: written by another version of heed (partial %q; this heed merges %q): run its shard again with this heed", path, pf.Partial.Version, analysis.PartialVersion)
	case pf.Shard.Count < 1 || pf.Shard.Index < 0 || pf.Shard.Index >= pf.Shard.Count:
		return nil, fmt.Errorf("%s: shard %d/%d is not valid", path, pf.Shard.Index, pf.Shard.Count)
	}
	if err := pf.Partial.Validate(); err != nil {
		return nil, fmt.Errorf("%s: a damaged partial: %w", path, err)
	}
	return &pf, nil
}

// merge reads partial files written by this command, checks that they are
// every shard of one job exactly once, and adds them.
func (sf *shardFlags) merge(paths []string, pf *passFlags) (*analysis.Partial, *loader.Set, error) {
	if _, err := pf.options(); err != nil {
		return nil, nil, err
	}
	files := make([]*partialFile, len(paths))
	for i, p := range paths {
		f, err := readPartial(p)
		if err != nil {
			return nil, nil, err
		}
		files[i] = f
	}
	first := files[0]
	byShard := make(map[int]string, len(files))
	for i, f := range files {
		switch {
		case f.Command != sf.cmd.Name():
			return nil, nil, fmt.Errorf("%s: a partial of heed %s, not of heed %s", paths[i], f.Command, sf.cmd.Name())
		case f.Shard.Count != first.Shard.Count:
			return nil, nil, fmt.Errorf("%s is shard %d/%d but %s is shard %d/%d: partials of different jobs",
				paths[i], f.Shard.Index, f.Shard.Count, paths[0], first.Shard.Index, first.Shard.Count)
		case f.Set != first.Set:
			return nil, nil, fmt.Errorf("%s and %s were cut from different sets of examples (%d and %d examples, or other paths)",
				paths[0], paths[i], first.Set.Examples, f.Set.Examples)
		case fmt.Sprint(f.Flags) != fmt.Sprint(first.Flags):
			return nil, nil, fmt.Errorf("%s and %s were made with different flags (%s vs %s)",
				paths[0], paths[i], flagsText(first.Flags), flagsText(f.Flags))
		}
		if prev, dup := byShard[f.Shard.Index]; dup {
			return nil, nil, fmt.Errorf("shard %d/%d given twice: %s and %s", f.Shard.Index, f.Shard.Count, prev, paths[i])
		}
		byShard[f.Shard.Index] = paths[i]
	}
	var missing []string
	for i := 0; i < first.Shard.Count; i++ {
		if _, ok := byShard[i]; !ok {
			missing = append(missing, fmt.Sprintf("%d/%d", i, first.Shard.Count))
		}
	}
	if len(missing) > 0 {
		return nil, nil, fmt.Errorf("missing %s: %s (of %d shards, %d given)", words.Plural(len(missing), "shard", "shards"),
			strings.Join(missing, ", "), first.Shard.Count, len(files))
	}
	sort.Slice(files, func(a, b int) bool { return files[a].Shard.Index < files[b].Shard.Index })
	merged := analysis.NewPartial(analysis.Options{})
	merged.Options = files[0].Partial.Options
	for _, f := range files {
		if err := merged.Merge(f.Partial); err != nil {
			return nil, nil, fmt.Errorf("%s: %w", byShard[f.Shard.Index], err)
		}
	}
	return merged, &loader.Set{Warnings: files[0].Warnings}, nil
}

func flagsText(fs []recordedFlag) string {
	if len(fs) == 0 {
		return "none"
	}
	var parts []string
	for _, f := range fs {
		for _, v := range f.Values {
			parts = append(parts, "--"+f.Name+"="+v)
		}
	}
	return strings.Join(parts, " ")
}
