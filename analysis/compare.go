package analysis

import (
	"context"
	"fmt"
	"math"
	"sort"

	"github.com/heed-dev/heed/loader"
)

// HeadDiff is how much one head differs between two exports of the same
// shape (before and after a fix, eager against fused, batch of one against
// padded).
type HeadDiff struct {
	Layer, Head int
	// TV is the mean over query rows of the total variation distance
	// 0.5 * sum_k |A - B| between A's and B's rows (common practice for
	// comparing distributions): 0 = the same rows, 1 = rows with no key in
	// common. NaN when a cell is NaN in either (a NaN is a change).
	TV float64
	// MaxAbs is the largest |A - B| and (Q, K) the cell where it is.
	MaxAbs float64
	Q, K   int
}

// TVDoc says what HeadDiff.TV measures, for the screens that show it.
const TVDoc = "mean total variation: half the sum of |A−B| over a row's keys, averaged over rows; 0 = same, 1 = no key in common"

// DiffHead measures one head, a and b row-major Q x K.
func DiffHead(layer, head, Q, K int, a, b []float32) HeadDiff {
	hc := HeadDiff{Layer: layer, Head: head}
	var tv float64
	for q := 0; q < Q; q++ {
		var row float64
		for k := 0; k < K; k++ {
			d := math.Abs(float64(a[q*K+k]) - float64(b[q*K+k]))
			row += d
			if d > hc.MaxAbs || (math.IsNaN(d) && !math.IsNaN(hc.MaxAbs)) {
				hc.MaxAbs, hc.Q, hc.K = d, q, k
			}
		}
		tv += 0.5 * row
	}
	if Q > 0 {
		hc.TV = tv / float64(Q)
	}
	return hc
}

// CompareBlocks measures every head of batch item batch of two blocks of
// the same shape and returns them most changed first (NaN first: a NaN is
// a change). progress, when set, is called after each head.
func CompareBlocks(ctx context.Context, a, b *loader.Block, batch int, progress func(done, total int64)) ([]HeadDiff, error) {
	if a.Layers != b.Layers || a.Heads != b.Heads || a.Queries != b.Queries || a.Keys != b.Keys {
		return nil, fmt.Errorf("analysis: block %s: shapes differ (%d layers, %d heads, %d x %d against %d, %d, %d x %d)",
			a.Name, a.Layers, a.Heads, a.Queries, a.Keys, b.Layers, b.Heads, b.Queries, b.Keys)
	}
	Q, K := a.Queries, a.Keys
	wa, wb := make([]float32, Q*K), make([]float32, Q*K)
	total := int64(a.Layers * a.Heads)
	out := make([]HeadDiff, 0, total)
	for l := 0; l < a.Layers; l++ {
		for h := 0; h < a.Heads; h++ {
			if err := ctx.Err(); err != nil {
				return nil, err
			}
			if err := a.ReadAttn(l, batch, h, wa); err != nil {
				return nil, err
			}
			if err := b.ReadAttn(l, batch, h, wb); err != nil {
				return nil, err
			}
			out = append(out, DiffHead(l, h, Q, K, wa, wb))
			if progress != nil {
				progress(int64(len(out)), total)
			}
		}
	}
	key := func(v float64) float64 {
		if math.IsNaN(v) {
			return math.Inf(1)
		}
		return v
	}
	sort.SliceStable(out, func(i, j int) bool { return key(out[i].TV) > key(out[j].TV) })
	return out, nil
}
