package main

import (
	"context"
	"fmt"
	"io"
	"strconv"
	"strings"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/loader"
	"github.com/spf13/cobra"
)

// newInfoCmd returns "heed info FILE... [--json]": what an export holds and
// which rules heed check will apply to it.
func newInfoCmd() *cobra.Command {
	lf := &loadFlags{}
	var asJSON bool
	cmd := &cobra.Command{
		Use:   "info FILE...",
		Short: "Show blocks, shapes, dtypes, tokens and the rules that will apply",
		Long: `info lists each block of the export (name, kind, dtype, layers, batch, heads,
queries, keys), its token sides with their first tokens, which optional
arrays are present (grad, allow, valid, segments, out) and what "heed check"
will run on it: the mask rules (the list of check's "rules checked:") and
the row checks (nan_rows, row_sum, negative on every block; cut on a cross
block and on a causal block with a prefix). Several files, a directory or @LIST open as one set
of examples; info describes the first and checks that the others match it.
Its first line sums the set up and names the rule that grouped the files
into examples ("grouped by: array names", "numbered files are examples",
or the --group given); a grouping heed had to guess is also a warning.`,
		Args: cobra.MinimumNArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			set, err := openSetChecked(args, lf)
			if err != nil {
				return err
			}
			ex, err := openFirst(cmd.Context(), set)
			if err != nil {
				return err
			}
			defer ex.Close()
			rep := newInfoReport(set, ex)
			if asJSON {
				return writeJSON(cmd.OutOrStdout(), rep)
			}
			rep.writeText(cmd.OutOrStdout())
			return nil
		},
	}
	lf.register(cmd)
	cmd.Flags().BoolVar(&asJSON, "json", false, "print JSON (field names are stable, snake_case)")
	return cmd
}

// firstTokens is how many tokens info shows per side.
const firstTokens = 8

// infoReport is the JSON of heed info; field names are part of the command contract.
type infoReport struct {
	Files    []string    `json:"files"`
	Examples int         `json:"examples"`
	Grouping infoGroup   `json:"grouping"`
	Format   string      `json:"format"`
	Blocks   []infoBlock `json:"blocks"`
	Sides    []infoSide  `json:"sides"`
	Logits   *infoLogits `json:"logits"`
	Warnings []string    `json:"warnings"`
	files    [][]string  // per example, for the text form
	ex       *loader.Export
}

// infoGroup says how the files were grouped into examples (loader.Grouping).
type infoGroup struct {
	Rule    string `json:"rule"`    // "numbered files are examples", "array names", "--group examples", ...
	Guessed bool   `json:"guessed"` // nothing in the files or flags said it
	Files   []int  `json:"files"`   // the smallest and largest number of files in an example
}

type infoBlock struct {
	Name        string `json:"name"`
	Kind        string `json:"kind"`
	DType       string `json:"dtype"`
	Layers      int    `json:"layers"`
	Batch       int    `json:"batch"`
	Heads       int    `json:"heads"`
	KVHeads     int    `json:"kv_heads"`
	Queries     int    `json:"queries"`
	Keys        int    `json:"keys"`
	QueryOffset int    `json:"query_offset"`
	Window      int    `json:"window"`
	Prefix      int    `json:"prefix"`
	Axes        string `json:"axes"`
	Source      string `json:"source"`
	QuerySide   string `json:"query_side"`
	KeySide     string `json:"key_side"`
	Grad        bool   `json:"grad"`
	Allow       bool   `json:"allow"`
	Valid       bool   `json:"valid"`
	Segments    bool   `json:"segments"`
	Out         bool   `json:"out"`
	OutLayers   int    `json:"out_layers"`
	Positions   int    `json:"positions"`
	Features    int    `json:"features"`
	// who gave the kind (--kind, metadata, attribute, inferred, unknown) and,
	// inferred or undecided, what the data showed; who gave the axes (rank =
	// guessed) and their other reading; how queries sit among the keys; the
	// dtype the model computed in ("" = unknown)
	KindFrom     string   `json:"kind_from"`
	Evidence     string   `json:"evidence,omitempty"`
	AxesFrom     string   `json:"axes_from"`
	AxesOther    string   `json:"axes_other,omitempty"`
	QueryPos     string   `json:"query_positions"`
	ComputeDType string   `json:"compute_dtype"`
	Rules        []string `json:"rules"`      // mask rules, as heed check's "rules"
	RowChecks    []string `json:"row_checks"` // row rules: nan_rows, row_sum, negative, cut where it applies
}

