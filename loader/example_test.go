package loader_test

import (
	"fmt"

	"github.com/heed-dev/heed/loader"
)

// Open a heed-export/1 file and read one head's attention matrix.
func ExampleOpen() {
	ex, err := loader.Open([]string{"../testdata/cases/shift_bad.npz"}, loader.NewOptions())
	if err != nil {
		fmt.Println(err)
		return
	}
	defer ex.Close()
	for _, b := range ex.Blocks {
		fmt.Printf("%s: %s, %d layers x %d batch x %d heads x %d x %d (axes from %s)\n",
			b.Name, b.Kind, b.Layers, b.Batch, b.Heads, b.Queries, b.Keys, b.AxesFrom)
	}
	b := ex.Block("decoder")
	a := make([]float32, b.Queries*b.Keys)
	if err := b.ReadAttn(1, 0, 2, a); err != nil { // layer 1, batch item 0, head 2
		fmt.Println(err)
		return
	}
	var row float32
	for _, v := range a[:b.Keys] {
		row += v
	}
	fmt.Printf("query 0 of layer 1 head 2 sums to %.3f\n", row)
	// Output:
	// decoder: causal, 2 layers x 2 batch x 4 heads x 12 x 12 (axes from metadata)
	// query 0 of layer 1 head 2 sums to 1.000
}
