package analysis_test

import (
	"context"
	"fmt"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/loader"
)

// Check an export: every mask and row check and the per-head statistics in
// one pass, then the verdict and what the first finding says.
func ExampleAnalyze() {
	ex, err := loader.Open([]string{"../testdata/cases/shift_bad.npz"}, loader.NewOptions())
	if err != nil {
		fmt.Println(err)
		return
	}
	defer ex.Close()
	p, err := analysis.Analyze(context.Background(), ex, analysis.DefaultOptions())
	if err != nil {
		fmt.Println(err)
		return
	}
	res := p.Result()
	fmt.Println("verdict:", res.Verdict())
	f := res.Findings[0]
	fmt.Printf("%s leak in layers %v, heads %v, offset %+d, worst at %s\n", f.Rule, f.Layers, f.Heads, f.Offsets[0].Offset, f.Worst)
	fmt.Println(res.Diagnoses[0].Pattern)
	// Output:
	// verdict: findings
	// causal leak in layers [0 1], heads [0 1 2 3], offset +1, worst at decoder:L0:H0:B1:q1:k2
	// mask_shifted
}