type infoSide struct {
	Name        string   `json:"name"`
	Len         int      `json:"len"`
	Tokens      bool     `json:"tokens"`
	TokenRows   int      `json:"token_rows"`
	FirstTokens []string `json:"first_tokens"`
	Valid       bool     `json:"valid"`
	Padding     int      `json:"padding"`
	Segments    bool     `json:"segments"`
	Documents   int      `json:"documents"`
}

type infoLogits struct {
	DType string `json:"dtype"`
	Shape []int  `json:"shape"`
}

func dashS(s string) string {
	if s == "" {
		return "unknown"
	}
	return s
}

func kindName(k loader.Kind) string {
	if k == loader.KindUnknown {
		return "unknown"
	}
	return string(k)
}

func newInfoReport(set *loader.Set, ex *loader.Export) *infoReport {
	r := &infoReport{Examples: set.Len(), Format: ex.Format, Blocks: []infoBlock{}, Sides: []infoSide{},
		files: set.Examples, ex: ex}
	r.Grouping = infoGroup{Rule: set.Grouping.Rule, Guessed: set.Grouping.Guessed, Files: []int{len(set.Examples[0]), len(set.Examples[0])}}
	for _, e := range set.Examples {
		r.Files = append(r.Files, e...)
		r.Grouping.Files[0] = min(r.Grouping.Files[0], len(e))
		r.Grouping.Files[1] = max(r.Grouping.Files[1], len(e))
	}
	for _, b := range ex.Blocks {
		qs, ks := ex.Side(b.QuerySide), ex.Side(b.KeySide)
		rules, rows := blockChecks(b, qs, ks)
		r.Blocks = append(r.Blocks, infoBlock{
			Name: b.Name, Kind: kindName(b.Kind), DType: b.DType.String(),
			Layers: b.Layers, Batch: b.Batch, Heads: b.Heads, KVHeads: b.KVHeads,
			Queries: b.Queries, Keys: b.Keys, QueryOffset: b.QueryOffset,
			Window: b.Window, Prefix: b.Prefix, Axes: b.Axes, Source: b.Source,
			QuerySide: b.QuerySide, KeySide: b.KeySide,
			Grad: b.HasGrad, Allow: b.HasAllow,
			Valid:    qs != nil && qs.Valid != nil || ks != nil && ks.Valid != nil,
			Segments: qs != nil && qs.Segments != nil || ks != nil && ks.Segments != nil,
			Out:      b.OutLayers > 0, OutLayers: b.OutLayers, Positions: b.Positions, Features: b.Features,
			Rules: rules, RowChecks: rows,
			KindFrom: givenBy("kind", b.KindFrom), Evidence: b.KindEvidence, AxesFrom: givenBy("axes", b.AxesFrom), AxesOther: b.AxesOther,
			QueryPos: givenBy("query_start", b.PosFrom),
		})
		ib := &r.Blocks[len(r.Blocks)-1]
		if ib.KindFrom == "" {
			ib.KindFrom = "unknown"
		}
		if ib.QueryPos == "" {
			ib.QueryPos = "rows"
		}
		if b.ComputeDType != loader.Invalid {
			ib.ComputeDType = b.ComputeDType.String()
		}
	}
	for _, name := range sortedSides(ex) {
		s := ex.Sides[name]
		is := infoSide{Name: name, Len: s.Len, Tokens: s.Tokens != nil, TokenRows: len(s.Tokens),
			FirstTokens: []string{}, Valid: s.Valid != nil, Segments: s.Segments != nil}
		if len(s.Tokens) > 0 {
			row := s.Tokens[0]
			is.FirstTokens = append(is.FirstTokens, row[:min(firstTokens, len(row))]...)
		}
		for _, row := range s.Valid {
			for _, v := range row {
				if !v {
					is.Padding++
				}
			}
		}
		docs := map[[2]int64]bool{}
		for i, row := range s.Segments {
			for _, v := range row {
				docs[[2]int64{int64(i), v}] = true
			}
		}
		is.Documents = len(docs)
		r.Sides = append(r.Sides, is)
	}
	if ex.Logits != nil {
		r.Logits = &infoLogits{DType: ex.Logits.DType().String(), Shape: ex.Logits.Shape()}
	}
	r.Warnings = []string{}
	if set.Grouping.Warning != "" {
		r.Warnings = append(r.Warnings, set.Grouping.Warning)
	}
	r.Warnings = append(r.Warnings, ex.Warnings...)
	return r
}

