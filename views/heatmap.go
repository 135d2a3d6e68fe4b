package views

import (
	"fmt"
	"math"
	"runtime"
	"strconv"
	"strings"
	"sync"
	"unsafe"
)

// Agg is how a pixel that covers several cells combines their weights.
type Agg uint8

// Aggregations of a downsampled pixel.
const (
	AggMean Agg = iota
	AggMax
)

func (a Agg) String() string { return enumName(a, "mean", "max") }

// Scale maps weights to colours.
type Scale uint8

// Scales of the heat maps.
const (
	Linear Scale = iota
	Log
)

func (s Scale) String() string { return enumName(s, "linear", "log") }

// enumName is names[v], names[0] for a value past the list.
func enumName[T ~uint8](v T, names ...string) string {
	if int(v) < len(names) {
		return names[v]
	}
	return names[0]
}

// LogDecades is how many decades below the maximum the log scale spans.
const LogDecades = 4

// MaxMag is the largest magnification (columns and half-lines per cell).
const MaxMag = 8

// MapData is one head's query x key matrix and what the Map needs to label
// it. Weights are not modified.
type MapData struct {
	Q, K    int
	Weights []float32 // row-major Q x K
	// Raw, when Weights is nil, holds the matrix as row-major 16-bit
	// patterns (float16 or bfloat16 as stored), RawValue giving the float32
	// of each pattern: the Map reads a head without converting it first.
	Raw      []uint16
	RawValue *[65536]float32
	// Rule returns the name of the mask rule that forbids (q, k), "" when
	// the cell is allowed; nil means every cell is allowed.
	Rule func(q, k int) string
	// RowRuns, when set, gives Rule for a whole row q at once, as runs of
	// keys sharing a rule: keys [ends[i-1], ends[i]) (ends[-1] = 0) have
	// rule rules[i], "" = allowed. Downsample uses it instead of a call per
	// cell and looks only at the forbidden runs for marks. It must be safe
	// to call from several goroutines at once: Downsample splits a large
	// matrix over the processors (Rule alone is only ever called from one).
	RowRuns func(q int) (ends []int32, rules []string)
	// QueryTokens and KeyTokens label the axes (nil: indices only).
	QueryTokens, KeyTokens []string
	// QueryOffset is the absolute position of query row 0.
	QueryOffset int
	// Tol: forbidden cells whose weight is <= Tol are not marked.
	Tol float32
	// VMax and VMaxNoSink are the largest finite weights with and without key
	// column 0; they fix the colour scale (NewMapData fills them in).
	VMax, VMaxNoSink float32
	// Measure names the value in the readout and legend ("weight" by default).
	Measure string
	// Describe, when set, adds text about (q, k) to the cursor readout.
	Describe func(q, k int) string
}

// NewMapData wraps a Q x K matrix and computes its scale maxima.
func NewMapData(q, k int, weights []float32) *MapData {
	d := &MapData{Q: q, K: k, Weights: weights, Measure: "weight"}
	d.VMax, d.VMaxNoSink = MatrixMax(q, k, weights)
	return d
}

// NewMapData16 is NewMapData for a matrix held as 16-bit patterns (Raw).
func NewMapData16(q, k int, raw []uint16, value *[65536]float32) *MapData {
	d := &MapData{Q: q, K: k, Raw: raw, RawValue: value, Measure: "weight"}
	// Positive patterns (sign bit clear) are ordered as their values, up to
	// the first that is +Inf (then NaN): the largest finite value is the
	// value of the largest pattern below that one.
	lim := uint16(0x8000)
	for i := uint16(0); i < 0x8000; i++ {
		if v := value[i]; v != v || math.IsInf(float64(v), 1) {
			lim = i
			break
		}
	}
	// rows in chunks over the processors, each chunk's maxima then merged:
	// the same patterns whatever the split
	var mu sync.Mutex
	var all, noSink uint16
	inChunks(q, q*k, func(lo, hi int) {
		a, n := max16(raw[lo*k:hi*k], k, lim)
		mu.Lock()
		all, noSink = max(all, a), max(noSink, n)
		mu.Unlock()
	})
	d.VMax, d.VMaxNoSink = max(value[all], 0), max(value[noSink], 0)
	return d
}

// max16 returns the largest pattern below lim of the rows of m (k patterns
// each), and the largest outside column 0. Patterns below lim (sign bit
// clear, below +Inf) are ordered as their values.
func max16(m []uint16, k int, lim uint16) (all, noSink uint16) {
	if k <= 0 {
		return 0, 0
	}
	for i := 0; i+k <= len(m); i += k {
		row := m[i : i+k]
		// the largest pattern of the row past column 0 (laneMax); a row with
		// a pattern at or above lim (negative, Inf, NaN) takes the loop that
		// leaves them out
		rest := row[min(1, len(row)):]
		mx, or := laneMax(rest)
		if or&0x8000 == 0 && mx < lim {
			noSink = max(noSink, mx)
		} else {
			for _, p := range rest {
				if p < lim && p > noSink {
					noSink = p
				}
			}
		}
		all = max(all, noSink)
		if len(row) > 0 && row[0] < lim {
			all = max(all, row[0])
		}
	}
	return all, noSink
}

