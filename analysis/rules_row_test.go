package analysis

import (
	"math"
	"testing"
)

func TestSummarizeRow(t *testing.T) {
	// entropy of [.5, .25, .25] = 1.039721 nats (derived in the project's
	// methods notes from Clark et al. 2019's definition)
	s := SummarizeRow([]float32{0.5, 0.25, 0.25}, nil, 2, 0)
	if math.Abs(s.Entropy-1.039721) > 1e-6 || math.Abs(s.Sum-1) > 1e-7 {
		t.Errorf("SummarizeRow([.5 .25 .25]) entropy %v sum %v, want 1.039721 and 1", s.Entropy, s.Sum)
	}
	if len(s.Top) != 2 || s.Top[0].Key != 0 || s.Top[1].Key != 1 {
		t.Errorf("top %+v, want keys 0 then 1 (ties: lower key first)", s.Top)
	}
	// uniform over 64 keys: ln 64 = 4.158883 (the same notes)
	u := make([]float32, 64)
	for i := range u {
		u[i] = 1.0 / 64
	}
	if s := SummarizeRow(u, nil, 1, 0); math.Abs(s.Entropy-4.158883) > 1e-5 {
		t.Errorf("uniform over 64: entropy %v, want ln 64 = 4.158883", s.Entropy)
	}
	// a causal row q = 1 of 4 keys with 0.1 leaking onto key 3
	rules := []Rule{RuleNone, RuleNone, RuleCausal, RuleCausal}
	s = SummarizeRow([]float32{0.6, 0.3, 0, 0.1}, rules, 4, 1e-6)
	if math.Abs(s.Forbidden-0.1) > 1e-7 || s.ForbiddenKeys != 1 || s.Top[2].Key != 3 || s.Top[2].Rule != RuleCausal {
		t.Errorf("leaking row: %+v", s)
	}
	if s := SummarizeRow([]float32{0.5, float32(math.NaN())}, nil, 1, 0); !math.IsNaN(s.Entropy) || s.Top[0].Key != 1 {
		t.Errorf("NaN row: %+v", s)
	}
}
