package analysis

// Extent is the bounding box of the cells of one (layer, batch item, head)
// that a rule forbids and that carry more than a tolerance: where a leak
// sits in the head, so that a view can show all of it at once.
type Extent struct {
	Q0, Q1, K0, K1 int     // inclusive bounds
	Cells          int     // forbidden cells carrying mass
	Mass           float64 // their total weight
}

// LeakExtent scans the rows of one head (row(q, dst) fills dst with query
// row q, len dst = r.Keys) and returns the extent of the cells rule forbids
// with a weight above tol, judged rows only (padding query rows are not
// judged, as in the pass). ok is false when no such cell exists.
func LeakExtent(r *Rules, rule Rule, batch, head int, tol float32, row func(q int, dst []float32) error) (e Extent, ok bool, err error) {
	w := make([]float32, r.Keys)
	rules := make([]Rule, r.Keys)
	e = Extent{Q0: r.Queries, K0: r.Keys, Q1: -1, K1: -1}
	for q := 0; q < r.Queries; q++ {
		if !r.Judged(batch, q) {
			continue
		}
		if err := row(q, w); err != nil {
			return Extent{}, false, err
		}
		if err := r.CellRow(batch, head, q, rules); err != nil {
			return Extent{}, false, err
		}
		for k, v := range w {
			if v > tol && rules[k] == rule {
				e.Q0, e.Q1 = min(e.Q0, q), max(e.Q1, q)
				e.K0, e.K1 = min(e.K0, k), max(e.K1, k)
				e.Cells++
				e.Mass += float64(v)
			}
		}
	}
	return e, e.Cells > 0, nil
}