// laneMax returns the largest pattern of xs and the OR of all of them,
// valid as a maximum when that OR has no sign bit (bit 15) set. Four lanes
// of 16 bits a word, four words a step in four running maxima: while every
// pattern is below 0x8000, (m | 0x8000) - v keeps to each lane and sets its
// top bit exactly where m >= v.
func laneMax(xs []uint16) (uint16, uint64) {
	var m0, m1, m2, m3, or uint64
	n := len(xs) &^ 15
	for j := 0; j < n; j += 16 {
		w := (*[4]uint64)(unsafe.Pointer(&xs[j])) // lane order does not matter for a maximum
		or |= w[0] | w[1] | w[2] | w[3]
		m0, m1, m2, m3 = laneMax2(m0, w[0]), laneMax2(m1, w[1]), laneMax2(m2, w[2]), laneMax2(m3, w[3])
	}
	m := laneMax2(laneMax2(m0, m1), laneMax2(m2, m3))
	or |= or >> 32
	or |= or >> 16
	mx := max(uint16(m), uint16(m>>16), uint16(m>>32), uint16(m>>48))
	for _, p := range xs[n:] {
		or |= uint64(p)
		mx = max(mx, p)
	}
	return mx, or
}

// laneMax2 is the lane by lane maximum of m and v, whose lanes are below
// 0x8000.
func laneMax2(m, v uint64) uint64 {
	const top = 0x8000800080008000
	t := ((m | top) - v) & top // the top bit of the lanes where m >= v
	ge := (t - t>>15) | t      // those lanes all ones
	return m&ge | v&^ge
}

// inChunks calls fn on [lo, hi) ranges that cover [0, n), one goroutine a
// range over the processors when the work (cells) is large enough to pay
// for them, else once with [0, n) on the caller's goroutine; it returns
// when every call has.
func inChunks(n, cells int, fn func(lo, hi int)) {
	parts := min(runtime.GOMAXPROCS(0), n)
	if cells < 1<<20 || parts < 2 {
		fn(0, n)
		return
	}
	var wg sync.WaitGroup
	for i := 0; i < parts; i++ {
		lo, hi := i*n/parts, (i+1)*n/parts
		wg.Add(1)
		go func() {
			defer wg.Done()
			fn(lo, hi)
		}()
	}
	wg.Wait()
}

// At returns the weight of cell (q, k).
func (d *MapData) At(q, k int) float32 {
	if d.Weights == nil && d.Raw != nil {
		return d.RawValue[d.Raw[q*d.K+k]]
	}
	return d.Weights[q*d.K+k]
}

// row returns row q of the matrix: a slice of Weights, or Raw's row
// converted into buf (length K).
func (d *MapData) row(q int, buf []float32) []float32 {
	if d.Weights == nil && d.Raw != nil {
		for k, h := range d.Raw[q*d.K : (q+1)*d.K] {
			buf[k] = d.RawValue[h]
		}
		return buf
	}
	return d.Weights[q*d.K : (q+1)*d.K]
}

// MatrixMax returns the largest finite value of a q x k matrix, and the
// largest outside column 0 (the sink column).
func MatrixMax(q, k int, w []float32) (all, noSink float32) {
	for i := 0; i < q; i++ {
		row := w[i*k : (i+1)*k]
		for j, v := range row {
			// skip non-finite values (exponent bits all set) and, as
			// all >= noSink, values that can change neither maximum
			if math.Float32bits(v)&0x7f800000 == 0x7f800000 || v <= noSink {
				continue
			}
			if j > 0 {
				noSink = v
			}
			if v > all {
				all = v
			}
		}
	}
	return all, noSink
}

func (d *MapData) token(toks []string, i int) string {
	if i < 0 || i >= len(toks) {
		return ""
	}
	return toks[i]
}

func (d *MapData) rule(q, k int) string {
	if d.Rule == nil {
		return ""
	}
	return d.Rule(q, k)
}

// Pixels is a downsampled window of a MapData: each pixel covers a Block x
// Block square of cells (clipped at the matrix edge).
type Pixels struct {
	Rows, Cols int
	Q0, K0     int
	Block      int
	// Weight is the mean or max weight of each pixel; NaN when any of its
	// cells is NaN, so that a NaN row stays visible when zoomed out.
	Weight []float32
	// Forbid is the largest weight on a forbidden cell of the pixel that is
	// above the tolerance (0 when none): kept as a maximum at every zoom so
	// that one leaking cell stays visible.
	Forbid []float32
	// Rule names the rule of that cell ("" when none).
	Rule []string
	// Kind says what the mask rules make of every cell of the pixel:
	// KindAllowed (some cell allowed), KindMasked (every cell forbidden),
	// KindPadding (every cell forbidden, as padding keys): the Map draws the
	// rule under the data.
	Kind []uint8
}

// Pixel kinds (Pixels.Kind).
const (
	KindAllowed uint8 = iota
	KindMasked
	KindPadding
)

// Downsample aggregates rows x cols pixels of block x block cells starting at
// cell (q0, k0). It reads only those cells.
func Downsample(d *MapData, q0, k0, rows, cols, block int, agg Agg) *Pixels {
	if block < 1 {
		block = 1
	}
	if r := ceilDiv(d.Q-q0, block); rows > r {
		rows = r
	}
	if c := ceilDiv(d.K-k0, block); cols > c {
		cols = c
	}
	rows, cols = max(rows, 0), max(cols, 0)
	p := &Pixels{Rows: rows, Cols: cols, Q0: q0, K0: k0, Block: block,
		Weight: make([]float32, rows*cols), Forbid: make([]float32, rows*cols), Rule: make([]string, rows*cols), Kind: make([]uint8, rows*cols)}
	cells := rows * block * (p.keyEnd(d) - k0)
	if d.RowRuns == nil && d.Rule != nil {
		cells = 0 // Rule need not be safe to call from several goroutines
	}
	// pixel rows in chunks over the processors: each pixel depends on its
	// own cells only, so the pixels are the same whatever the split
	inChunks(rows, cells, func(lo, hi int) { downsampleRows(d, p, lo, hi, agg) })
	return p
}

