package analysis

import (
	"fmt"
	"math"
	"slices"
)

// The table of per-head statistics: the one place a statistic is declared.
// Every output of statistics derives from it: heed rank's JSON fields, CSV
// columns, text table and --sort keys (HeadColumns, TextColumns,
// Statistic.Value), the terminal UI Survey's list (Statistic.Survey), and the
// field list of docs/json.md (checked against the table by cmd/heed's
// tests). The built-in statistics are computed in the pass's own loop
// (pass.go, pass_f32.go, pass_raw16.go: one read of each row, no call per row)
// and read from Stats by Value; a statistic declared with Row is computed by
// the engine over every judged row with finite values, added exactly per
// (layer, head, batch item) (Sum), carried by name in partials
// (HeadAcc.Extra) and reported as its mean over rows (Stats.Extra).
// DEVELOPERS.md, "How to add a statistic", says how to add one.

// Show says when an output shows a statistic, by whether the export has
// gradients (heed rank's text table: every block has; the Survey: the
// block has).
type Show uint8

const (
	ShowNever       Show = iota
	ShowAlways           // always
	ShowWithGrad         // only with gradients
	ShowWithoutGrad      // only without gradients
)

// With reports whether s shows for an export with (grad) or without gradients.
func (s Show) With(grad bool) bool {
	return s == ShowAlways || (s == ShowWithGrad && grad) || (s == ShowWithoutGrad && !grad)
}

// SurveyLook is how the terminal UI's Survey offers a statistic: its label,
// unit and hint in the list, whether its colours follow a log scale, its
// place in the list (Order, smallest first) and when it is offered.
type SurveyLook struct {
	Label, Unit, Hint string
	Log               bool
	Order             int
	When              Show
}

// Row is one judged row whose values are all finite, as a statistic
// declared with a row function sees it. The slices are the engine's: read
// them, do not keep or change them.
type Row struct {
	// Values are the row's values at every key, as exported (float16 and
	// bfloat16 widened exactly).
	Values []float64
	// Query is the row's index; Pos its absolute position among the keys
	// (Rules.Pos: KV-cache offsets and BLOCK/qpos applied).
	Query, Pos int
	// Allowed[k] is true when no mask rule checked in the block forbids key
	// k (padding keys are forbidden by the padding rule).
	Allowed []bool
}

// Statistic is one row of the table of per-head statistics.
type Statistic struct {
	// Name is the column in heed rank's JSON and CSV, and its --sort key.
	Name string
	// Doc says in one line what the value is, with its published source
	// (or "common practice"); docs/json.md lists it.
	Doc string
	// Aliases are former names, still written in heed rank's JSON after
	// every column with the same value and still taken by --sort.
	Aliases []string
	// LowFirst: low values are the candidates (to prune, or to look at
	// first): the Survey's ranked list puts them first. Else high first.
	LowFirst bool
	// Count: an integer count, printed as one and never undefined.
	Count bool
	// Text says when heed rank's text table shows it (JSON and CSV show
	// every statistic).
	Text Show
	// Survey, when not nil, offers it in the terminal UI's Survey.
	Survey *SurveyLook
	// Value reads a built-in statistic: from s, the statistics of a head or
	// of one batch item, and h, the head's (nil for one batch item alone:
	// what exists only over every batch item is then NaN). NaN = undefined.
	Value func(s *Stats, h *HeadStats) float64
	// Row declares a statistic the engine computes: its value on one row,
	// and whether the row counts (rows that do not are left out of the
	// mean). The statistic is the mean over counted rows. Plain Go over
	// float64s; called for every judged finite row of every head, so keep
	// it free of allocation when it can be (it is not on the built-ins'
	// fast path: a pass without such statistics never calls one). Leave
	// Value nil: the engine reads the mean from Stats.Extra.
	Row func(r *Row) (float64, bool)
}

// headOnly reads what exists only over every batch item (HeadStats).
func headOnly(f func(h *HeadStats) float64) func(*Stats, *HeadStats) float64 {
	return func(_ *Stats, h *HeadStats) float64 {
		if h == nil {
			return math.NaN()
		}
		return f(h)
	}
}