// blockChecks returns what heed check (no --rule) runs on block b, as
// analysis builds it: the mask rules (NewRules; the block's entry in
// check's "rules" and "rules checked:") and the row checks (Rules.RowChecks:
// nan_rows, row_sum, negative, and cut, the check of a mask that blocks
// allowed keys, on a cross block and where the prefix rule applies). A block
// of activations only has neither.
func blockChecks(b *loader.Block, qs, ks *loader.Side) (rules, rows []string) {
	rules, rows = []string{}, []string{}
	if b.Layers == 0 {
		return rules, rows
	}
	r, err := analysis.NewRules(b, qs, ks, nil)
	if err != nil { // not without a --rule selection; check would fail the same way
		return rules, rows
	}
	for _, x := range r.Active() {
		rules = append(rules, x.String())
	}
	for _, x := range r.RowChecks(nil) {
		rows = append(rows, x.String())
	}
	return rules, rows
}

// fileList names the files of one example: all of them when there are a
// few, else the first two and the last with their number.
func fileList(files []string) string {
	if len(files) <= 4 {
		return strings.Join(files, ", ")
	}
	return fmt.Sprintf("%s, %s … %s (%d files)", files[0], files[1], files[len(files)-1], len(files))
}

func sortedSides(ex *loader.Export) []string {
	var names []string
	for n := range ex.Sides {
		names = append(names, n)
	}
	for i := 1; i < len(names); i++ {
		for j := i; j > 0 && names[j] < names[j-1]; j-- {
			names[j], names[j-1] = names[j-1], names[j]
		}
	}
	return names
}

func dash(n int) string {
	if n <= 0 {
		return "-"
	}
	return strconv.Itoa(n)
}

func yesNo(b bool) string {
	if b {
		return "yes"
	}
	return "no"
}