// keyEnd is the end of the keys p covers: its window is keys [K0, keyEnd)
// of d.
func (p *Pixels) keyEnd(d *MapData) int { return min(p.K0+p.Cols*p.Block, d.K) }

// downsampleRows fills pixel rows [lo, hi) of p (see Downsample), whose
// window (Q0, K0, Block, Cols) says which cells they cover.
func downsampleRows(d *MapData, p *Pixels, lo, hi int, agg Agg) {
	cols := p.Cols
	q0, k0, kEnd, block := p.Q0, p.K0, p.keyEnd(d), p.Block
	sum := make([]float64, cols)
	cnt := make([]int32, cols)
	// forbidden cells and padding cells of each pixel of the row, for Kind
	nForbid := make([]int32, cols)
	nPad := make([]int32, cols)
	var buf []float32 // a converted row of Raw
	if d.Weights == nil {
		buf = make([]float32, d.K)
	}
	for pr := lo; pr < hi; pr++ {
		clear(sum)
		clear(cnt)
		clear(nForbid)
		clear(nPad)
		base := pr * cols
		qa := q0 + pr*block
		qb := min(qa+block, d.Q)
		for q := qa; q < qb; q++ {
			// a row of patterns is read through the table cell by cell,
			// without converting it first (but for Rule, which wants the
			// converted row); the values and their order are the same
			var row []float32
			var raw []uint16
			if d.Weights == nil && d.Raw != nil && (d.RowRuns != nil || d.Rule == nil) {
				raw = d.Raw[q*d.K : (q+1)*d.K]
			} else {
				row = d.row(q, buf)
			}
			for pc := 0; pc < cols; pc++ {
				ka := k0 + pc*block
				kb := min(ka+block, d.K)
				i := base + pc
				w := p.Weight[i]
				if w != w {
					continue
				}
				if raw != nil {
					w = aggRaw(raw[ka:kb], d.RawValue, agg, w, &sum[pc])
					cnt[pc] += int32(kb - ka)
					p.Weight[i] = w
					continue
				}
				cells := row[ka:kb]
				if agg == AggMax {
					for _, v := range cells {
						if v > w || v != v {
							w = v
							if v != v {
								break
							}
						}
					}
				} else {
					var s float64
					for _, v := range cells {
						if v != v {
							w = v
							break
						}
						s += float64(v)
					}
					sum[pc] += s
				}
				cnt[pc] += int32(kb - ka)
				p.Weight[i] = w
			}
			switch {
			case d.RowRuns != nil:
				markRuns(d, p, row, raw, q, base, ruleCounts{nForbid, nPad})
			case d.Rule != nil:
				// the row's rules cell by cell: count the forbidden cells
				// and mark the largest leak of each pixel still defined
				for k := k0; k < kEnd; k++ {
					r := d.Rule(q, k)
					if r == "" {
						continue
					}
					pc := (k - k0) / block
					nForbid[pc]++
					if r == "padding" {
						nPad[pc]++
					}
					i := base + pc
					if v := row[k]; v > d.Tol && v > p.Forbid[i] && p.Weight[i] == p.Weight[i] {
						p.Forbid[i], p.Rule[i] = v, r
					}
				}
			}
		}
		for pc := 0; pc < cols; pc++ {
			if n := cnt[pc]; n > 0 && nForbid[pc] == n {
				p.Kind[base+pc] = KindMasked
				if nPad[pc] == n {
					p.Kind[base+pc] = KindPadding
				}
			}
		}
		if agg == AggMean {
			for pc := 0; pc < cols; pc++ {
				i := base + pc
				if p.Weight[i] == p.Weight[i] && cnt[pc] > 0 {
					p.Weight[i] = float32(sum[pc] / float64(cnt[pc]))
				}
			}
		}
	}
}

// aggRaw is the pixel loop of Downsample over a run of patterns: the max
// or (adding into *sum) the sum of their values, w the pixel so far; NaN
// wins and stops the run, as on float32 rows.
func aggRaw(cells []uint16, tab *[65536]float32, agg Agg, w float32, sum *float64) float32 {
	if agg == AggMax {
		for _, h := range cells {
			if v := tab[h]; v > w || v != v {
				w = v
				if v != v {
					break
				}
			}
		}
		return w
	}
	var s float64
	for _, h := range cells {
		v := tab[h]
		if v != v {
			return v
		}
		s += float64(v)
	}
	*sum += s
	return w
}

// nextNonzero16 returns the first index in [k, end) of raw whose pattern is
// not +0 or -0, or end; four patterns a step.
func nextNonzero16(raw []uint16, k, end int) int {
	for ; k+4 <= end; k += 4 {
		if *(*uint64)(unsafe.Pointer(&raw[k]))&0x7fff7fff7fff7fff != 0 {
			break
		}
	}
	for ; k < end && raw[k]&0x7fff == 0; k++ {
	}
	return k
}