// statistics is the table: built-ins first, in output order, then the
// statistics given to Register. Each output keeps this order.
var statistics = []Statistic{
	{Name: "entropy", Doc: "mean row entropy, nats (0 ln 0 = 0), over judged rows with finite values (Clark et al. 2019, sec. 3.3)",
		Text: ShowAlways, Survey: &SurveyLook{Label: "entropy", Unit: "nats", Hint: "low = focused, high = spread", Order: 0, When: ShowAlways},
		Value: func(s *Stats, _ *HeadStats) float64 { return s.Entropy }},
	{Name: "entropy_norm", Doc: "mean of H_q / ln n_q, n_q the keys row q may see (0 when n_q = 1; common practice)",
		Text: ShowAlways, Value: func(s *Stats, _ *HeadStats) float64 { return s.EntropyNorm }},
	{Name: "confidence", Doc: "mean row maximum (Voita et al. 2019, sec. 4)",
		Text: ShowAlways, Survey: &SurveyLook{Label: "confidence", Hint: "mean row maximum; high = peaked", Order: 1, When: ShowAlways},
		Value: func(s *Stats, _ *HeadStats) float64 { return s.Confidence }},
	{Name: "prev_share", Doc: "mean mass on k = p-1 (self-attention only, else null; common practice)",
		Text: ShowAlways, Value: func(s *Stats, _ *HeadStats) float64 { return s.PrevShare }},
	{Name: "self_share", Doc: "mean mass on k = p (self-attention only, else null; common practice)",
		Text: ShowAlways, Value: func(s *Stats, _ *HeadStats) float64 { return s.SelfShare }},
	{Name: "distance", Doc: "mean attention distance, sum_k A[q,k] |k - p| (Dosovitskiy et al. 2021, appendix D.7)",
		Text: ShowAlways, Survey: &SurveyLook{Label: "distance", Unit: "positions", Hint: "mean |k - q| weighted by attention", Order: 5, When: ShowAlways},
		Value: func(s *Stats, _ *HeadStats) float64 { return s.Distance }},
	{Name: "sink", Doc: "mean mass on key 0 over rows other than position 0 (Gu et al. 2025; a sink head has sink > 0.3)",
		Text: ShowAlways, Survey: &SurveyLook{Label: "sink", Hint: "mass on key 0; > 0.3 = sink head", Order: 4, When: ShowAlways},
		Value: func(s *Stats, _ *HeadStats) float64 { return s.Sink }},
	{Name: "doc_sink", Doc: "mean mass on the first key of the query's own document (= `sink` without `segments`)",
		Value: func(s *Stats, _ *HeadStats) float64 { return s.DocSink }},
	{Name: "distinctness", Doc: "mean Jensen-Shannon divergence (nats, 0 to ln 2) to the layer's other heads over the same rows (Clark et al. 2019, sec. 6): low = the head duplicates others, high = it attends unlike them. Long sequences use at most 128 evenly spaced query rows per (layer, batch item)",
		Aliases: []string{"redundancy"}, LowFirst: true, Text: ShowAlways,
		Survey: &SurveyLook{Label: "distinctness", Unit: "nats", Hint: "mean JS divergence to the layer's other heads; low = a duplicate", Order: 6, When: ShowAlways},
		Value:  func(s *Stats, _ *HeadStats) float64 { return s.Distinctness }},
	{Name: "importance", Doc: "Michel et al. (2019) head importance, E_x |sum_{q,k} A G|; null without `BLOCK/grad`",
		LowFirst: true, Text: ShowWithGrad, Value: func(s *Stats, _ *HeadStats) float64 { return s.Importance }},
	{Name: "importance_norm", Doc: "importance divided by the L2 norm of its layer's importances (Michel et al. 2019); null without gradients",
		LowFirst: true, Text: ShowWithGrad,
		Survey: &SurveyLook{Label: "importance", Hint: "Michel et al. 2019, normalised per layer; low = prunable", Order: 2, When: ShowWithGrad},
		Value:  headOnly(func(h *HeadStats) float64 { return h.ImportanceNorm })},
	{Name: ScoreName, Doc: "the heuristic score used without gradients: confidence x distinctness / ln 2 (low = diffuse and duplicated: a candidate to prune)",
		Aliases: []string{"confidence_x_js"}, LowFirst: true, Text: ShowWithoutGrad,
		Survey: &SurveyLook{Label: ScoreName, Hint: "no gradients: confidence × distinctness, a heuristic; low = prunable", Order: 2, When: ShowWithoutGrad},
		Value:  headOnly(func(h *HeadStats) float64 { return h.Score })},
	{Name: "leak_mass", Doc: "forbidden mass per judged row (all mask rules)",
		Survey: &SurveyLook{Label: "leak mass", Unit: "per row", Hint: "forbidden mass, log scale; 0 = clean, ! = any leak", Log: true, Order: 3, When: ShowAlways},
		Value:  func(s *Stats, _ *HeadStats) float64 { return s.LeakMass }},
	{Name: "rows", Doc: "judged rows with finite values", Count: true,
		Value: func(s *Stats, _ *HeadStats) float64 { return float64(s.Rows) }},
	{Name: "nan_rows", Doc: "judged rows holding NaN or Inf", Count: true,
		Value: func(s *Stats, _ *HeadStats) float64 { return float64(s.NaNRows) }},
}

