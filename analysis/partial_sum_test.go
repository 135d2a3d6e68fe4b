package analysis

import (
	"encoding/json"
	"math"
	"math/big"
	"math/rand/v2"
	"testing"
)

// TestSumExact compares Sum with an exact big.Float sum (math/big as the
// reference: arbitrary precision, then rounded once to float64).
func TestSumExact(t *testing.T) {
	r := rand.New(rand.NewPCG(1, 2))
	for trial := 0; trial < 50; trial++ {
		n := 1 + r.IntN(2000)
		xs := make([]float64, n)
		ref := new(big.Float).SetPrec(4096)
		for i := range xs {
			// magnitudes from 2^-70 to 2^40, both signs: all exactly representable in the fixed point
			x := (r.Float64() - 0.5) * math.Ldexp(1, r.IntN(110)-70)
			xs[i] = x
			ref.Add(ref, new(big.Float).SetFloat64(x))
		}
		want, _ := ref.Float64()
		var s Sum
		for _, x := range xs {
			s.Add(x)
		}
		if got := s.Float64(); got != want {
			t.Fatalf("trial %d: Sum = %v, want %v (big.Float)", trial, got, want)
		}
		// any order, any split: the same state bit for bit
		r.Shuffle(n, func(i, j int) { xs[i], xs[j] = xs[j], xs[i] })
		var a, b Sum
		cut := r.IntN(n + 1)
		for _, x := range xs[:cut] {
			a.Add(x)
		}
		for _, x := range xs[cut:] {
			b.Add(x)
		}
		a.Merge(b)
		if a != s {
			t.Fatalf("trial %d: merged halves %v != single %v", trial, a, s)
		}
		js, err := json.Marshal(s)
		if err != nil {
			t.Fatal(err)
		}
		var back Sum
		if err := json.Unmarshal(js, &back); err != nil {
			t.Fatal(err)
		}
		if back != s {
			t.Fatalf("JSON round trip %s: %v != %v", js, back, s)
		}
	}
}

func TestSumSpecial(t *testing.T) {
	cases := []struct {
		in   []float64
		want float64
	}{
		{nil, 0},
		{[]float64{1, -1}, 0},
		{[]float64{1e-300}, 0}, // below 2^-128: truncated, documented
		{[]float64{-0.5, -0.25}, -0.75},
		{[]float64{math.Inf(1), 1}, math.Inf(1)},
		{[]float64{math.Inf(-1)}, math.Inf(-1)},
		{[]float64{math.Inf(1), math.Inf(-1)}, math.NaN()},
		{[]float64{math.NaN(), 2}, math.NaN()},
		{[]float64{1e30}, math.Inf(1)}, // beyond the range: an infinity of its sign
	}
	for _, c := range cases {
		var s Sum
		for _, x := range c.in {
			s.Add(x)
		}
		got := s.Float64()
		if !(got == c.want || math.IsNaN(got) && math.IsNaN(c.want)) {
			t.Errorf("Sum(%v) = %v, want %v", c.in, got, c.want)
		}
		js, _ := json.Marshal(s)
		var back Sum
		if err := json.Unmarshal(js, &back); err != nil || back != s {
			t.Errorf("round trip of %s: %v %v", js, back, err)
		}
	}
	var bad Sum
	if err := json.Unmarshal([]byte(`"12"`), &bad); err == nil {
		t.Error("short hex accepted")
	}
}