// ruleCounts are, per pixel column of a row, the cells a rule forbids
// (forbid) and those forbidden as padding keys (pad).
type ruleCounts struct{ forbid, pad []int32 }

// markRuns marks the pixels of row q (pixel row starting at base) that hold
// a forbidden cell above the tolerance, from the row's runs (MapData.RowRuns):
// from row, or from raw through the table when the row is patterns, and
// adds the row's forbidden cells to n. The keys are those of p's window.
func markRuns(d *MapData, p *Pixels, row []float32, raw []uint16, q, base int, n ruleCounts) {
	k0, kEnd, block := p.K0, p.keyEnd(d), p.Block
	ends, rules := d.RowRuns(q)
	a := 0
	for j, e := range ends {
		b, r := int(e), rules[j]
		lo, hi := max(a, k0), min(b, kEnd)
		a = b
		if r == "" || lo >= hi {
			continue
		}
		for k := lo; k < hi; {
			pc := (k - k0) / block
			end := min(hi, k0+(pc+1)*block)
			n.forbid[pc] += int32(end - k)
			if r == "padding" {
				n.pad[pc] += int32(end - k)
			}
			k = end
		}
		for k := lo; k < hi; k++ {
			var v float32
			if raw != nil {
				// a mask that holds leaves zeros: skip them four at a time
				if k = nextNonzero16(raw, k, hi); k == hi {
					break
				}
				v = d.RawValue[raw[k]]
			} else {
				v = row[k]
			}
			if !(v > d.Tol) {
				continue
			}
			i := base + (k-k0)/block
			if v > p.Forbid[i] && p.Weight[i] == p.Weight[i] {
				p.Forbid[i] = v
				p.Rule[i] = r
			}
		}
	}
}

// At returns pixel (r, c).
func (p *Pixels) At(r, c int) (w, forbid float32, rule string) {
	i := r*p.Cols + c
	return p.Weight[i], p.Forbid[i], p.Rule[i]
}

// MapOptions is the state of a Map screen that changes how it is drawn.
type MapOptions struct {
	CursorQ, CursorK int
	// Zoom 0 fits the whole matrix; each step halves the block or, at one
	// cell a pixel, doubles the magnification.
	Zoom int
	// Q0, K0 is the requested top-left cell; LayoutMap moves it to keep the
	// cursor in view and returns the one used.
	Q0, K0   int
	Agg      Agg
	Scale    Scale
	HideSink bool
}

// MapLayout is where everything of a Map goes on a w x h canvas; the TUI uses
// it to map mouse positions to cells.
type MapLayout struct {
	W, H                       int
	LabelW, HeaderH            int
	GridX, GridY, GridW, GridH int
	// RowsPerLine is 2 with half blocks, 1 with the glyph ramp.
	RowsPerLine int
	// Block cells a pixel side; a pixel takes MagX columns and MagY rows
	// (half-lines with half blocks).
	Block, MagX, MagY int
	Zoom, MaxZoom     int
	Q0, K0            int
	// PixRows, PixCols are the pixels in view.
	PixRows, PixCols int
	// KeyStart is the first key shown (1 when the sink column is hidden).
	KeyStart int
	// Vertical is true when key tokens are written downwards, one a column.
	Vertical bool
	// TooSmall is true when the canvas cannot hold a map.
	TooSmall bool
}

const (
	mapFooter   = 2
	maxTokW     = 12
	maxHeaderH  = 8
	minGridSide = 4
)

func digits(n int) int { return len(strconv.Itoa(max(n, 0))) }

func ceilDiv(a, b int) int {
	if a <= 0 {
		return 0
	}
	return (a + b - 1) / b
}

func maxTokenWidth(toks []string, limit int) int {
	w := 0
	for _, t := range toks {
		if n := StringWidth(t); n > w {
			w = n
			if w >= limit {
				return limit
			}
		}
	}
	return w
}

