package analysis

import (
	"math"
	"sort"
)

// RowKey is one key of a query row: its index, weight and the mask rule
// that forbids it (RuleNone when allowed).
type RowKey struct {
	Key    int
	Weight float32
	Rule   Rule
}

// RowSummary describes one query row of one head, for a person looking at
// it: its sum, its entropy, its forbidden mass and its heaviest keys.
type RowSummary struct {
	// Sum is sum_k A[q,k]; Entropy -sum_k A ln A in nats with 0 ln 0 = 0
	// (Clark et al. 2019, sec. 3.3); both NaN when the row holds NaN.
	Sum, Entropy float64
	// Forbidden is the mass on keys a rule forbids and ForbiddenKeys how
	// many such keys carry more than tol.
	Forbidden     float64
	ForbiddenKeys int
	// Top are the heaviest keys, largest first (ties: lower key first);
	// a NaN weight sorts first.
	Top []RowKey
}

// SummarizeRow summarises row (the weights of one query row) with rules[k]
// the rule forbidding key k (nil: every key allowed), keeping the top
// heaviest keys.
func SummarizeRow(row []float32, rules []Rule, top int, tol float32) RowSummary {
	var s RowSummary
	for k, v := range row {
		s.Sum += float64(v)
		if v > 0 {
			s.Entropy -= float64(v) * math.Log(float64(v))
		}
		if rules != nil && rules[k] != RuleNone && v > tol {
			s.Forbidden += float64(v)
			s.ForbiddenKeys++
		}
		if v != v {
			s.Entropy = math.NaN()
		}
	}
	idx := make([]int, len(row))
	for i := range idx {
		idx[i] = i
	}
	key := func(v float32) float64 {
		if v != v {
			return math.Inf(1)
		}
		return float64(v)
	}
	sort.SliceStable(idx, func(i, j int) bool { return key(row[idx[i]]) > key(row[idx[j]]) })
	for _, k := range idx[:min(top, len(idx))] {
		r := RuleNone
		if rules != nil {
			r = rules[k]
		}
		s.Top = append(s.Top, RowKey{Key: k, Weight: row[k], Rule: r})
	}
	return s
}