func (r *infoReport) writeText(w io.Writer) {
	by := "(grouped by: " + r.Grouping.Rule + ")"
	if r.Grouping.Guessed {
		by = "(grouped by: " + r.Grouping.Rule + ", guessed: see warnings)"
	}
	if len(r.files) == 1 {
		fmt.Fprintf(w, "export    %s %s\n", fileList(r.files[0]), by)
	} else {
		last := r.files[len(r.files)-1]
		each := fmt.Sprintf("%d files each", r.Grouping.Files[0])
		switch {
		case r.Grouping.Files[0] != r.Grouping.Files[1]:
			each = fmt.Sprintf("%d to %d files each", r.Grouping.Files[0], r.Grouping.Files[1])
		case r.Grouping.Files[0] == 1:
			each = "one file each"
		}
		fmt.Fprintf(w, "examples  %d from %s … %s, %s %s\n", len(r.files), r.files[0][0], last[len(last)-1], each, by)
		fmt.Fprintf(w, "          the first (%s) is described; every example shares its layout\n", fileList(r.files[0]))
	}
	format := r.Format
	if format == "" {
		format = "no heed-export/1 metadata"
	}
	fmt.Fprintf(w, "format    %s\n", format)
	for _, b := range r.Blocks {
		fmt.Fprintf(w, "\nblock %s  (%s, %s)\n", b.Name, b.Kind, b.DType)
		if b.Layers > 0 {
			fmt.Fprintf(w, "  attention   %d layers x batch %d x %d heads x %d queries x %d keys   [%s] from %s\n",
				b.Layers, b.Batch, b.Heads, b.Queries, b.Keys, b.Axes, b.Source)
			fmt.Fprintf(w, "  settings    kv heads %s, window %s, prefix %s, query offset %d\n", dash(b.KVHeads), dash(b.Window), dash(b.Prefix), b.QueryOffset)
			q, k := b.QuerySide, b.KeySide
			if q == "" {
				q = "-"
			}
			if k == "" {
				k = "-"
			}
			fmt.Fprintf(w, "  sides       queries %s, keys %s\n", q, k)
			fmt.Fprintf(w, "  known from  kind: %s, axes: %s, query positions: %s, compute dtype: %s\n", b.KindFrom, b.AxesFrom, b.QueryPos, dashS(b.ComputeDType))
			if b.Evidence != "" {
				fmt.Fprintf(w, "  evidence    %s\n", b.Evidence)
			}
		}
		fmt.Fprintf(w, "  present     grad %s, allow %s, valid %s, segments %s, out %s\n", yesNo(b.Grad), yesNo(b.Allow), yesNo(b.Valid), yesNo(b.Segments), yesNo(b.Out))
		if b.Out {
			fmt.Fprintf(w, "  activations %d layers x batch %d x %d positions x %d features\n", b.OutLayers, b.Batch, b.Positions, b.Features)
		}
		if b.Layers > 0 {
			rules := strings.Join(b.Rules, ", ")
			if len(b.Rules) == 0 {
				rules = "none"
				if b.Kind == kindName(loader.KindUnknown) {
					rules += " (kind unknown: pass --kind)"
				}
			}
			fmt.Fprintf(w, "  rules       %s\n", rules)
			fmt.Fprintf(w, "  row checks  %s\n", strings.Join(b.RowChecks, ", "))
		}
	}
	for _, s := range r.Sides {
		fmt.Fprintf(w, "\nside %s  (%d positions)\n", s.Name, s.Len)
		if s.Tokens {
			quoted := make([]string, len(s.FirstTokens))
			for i, t := range s.FirstTokens {
				quoted[i] = strconv.Quote(t)
			}
			more := ""
			if s.Len > len(s.FirstTokens) {
				more = " ..."
			}
			rows := "shared by every batch item"
			if s.TokenRows > 1 {
				rows = fmt.Sprintf("%d rows, first shown", s.TokenRows)
			}
			fmt.Fprintf(w, "  tokens      %s%s  (%s)\n", strings.Join(quoted, " "), more, rows)
		} else {
			fmt.Fprintf(w, "  tokens      none (give them with --tokens FILE)\n")
		}
		if s.Valid {
			fmt.Fprintf(w, "  valid       %d padding positions\n", s.Padding)
		}
		if s.Segments {
			fmt.Fprintf(w, "  segments    %d documents\n", s.Documents)
		}
	}
	if r.Logits != nil {
		fmt.Fprintf(w, "\nlogits      %s %v\n", r.Logits.DType, r.Logits.Shape)
	}
	if len(r.Warnings) > 0 {
		fmt.Fprintf(w, "\nwarnings\n")
		for _, m := range r.Warnings {
			fmt.Fprintf(w, "  %s\n", m)
		}
	}
	fmt.Fprintf(w, "\nRules listed are what heed check will test; its findings are evidence to confirm by re-evaluating the model, not verdicts.\n")
}

// openFirst opens the first example of set with the kinds heed check would
// infer from its data, so that the rules info lists are the ones check
// judges by.
func openFirst(ctx context.Context, set *loader.Set) (*loader.Export, error) {
	ex, err := set.Open(0)
	if err != nil {
		return nil, err
	}
	if err := analysis.InferExport(ctx, ex); err != nil {
		ex.Close()
		return nil, err
	}
	return ex, nil
}