// LayoutMap computes the layout of d on a w x h canvas.
func LayoutMap(d *MapData, w, h int, opt MapOptions, st Styles) MapLayout {
	l := MapLayout{W: w, H: h, RowsPerLine: 1, Block: 1, MagX: 1, MagY: 1}
	if st.HalfBlocks() {
		l.RowsPerLine = 2
	}
	if opt.HideSink && d.K > 1 {
		l.KeyStart = 1
	}
	kvis := d.K - l.KeyStart
	tokW := min(maxTokenWidth(d.QueryTokens, maxTokW), max(w/6, 3))
	l.LabelW = digits(d.Q - 1)
	if tokW > 0 {
		l.LabelW += 1 + tokW
	}
	l.GridX = l.LabelW + 1
	l.GridW = w - l.GridX
	// Vertical key labels when every key can get its own column.
	keyTokH := 0
	for _, t := range d.KeyTokens {
		keyTokH = max(keyTokH, min(StringWidth(strings.TrimLeft(t, " ")), maxHeaderH))
	}
	l.HeaderH = 1
	if keyTokH > 0 && kvis <= l.GridW {
		l.HeaderH = min(keyTokH, maxHeaderH, max(1, (h-mapFooter)/5))
		l.Vertical = true
	}
	l.GridY = l.HeaderH
	l.GridH = h - l.HeaderH - mapFooter
	if l.GridW < minGridSide || l.GridH < 2 || d.Q <= 0 || kvis <= 0 {
		l.TooSmall = true
		return l
	}
	dr := l.GridH * l.RowsPerLine
	// The fit keeps pixels square (one column is as wide as a half-line is
	// tall) but lets a small matrix take up to twice the width, so that
	// every key gets room for its label.
	fitBlock, fitX, fitY := 1, 1, 1
	if d.Q <= dr && kvis <= l.GridW {
		fitY = max(1, min(dr/d.Q, MaxMag))
		fitX = max(1, min(l.GridW/kvis, MaxMag, 2*fitY))
		fitY = min(fitY, fitX)
	} else {
		fitBlock = max(ceilDiv(d.Q, dr), ceilDiv(kvis, l.GridW))
	}
	// Steps from the fit to magnification MaxMag.
	steps := 0
	for b, m := fitBlock, min(fitX, fitY); b > 1 || m < MaxMag; steps++ {
		if b > 1 {
			b = ceilDiv(b, 2)
		} else {
			m *= 2
		}
	}
	l.MaxZoom = steps
	l.Zoom = max(0, min(opt.Zoom, steps))
	l.Block, l.MagX, l.MagY = fitBlock, fitX, fitY
	for i := 0; i < l.Zoom; i++ {
		if l.Block > 1 {
			l.Block = ceilDiv(l.Block, 2)
		} else {
			l.MagX, l.MagY = min(l.MagX*2, MaxMag), min(l.MagY*2, MaxMag)
		}
	}
	if l.Vertical && l.Block > 1 {
		l.Vertical = false
	}
	spanQ := (dr / l.MagY) * l.Block
	spanK := (l.GridW / l.MagX) * l.Block
	l.Q0 = follow(opt.Q0, opt.CursorQ, spanQ, l.Block, 0, d.Q)
	l.K0 = follow(opt.K0, opt.CursorK, spanK, l.Block, l.KeyStart, d.K)
	l.PixRows = min(dr/l.MagY, ceilDiv(d.Q-l.Q0, l.Block))
	l.PixCols = min(l.GridW/l.MagX, ceilDiv(d.K-l.K0, l.Block))
	return l
}

// follow returns an origin aligned to block (relative to lo) that keeps cur
// inside [origin, origin+span) and shows as much of [lo, n) as it can.
func follow(origin, cur, span, block, lo, n int) int {
	align := func(x int) int { return lo + ((x-lo)/block)*block }
	cur = max(lo, min(cur, n-1))
	origin = align(max(lo, origin))
	if cur < origin {
		origin = align(cur)
	}
	if cur >= origin+span {
		origin = align(cur - span + block)
	}
	if last := n - span; origin > last {
		origin = max(lo, align(last+block-1))
		if origin > cur {
			origin = align(cur)
		}
	}
	return origin
}

// CellAt maps a canvas position to the cell under it (the upper of the two
// rows a half-block line holds).
func (l MapLayout) CellAt(x, y int) (q, k int, ok bool) {
	if l.TooSmall || x < l.GridX || y < l.GridY || x >= l.GridX+l.PixCols*l.MagX {
		return 0, 0, false
	}
	pr := ((y - l.GridY) * l.RowsPerLine) / l.MagY
	pc := (x - l.GridX) / l.MagX
	if pr >= l.PixRows || pc >= l.PixCols || y >= l.GridY+l.GridH {
		return 0, 0, false
	}
	return l.Q0 + pr*l.Block, l.K0 + pc*l.Block, true
}

// PageRows is how many cells a page move covers vertically.
func (l MapLayout) PageRows() int { return max(1, (l.GridH*l.RowsPerLine/l.MagY)*l.Block) }

// PageCols is how many cells a page move covers horizontally.
func (l MapLayout) PageCols() int { return max(1, (l.GridW/l.MagX)*l.Block) }

// ScaleValue maps w to [0, 1] for a colour scale with maximum vmax.
func ScaleValue(w, vmax float32, s Scale) float64 {
	if vmax <= 0 {
		vmax = 1
	}
	if !(w > 0) {
		return 0
	}
	if s == Log {
		t := 1 + math.Log10(float64(w)/float64(vmax))/LogDecades
		return math.Max(0, math.Min(1, t))
	}
	return math.Min(1, float64(w)/float64(vmax))
}

func (d *MapData) vmax(hideSink bool) float32 {
	if hideSink {
		return d.VMaxNoSink
	}
	return d.VMax
}

// pixelColour is a pixel's colour: NaN grey; a leak in the alarm colour,
// brighter the more mass it carries (leakShade); the terminal's background
// (NoColour) where the mask forbids every cell and nothing leaks; the padding
// colour for padding keys; else the colormap.
func pixelColour(st Styles, w, forbid float32, kind uint8, t float64) Colour {
	switch {
	case w != w:
		return st.NaN
	case forbid > 0:
		return leakShade(st, forbid)
	case kind == KindMasked:
		return NoColour
	case kind == KindPadding:
		return st.Padding
	}
	return st.Colormap.At(t)
}

// leakShade is the alarm colour for a leaking cell of weight f: from 45%
// of the way from the background (f <= 1e-4) to the full colour (f >= 1),
// on a log scale, so that the size of a leak shows while the smallest stays
// visible.
func leakShade(st Styles, f float32) Colour {
	t := 0.45 + 0.55*math.Max(0, math.Min(1, 1+math.Log10(float64(f))/4))
	bg := RGB(0, 0, 0)
	if !st.Dark {
		bg = RGB(255, 255, 255)
	}
	return Blend(bg, st.Colormap.Alarm, t)
}

