package trace_test

import (
	"context"
	"fmt"

	"github.com/heed-dev/heed/analysis/trace"
	"github.com/heed-dev/heed/loader"
)

// Explain one query position by attention rollout.
func ExampleTrace() {
	ex, err := loader.Open([]string{"../../testdata/cases/shift_good.npz"}, loader.NewOptions())
	if err != nil {
		fmt.Println(err)
		return
	}
	defer ex.Close()
	r, err := trace.Trace(context.Background(), ex, trace.Options{Method: trace.MethodRollout, Query: 3})
	if err != nil {
		fmt.Println(err)
		return
	}
	var sum float64
	for _, t := range r.Tokens {
		sum += t.Share
	}
	fmt.Printf("%s query %d: %d tokens, shares sum to %.3f, normalised %v\n", r.Block, r.Query, len(r.Tokens), sum, r.Normalised)
	fmt.Println("key 4 is", r.Tokens[4].Status)
	// Output:
	// decoder query 3: 12 tokens, shares sum to 1.000, normalised true
	// key 4 is future
}
