package views

import (
	"math"
)

// Fixtures for the golden tests. The matrices are row-wise softmaxes of
// scores -|q-k|/tau (a distance-decaying head, common practice in tests of
// attention code), under a causal mask; the leaking variant lets one more key
// through per row (k = q+1), the "mask shifted by +1" pattern of users' bug
// reports. They exercise the renderers only; the numbers are not results.

var demoTokens = []string{"<s>", "The", " cat", " sat", " on", " the", " mat", ".", " It", " was", " warm", ".", "\n", " Then", " it", " slept"}

func softmaxRows(q, k int, score func(i, j int) float64, allowed func(i, j int) bool) []float32 {
	w := make([]float32, q*k)
	for i := 0; i < q; i++ {
		m := math.Inf(-1)
		for j := 0; j < k; j++ {
			if allowed(i, j) {
				m = math.Max(m, score(i, j))
			}
		}
		var z float64
		for j := 0; j < k; j++ {
			if allowed(i, j) {
				z += math.Exp(score(i, j) - m)
			}
		}
		for j := 0; j < k; j++ {
			if allowed(i, j) && z > 0 {
				w[i*k+j] = float32(math.Exp(score(i, j)-m) / z)
			}
		}
	}
	return w
}

func causalRule(q, k int) string {
	if k > q {
		return "causal"
	}
	return ""
}

func distanceScore(tau float64) func(i, j int) float64 {
	return func(i, j int) float64 { return -math.Abs(float64(i-j)) / tau }
}

// causalMap is an n x n causal head; leakShift lets keys up to q+leakShift through.
func causalMap(n int, leakShift int, toks []string) *MapData {
	w := softmaxRows(n, n, distanceScore(2), func(i, j int) bool { return j <= i+leakShift })
	d := NewMapData(n, n, w)
	d.Rule = causalRule
	d.QueryTokens, d.KeyTokens = toks, toks
	return d
}

// paddedMap is an n x n causal head whose last pad keys are padding: rows
// of real queries put no mass on them, and the padding query rows are not
// judged (their rule is "" and their weights those of a plain causal row).
func paddedMap(n, pad int, toks []string) *MapData {
	real := n - pad
	w := softmaxRows(n, n, distanceScore(2), func(i, j int) bool { return j <= i && (j < real || i >= real) })
	d := NewMapData(n, n, w)
	d.Rule = func(q, k int) string {
		switch {
		case q >= real:
			return ""
		case k >= real:
			return "padding"
		}
		return causalRule(q, k)
	}
	d.QueryTokens, d.KeyTokens = toks, toks
	return d
}