// Blend mixes a and b, t = 0 giving a and 1 giving b (per channel, sRGB).
func Blend(a, b Colour, t float64) Colour {
	ar, ag, ab := a.Channels()
	br, bg, bb := b.Channels()
	mix := func(x, y uint8) uint8 { return uint8(math.Round(float64(x)*(1-t) + float64(y)*t)) }
	return RGB(mix(ar, br), mix(ag, bg), mix(ab, bb))
}

// RenderMap lays out, downsamples and draws d in one call.
func RenderMap(d *MapData, w, h int, opt MapOptions, st Styles) (*Canvas, MapLayout) {
	l := LayoutMap(d, w, h, opt, st)
	var px *Pixels
	if !l.TooSmall {
		px = Downsample(d, l.Q0, l.K0, l.PixRows, l.PixCols, l.Block, opt.Agg)
	}
	return Map(d, px, l, opt, st), l
}

// Map draws the heat map of d with the pixels px (from Downsample with the
// layout's window) on a new canvas of the layout's size.
func Map(d *MapData, px *Pixels, l MapLayout, opt MapOptions, st Styles) *Canvas {
	c := NewCanvas(l.W, l.H)
	if l.TooSmall || px == nil {
		c.Text(0, 0, "window too small for the map", st.Warn, -1)
		return c
	}
	vmax := d.vmax(opt.HideSink)
	cur := cursorOf(d, px, l, opt)
	cpr, cpc := cur.pr, cur.pc
	colourOf := func(pr, pc int) Colour {
		w, f, _ := px.At(pr, pc)
		return pixelColour(st, w, f, px.Kind[pr*px.Cols+pc], ScaleValue(w, vmax, opt.Scale))
	}
	for y := 0; y < l.GridH; y++ {
		for x := 0; x < px.Cols*l.MagX && x < l.GridW; x++ {
			pc := x / l.MagX
			if l.RowsPerLine == 2 {
				prT, prB := (2*y)/l.MagY, (2*y+1)/l.MagY
				if prT >= px.Rows {
					continue
				}
				fg := colourOf(prT, pc)
				bg := NoColour
				if prB < px.Rows {
					bg = colourOf(prB, pc)
				}
				cell := Style{FG: fg, BG: bg}
				ch := GlyphHalf
				switch {
				case !fg.IsSet() && !bg.IsSet():
					ch, cell = ' ', Style{} // both halves masked: the background
				case !fg.IsSet():
					ch, cell = GlyphLowHalf, Style{FG: bg} // the upper half masked
				}
				if pc == cpc && (prT == cpr || prB == cpr) {
					under := fg
					if prT != cpr {
						under = bg
					}
					if !under.IsSet() {
						ch, cell = '+', Style{Attr: Bold | Reverse}
					} else {
						ch, cell = '+', Style{FG: contrast(under), BG: under, Attr: Bold}
					}
				}
				c.Set(l.GridX+x, l.GridY+y, ch, cell)
				continue
			}
			pr := y / l.MagY
			if pr >= px.Rows {
				continue
			}
			w, f, _ := px.At(pr, pc)
			kind := px.Kind[pr*px.Cols+pc]
			t := ScaleValue(w, vmax, opt.Scale)
			var ch rune
			var cell Style
			switch {
			case w != w:
				ch, cell = GlyphNaN, Style{Attr: Bold}
			case f > 0:
				ch, cell = GlyphForbidden, Style{Attr: Bold}
			case kind == KindMasked:
				ch = ' '
			case kind == KindPadding:
				ch = GlyphPadding
			case !(t > 0):
				ch = GlyphZero // allowed and empty: not the blank of a masked cell
			default:
				ch = rune(RampGlyph(t))
			}
			if st.HasColour() {
				cell.FG = pixelColour(st, w, f, kind, t)
			}
			if pr == cpr && pc == cpc {
				cell.Attr |= Reverse | Bold
				if ch == ' ' {
					ch = '+'
				}
			}
			c.Set(l.GridX+x, l.GridY+y, ch, cell)
		}
	}
	drawKeyHeader(c, d, l, cpc, st)
	drawQueryLabels(c, d, l, cpr, st)
	drawReadout(c, d, px, l, cur, st)
	drawMapLegend(c, l, mapLegend{measure: d.Measure, vmax: vmax, has: px.present()}, opt, st)
	return c
}

// mapCursor is where the Map's cursor is: its cell (q, k), clamped to the
// matrix, and the pixel (pr, pc) that holds it, (-1, -1) when that cell is
// outside the window drawn.
type mapCursor struct {
	q, k   int
	pr, pc int
}

// cursorOf places opt's cursor on d and on the pixels px of layout l.
func cursorOf(d *MapData, px *Pixels, l MapLayout, opt MapOptions) mapCursor {
	cur := mapCursor{q: max(0, min(opt.CursorQ, d.Q-1)), k: max(l.KeyStart, min(opt.CursorK, d.K-1)), pr: -1, pc: -1}
	if cur.q >= l.Q0 && cur.k >= l.K0 {
		cur.pr, cur.pc = (cur.q-l.Q0)/l.Block, (cur.k-l.K0)/l.Block
		if cur.pr >= px.Rows || cur.pc >= px.Cols {
			cur.pr, cur.pc = -1, -1
		}
	}
	return cur
}

