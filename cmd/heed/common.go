package main

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"strings"

	"github.com/heed-dev/heed/internal/words"
	"github.com/heed-dev/heed/loader"
	"github.com/spf13/cobra"
)

// loadFlags are the flags every command that opens exports shares: they
// override what the files say.
type loadFlags struct {
	axes, kind, tokens      string
	window, prefix, kvHeads int
	computeDType            string
	queryStart              int
	group                   string
}

func (lf *loadFlags) register(cmd *cobra.Command) {
	f := cmd.Flags()
	f.StringVar(&lf.axes, "axes", "", `axis names of the attention arrays, e.g. "layer batch head query key"`)
	f.StringVar(&lf.kind, "kind", "", "block kind: causal, bidirectional or cross")
	f.StringVar(&lf.tokens, "tokens", "", "file of tokens: one a line, or a JSON list")
	f.IntVar(&lf.window, "window", -1, "sliding window W: a query at q may see keys q-W < k <= q")
	f.IntVar(&lf.prefix, "prefix", -1, "prefix length P: the first P positions see each other both ways")
	f.IntVar(&lf.kvHeads, "kv-heads", -1, "number of key/value heads (grouped-query attention)")
	f.StringVar(&lf.computeDType, "compute-dtype", "", `dtype the model computed attention in (float32, bfloat16, float16), e.g. "bfloat16" for a bf16 model saved as float32: row-sum tolerances follow it`)
	f.IntVar(&lf.queryStart, "query-start", -1, "key position of query row 0, e.g. 17 for a decode step at position 17 written from a static (pre-allocated) KV cache")
	f.StringVar(&lf.group, "group", "auto", `how files group into examples: auto (names decide; bare NPY files named with numbers, ex0000.npy ..., are examples), examples (one file each), layers (numbered files are the layers of one export), one (all files one export); heed info says which was used`)
	_ = cmd.RegisterFlagCompletionFunc("group", cobra.FixedCompletions([]string{"auto", "examples", "layers", "one"}, cobra.ShellCompDirectiveNoFileComp))
}

// options turns the flags into loader options, refusing values that
// cannot be meant.
func (lf *loadFlags) options() (loader.Options, error) {
	o := newLoaderOptions()
	switch loader.Kind(lf.kind) {
	case loader.KindUnknown, loader.KindCausal, loader.KindBidirectional, loader.KindCross:
	default:
		return o, fmt.Errorf("--kind %q: must be causal, bidirectional or cross", lf.kind)
	}
	if lf.window < -1 || lf.prefix < -1 || lf.kvHeads < -1 || lf.queryStart < -1 {
		return o, errors.New("--window, --prefix, --kv-heads and --query-start must not be negative")
	}
	var err error
	if lf.computeDType != "" {
		d, err := loader.ParseComputeDType(lf.computeDType)
		if err != nil {
			return o, fmt.Errorf("--compute-dtype: %w", err)
		}
		o.ComputeDType = d
	}
	o.Axes = lf.axes
	o.Kind = loader.Kind(lf.kind)
	o.Window = lf.window
	o.Prefix = lf.prefix
	o.KVHeads = lf.kvHeads
	o.QueryStart = lf.queryStart
	if o.Group, err = loader.ParseGroupMode(lf.group); err != nil {
		return o, fmt.Errorf("--group: %w", err)
	}
	if lf.tokens != "" {
		tk, err := readTokens(lf.tokens)
		if err != nil {
			return o, err
		}
		o.Tokens = []loader.Tokens{tk}
	}
	return o, nil
}

// openSet opens the set of examples named by args (files, directories,
// @LIST files) with the overrides of lf. Only the first example is read
// here: the others are opened, and checked against it, when a pass reaches
// them (a bad one still fails with one line naming the file and the array),
// so a shard opens only its own examples' files.
func openSet(args []string, lf *loadFlags) (*loader.Set, error) {
	if len(args) == 0 {
		return nil, errors.New("no export files given")
	}
	o, err := lf.options()
	if err != nil {
		return nil, err
	}
	return loader.OpenSet(args, o)
}

// openSetChecked is openSet with every example opened and checked up front:
// for heed info, which vouches for the whole set, and the terminal UI, which
// should fail before it takes the screen rather than in the middle of it.
func openSetChecked(args []string, lf *loadFlags) (*loader.Set, error) {
	set, err := openSet(args, lf)
	if err != nil {
		return nil, err
	}
	if err := set.Check(); err != nil {
		return nil, err
	}
	return set, nil
}

// newLoaderOptions are loader options that override nothing and word the
// loader's settings as heed's options.
func newLoaderOptions() loader.Options {
	o := loader.NewOptions()
	o.SettingName = words.Option
	return o
}

// givenBy words who gave a block's setting (loader.Block.KindFrom, AxesFrom,
// PosFrom): "option" is heed's option for it (--kind, --axes, --query-start).
func givenBy(setting, from string) string {
	if from == "option" {
		return words.Option(setting)
	}
	return from
}

// inOptions is err's message with what the loader leaves to its caller
// worded as heed's users say it: the option that gives a setting.
func inOptions(err error) string {
	msg := err.Error()
	var ts *loader.TokensSideError
	if errors.As(err, &ts) {
		msg = strings.Replace(msg, ts.Error(), fmt.Sprintf("%s: --tokens: the export has sides %s; say which with --tokens SIDE=FILE",
			ts.Source, strings.Join(ts.Sides, ", ")), 1)
	}
	return msg
}

// readTokens reads the file of --tokens [SIDE=]FILE. SIDE= is taken as a side
// name only when no file of the whole name exists.
func readTokens(spec string) (loader.Tokens, error) {
	tk := loader.Tokens{Source: spec}
	if i := strings.IndexByte(spec, '='); i > 0 && !strings.ContainsAny(spec[:i], `/\.`) {
		if _, err := os.Stat(spec); err != nil {
			tk.Side, tk.Source = spec[:i], spec[i+1:]
		}
	}
	b, err := os.ReadFile(tk.Source)
	if err != nil {
		return tk, &loader.FormatError{File: tk.Source, Offset: -1, Msg: "cannot read the tokens file", Err: err}
	}
	tk.Rows, err = parseTokens(tk.Source, b)
	return tk, err
}

// parseTokens reads a tokens file: a JSON list of strings, a JSON list of
// lists (one per batch item), or one token a line. Errors name the file.
func parseTokens(file string, b []byte) ([][]string, error) {
	t := bytes.TrimSpace(b)
	if len(t) > 0 && t[0] == '[' {
		var flat []string
		if err := json.Unmarshal(t, &flat); err == nil {
			if len(flat) == 0 {
				return nil, &loader.FormatError{File: file, Offset: -1, Msg: "empty token list"}
			}
			return [][]string{flat}, nil
		}
		var nested [][]string
		if err := json.Unmarshal(t, &nested); err != nil {
			return nil, &loader.FormatError{File: file, Offset: -1, Msg: "not a JSON list of strings or of lists of strings", Err: err}
		}
		if len(nested) == 0 || len(nested[0]) == 0 {
			return nil, &loader.FormatError{File: file, Offset: -1, Msg: "empty token list"}
		}
		return nested, nil
	}
	s := strings.TrimSuffix(string(b), "\n")
	if s == "" {
		return nil, &loader.FormatError{File: file, Offset: -1, Msg: "empty tokens file"}
	}
	lines := strings.Split(s, "\n")
	for i, l := range lines {
		lines[i] = strings.TrimSuffix(l, "\r")
	}
	return [][]string{lines}, nil
}