// extraStats are the statistics of the table declared with Row, in table
// order: Stats.Extra[i] and the pass's accumulators follow this order.
var extraStats []Statistic

// Statistics returns the table of per-head statistics in output order (a
// copy: changing it changes nothing).
func Statistics() []Statistic { return append([]Statistic(nil), statistics...) }

// HeadKeys are the columns that name a head in a table of heads.
var HeadKeys = []string{"block", "layer", "head"}

// HeadColumns returns the columns of a table of heads in output order:
// HeadKeys, then every statistic (heed rank's JSON fields, CSV header and
// --sort keys; aliases not included).
func HeadColumns() []string {
	cols := append([]string(nil), HeadKeys...)
	for i := range statistics {
		cols = append(cols, statistics[i].Name)
	}
	return cols
}

// TextColumns returns the columns of heed rank's text table for exports
// with (grad) or without gradients: HeadKeys, then the statistics shown.
func TextColumns(grad bool) []string {
	cols := append([]string(nil), HeadKeys...)
	for i := range statistics {
		if statistics[i].Text.With(grad) {
			cols = append(cols, statistics[i].Name)
		}
	}
	return cols
}

// Register adds a statistic computed by the engine (Row set, Value nil) at
// the end of the table. Call it before any pass (from an init function or
// at the start of a test), never while one runs: the table is read without
// a lock. It refuses a name or alias the table already has.
func Register(s Statistic) error {
	if s.Name == "" || s.Row == nil || s.Value != nil {
		return fmt.Errorf("analysis: statistic %q: give a name and a row function, and no Value", s.Name)
	}
	for _, n := range append([]string{s.Name}, s.Aliases...) {
		if n == "" || isColumn(n) {
			return fmt.Errorf("analysis: statistic %q: the name %q is taken", s.Name, n)
		}
	}
	i := len(extraStats)
	s.Value = func(st *Stats, _ *HeadStats) float64 {
		if i < len(st.Extra) {
			return st.Extra[i]
		}
		return math.NaN()
	}
	statistics = append(statistics, s)
	extraStats = append(extraStats, s)
	return nil
}

func isColumn(n string) bool {
	if slices.Contains(HeadKeys, n) {
		return true
	}
	for i := range statistics {
		if statistics[i].Name == n || slices.Contains(statistics[i].Aliases, n) {
			return true
		}
	}
	return false
}

// rowStatNames are the names of the statistics declared with Row, in order.
func rowStatNames() []string {
	var ns []string
	for _, s := range extraStats {
		ns = append(ns, s.Name)
	}
	return ns
}

// Order returns the indices of vals in the order heads are ranked by a
// statistic: ascending, or descending with desc; NaN (no value) last;
// ties in index order. heed rank's --sort and the Survey's order use it.
func Order(vals []float64, desc bool) []int {
	order := make([]int, len(vals))
	for i := range order {
		order[i] = i
	}
	slices.SortStableFunc(order, func(a, b int) int {
		va, vb := vals[a], vals[b]
		if na, nb := math.IsNaN(va), math.IsNaN(vb); na || nb {
			return cmpBool(na, nb)
		}
		if desc {
			va, vb = vb, va
		}
		switch {
		case va < vb:
			return -1
		case va > vb:
			return 1
		}
		return 0
	})
	return order
}

// cmpBool orders false before true.
func cmpBool(a, b bool) int {
	switch {
	case a == b:
		return 0
	case a:
		return 1
	}
	return -1
}