func drawKeyHeader(c *Canvas, d *MapData, l MapLayout, cpc int, st Styles) {
	if l.Vertical {
		for pc := 0; pc < l.PixCols; pc++ {
			k := l.K0 + pc
			x := l.GridX + pc*l.MagX
			style := st.Label
			if pc == cpc {
				style = st.LabelHi
			}
			// Leading spaces (word-start markers of BPE tokens) would waste the
			// few rows the header has.
			tok := strings.TrimLeft(d.token(d.KeyTokens, k), " ")
			if tok == "" {
				tok = strconv.Itoa(k)
			}
			y := 0
			for _, r := range tok {
				if y >= l.HeaderH {
					break
				}
				r = Printable(r)
				if StringWidth(string(r)) != 1 {
					r = '·'
				}
				c.Set(x, y, r, style)
				y++
			}
			for ; y < l.HeaderH && pc == cpc; y++ {
				c.Set(x, y, ' ', style)
			}
		}
		return
	}
	// Tick labels at round key indices, spaced so that they never touch.
	y := l.HeaderH - 1
	step := niceStep(ceilDiv((digits(d.K)+2)*l.Block, l.MagX))
	next := 0
	mark := -1
	if cpc >= 0 {
		// The cursor's key as a marker above its column.
		mark = cpc * l.MagX
		c.Set(l.GridX+mark, y, '▼', st.Accent)
	}
	for k := ((l.K0 + step - 1) / step) * step; k < d.K; k += step {
		pc := (k - l.K0) / l.Block
		x := pc * l.MagX
		if pc >= l.PixCols {
			break
		}
		s := strconv.Itoa(k)
		if x < next || x+len(s) > l.GridW || (mark >= x && mark < x+len(s)) {
			continue
		}
		c.Text(l.GridX+x, y, s, st.Faint, -1)
		next = x + len(s) + 1
	}
}

func drawQueryLabels(c *Canvas, d *MapData, l MapLayout, cpr int, st Styles) {
	dw := digits(d.Q - 1)
	tokW := l.LabelW - dw - 1
	for y := 0; y < l.GridH; y++ {
		r0 := y * l.RowsPerLine
		prA, prB := r0/l.MagY, (r0+l.RowsPerLine-1)/l.MagY
		if prA >= l.PixRows {
			break
		}
		pr, style := prA, st.Label
		switch {
		case cpr >= prA && cpr <= prB:
			pr, style = cpr, st.LabelHi
		case prA*l.MagY < r0:
			// prA is labelled on a line above; label the next pixel if it starts here.
			if prB == prA || prB >= l.PixRows {
				continue
			}
			pr = prB
		}
		q := l.Q0 + pr*l.Block
		idx := strconv.Itoa(q)
		s := strings.Repeat(" ", dw-len(idx)) + idx
		if tokW > 0 {
			s += " " + Ellipsize(d.token(d.QueryTokens, q), tokW)
		}
		if style == st.LabelHi {
			s += strings.Repeat(" ", max(0, l.LabelW-StringWidth(s)))
		}
		c.Text(0, l.GridY+y, s, style, l.LabelW)
	}
}

// Ellipsize cuts s to w columns, ending with "…" when cut.
func Ellipsize(s string, w int) string {
	if w <= 0 {
		return ""
	}
	if StringWidth(s) <= w {
		return s
	}
	var b strings.Builder
	n := 0
	for _, r := range s {
		rw := StringWidth(string(r))
		if n+rw > w-1 {
			break
		}
		b.WriteRune(r)
		n += rw
	}
	b.WriteString("…")
	return b.String()
}

// FormatWeight prints a weight the way every view does: 4 significant digits.
func FormatWeight(v float32) string {
	switch {
	case v != v:
		return "NaN"
	case v == 0:
		return "0"
	}
	a := math.Abs(float64(v))
	if a >= 1e-3 && a < 1e4 {
		return strconv.FormatFloat(float64(v), 'f', max(0, 3-int(math.Floor(math.Log10(a)))), 32)
	}
	return strconv.FormatFloat(float64(v), 'e', 2, 32)
}

func quoteTok(t string) string {
	if t == "" {
		return ""
	}
	return " \"" + t + "\""
}

// drawReadout writes what the cursor's cell holds on the layout's last line
// but one: its query and key with their tokens, its weight and the rule that
// forbids it, and, zoomed out, its pixel.
func drawReadout(c *Canvas, d *MapData, px *Pixels, l MapLayout, cur mapCursor, st Styles) {
	cq, ck, cpr, cpc := cur.q, cur.k, cur.pr, cur.pc
	y := l.H - 2
	x := 0
	put := func(s string, style Style) {
		x += c.Text(x, y, s, style, -1)
	}
	put(fmt.Sprintf("q %d", cq), st.Title)
	if d.QueryOffset != 0 {
		put(fmt.Sprintf(" (pos %d)", cq+d.QueryOffset), st.Faint)
	}
	put(Ellipsize(quoteTok(d.token(d.QueryTokens, cq)), 16), st.Text)
	put(" → ", st.Faint)
	put(fmt.Sprintf("k %d", ck), st.Title)
	put(Ellipsize(quoteTok(d.token(d.KeyTokens, ck)), 16), st.Text)
	v := d.At(cq, ck)
	put("  "+FormatWeight(v), Style{Attr: Bold})
	rule := d.rule(cq, ck)
	switch {
	case v != v:
		put("  NaN", st.Bad)
	case rule != "" && v > d.Tol:
		put("  forbidden by "+rule, st.Bad)
	case rule != "":
		put("  forbidden by "+rule+", no mass", st.Faint)
	default:
		put("  allowed", st.Good)
	}
	if d.Describe != nil {
		if s := d.Describe(cq, ck); s != "" {
			put("  "+s, st.Text)
		}
	}
	if l.Block > 1 && cpr >= 0 {
		w, f, r := px.At(cpr, cpc)
		s := fmt.Sprintf("  pixel %d×%d: %s", l.Block, l.Block, FormatWeight(w))
		put(s, st.Faint)
		if f > 0 {
			put(fmt.Sprintf(", leak %s (%s)", FormatWeight(f), r), st.Bad)
		}
	}
}

