package analysis

import (
	"encoding/json"
	"math"
	"math/rand/v2"
	"os/exec"
	"slices"
	"strings"
	"testing"

	"github.com/heed-dev/heed/internal/testpy"
)

// Order is numpy's stable argsort: ascending for desc = false, of the
// negated values for desc = true (numpy.argsort(kind="stable") puts NaN
// last either way and keeps ties in index order, per its documentation), on
// random values with ties and NaNs.
func TestOrderIsNumpyStableArgsort(t *testing.T) {
	py := testpy.Require(t, "numpy")
	rng := rand.New(rand.NewPCG(21, 22))
	var cases [][]float64
	for _, n := range []int{0, 1, 2, 7, 64, 300} {
		v := make([]float64, n)
		for i := range v {
			switch rng.IntN(5) {
			case 0:
				v[i] = math.NaN()
			case 1:
				v[i] = float64(rng.IntN(3)) // ties
			default:
				v[i] = rng.NormFloat64()
			}
		}
		cases = append(cases, v)
	}
	// JSON has no NaN: send null for it
	enc := make([][]*float64, len(cases))
	for i, v := range cases {
		enc[i] = make([]*float64, len(v))
		for j := range v {
			if !math.IsNaN(v[j]) {
				enc[i][j] = &v[j]
			}
		}
	}
	in, err := json.Marshal(enc)
	if err != nil {
		t.Fatal(err)
	}
	script := `
import json, sys
import numpy as np
out = []
for v in json.load(sys.stdin):
    a = np.array([np.nan if x is None else x for x in v], dtype=np.float64)
    out.append([np.argsort(a, kind="stable").tolist(), np.argsort(-a, kind="stable").tolist()])
json.dump(out, sys.stdout)
`
	cmd := exec.Command(py, "-c", script)
	cmd.Stdin = strings.NewReader(string(in))
	got, err := cmd.Output()
	if err != nil {
		t.Fatalf("numpy: %v", err)
	}
	var want [][2][]int
	if err := json.Unmarshal(got, &want); err != nil {
		t.Fatal(err)
	}
	for i, v := range cases {
		if asc := Order(v, false); !slices.Equal(asc, want[i][0]) {
			t.Errorf("Order(%v, asc) = %v, numpy %v", v, asc, want[i][0])
		}
		if desc := Order(v, true); !slices.Equal(desc, want[i][1]) {
			t.Errorf("Order(%v, desc) = %v, numpy %v", v, desc, want[i][1])
		}
	}
}
