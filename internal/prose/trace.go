package prose

import (
	"fmt"
	"math"
	"sort"
	"strings"

	"github.com/heed-dev/heed/analysis/trace"
)

// TraceScale says how the shares of a trace are scaled (trace.Result's
// Scale, which heed trace prints in its text and its JSON).
func TraceScale(r *trace.Result) string {
	switch {
	case r.Normalised:
		return "shares sum to 1 over the input tokens"
	case r.LessIdentity:
		return "relevance the layers add (Chefer et al.'s R less its identity start), not normalised: % is of the total"
	}
	return "not normalised: % is of the total"
}

// TraceSummary is one sentence on what the explanation says: the positions
// with the largest shares among the keys the query may see, and how much
// of the total they hold.
func TraceSummary(r *trace.Result) string {
	// percentages as the columns show them: of 1 for normalised shares,
	// of the total over the keys the query may see otherwise
	var seenTotal, all float64
	var seen []trace.TokenShare
	for _, t := range r.Tokens {
		if math.IsNaN(t.Share) || t.Share <= 0 {
			continue
		}
		all += t.Share
		if t.Status == "" {
			seenTotal += t.Share
			seen = append(seen, t)
		}
	}
	if seenTotal <= 0 {
		return "no input token the query may see carries a share"
	}
	denom := seenTotal
	if r.Normalised {
		denom = all
	}
	sort.SliceStable(seen, func(i, j int) bool { return seen[i].Share > seen[j].Share })
	n := min(3, len(seen))
	var parts []string
	var top float64
	for _, t := range seen[:n] {
		name := fmt.Sprintf("position %d (%.0f%%)", t.Index, 100*t.Share/denom)
		if t.Token != "" {
			name = fmt.Sprintf("%q (%d, %.0f%%)", t.Token, t.Index, 100*t.Share/denom)
		}
		parts = append(parts, name)
		top += t.Share
	}
	what := fmt.Sprintf("query %d", r.Query)
	if r.QueryToken != "" {
		what = fmt.Sprintf("query %d %q", r.Query, r.QueryToken)
	}
	s := fmt.Sprintf("by %s, %s draws most on %s: %.0f%% together", r.Method, what, strings.Join(parts, ", "), 100*top/denom)
	if leak := all - seenTotal; all > 0 && leak/all > 0.005 {
		s += fmt.Sprintf("; %.0f%% reaches keys the query may not see (a leak)", 100*leak/all)
	}
	return s
}