// present says which kinds of pixel are in px: masked, padding, NaN,
// allowed with weight 0.
func (p *Pixels) present() (has map[string]bool) {
	has = map[string]bool{}
	for i, k := range p.Kind {
		w := p.Weight[i]
		switch {
		case w != w:
			has["NaN"] = true
		case p.Forbid[i] > 0:
		case k == KindMasked:
			has["masked"] = true
		case k == KindPadding:
			has["padding"] = true
		case w == 0:
			has["zero"] = true
		}
	}
	return has
}

// mapLegend is what the Map's legend explains: the measure drawn, the weight
// at the top of the colour scale and the kinds of pixel in view (present).
type mapLegend struct {
	measure string
	vmax    float32
	has     map[string]bool
}

// drawMapLegend writes the colour scale, the aggregation, the zoom and the
// meaning of the special colours or glyphs on the layout's last line.
func drawMapLegend(c *Canvas, l MapLayout, lg mapLegend, opt MapOptions, st Styles) {
	x, y, w := 0, l.H-1, l.W
	measure, vmax, has := lg.measure, lg.vmax, lg.has
	if measure == "" {
		measure = "weight"
	}
	end := x + w
	put := func(s string, style Style) {
		if x < end {
			x += c.Text(x, y, s, style, end-x)
		}
	}
	put(opt.Scale.String()+" ", st.Faint)
	lo := "0"
	if opt.Scale == Log {
		lo = FormatWeight(vmax * float32(math.Pow(10, -LogDecades)))
	}
	put(lo+" ", st.Text)
	x = drawScaleBar(c, x, y, min(16, max(0, end-x-40)), st)
	put(" "+FormatWeight(vmax)+" ", st.Text)
	// zoom as cells : pixels, one notation both ways: 1:4 is four cells a
	// pixel side, 2:1 one cell drawn two pixels wide
	zoom := fmt.Sprintf("zoom %d:1", min(l.MagX, l.MagY))
	if l.Block > 1 {
		zoom = fmt.Sprintf("zoom 1:%d %s", l.Block, opt.Agg)
	}
	put(measure+" · "+zoom, st.Faint)
	if opt.HideSink {
		put(" · sink hidden", st.Faint)
	}
	// the keys to the marks, each whole or not at all, while they fit
	type mark struct {
		glyph string
		style Style
		text  string
	}
	var marks []mark
	if st.HalfBlocks() {
		marks = []mark{{"■", Style{FG: st.Colormap.Alarm}, "leak"}, {"□", st.Faint, "masked"},
			{"■", Style{FG: st.Padding}, "padding"}, {"■", Style{FG: st.NaN}, "NaN"}}
	} else {
		marks = []mark{{string(GlyphForbidden), Style{FG: colourIf(st, st.Colormap.Alarm), Attr: Bold}, "leak"},
			{"' '", st.Faint, "masked"}, {string(GlyphPadding), Style{FG: colourIf(st, st.Padding)}, "padding"},
			{string(GlyphNaN), Style{Attr: Bold}, "NaN"}, {string(GlyphZero), st.Text, "zero"}}
	}
	for _, mk := range marks {
		if mk.text != "leak" && !has[mk.text] {
			continue // the key to what is not in view
		}
		if x+2+StringWidth(mk.glyph)+1+StringWidth(mk.text) > end {
			break
		}
		put("  "+mk.glyph, mk.style)
		put(" "+mk.text, st.Faint)
	}
}

func colourIf(st Styles, c Colour) Colour {
	if st.HasColour() {
		return c
	}
	return NoColour
}

// drawScaleBar draws n cells from low to high: colours with half blocks,
// ramp glyphs (coloured when possible) otherwise. It returns the next x.
func drawScaleBar(c *Canvas, x, y, n int, st Styles) int {
	if !st.HalfBlocks() {
		n = len(Ramp) - 1
	}
	for i := 0; i < n; i++ {
		t := (float64(i) + 0.5) / float64(n)
		if st.HalfBlocks() {
			col := st.Colormap.At(t)
			c.Set(x+i, y, GlyphHalf, Style{FG: col, BG: col})
			continue
		}
		ch := Ramp[i+1]
		c.Set(x+i, y, rune(ch), Style{FG: colourIf(st, st.Colormap.At(t))})
	}
	return x + n
}

// niceStep returns the smallest of 1, 2, 5, 10, 20, 50, ... that is >= n.
func niceStep(n int) int {
	for p := 1; ; p *= 10 {
		for _, m := range []int{1, 2, 5} {
			if m*p >= n {
				return m * p
			}
		}
	}
}
