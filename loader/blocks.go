// Blocks: the arrays of one block (parts), their axes (given, or guessed
// from the rank), the per-layer slabs reads go through, the activations, the
// query positions, and building a Block from all of it.

package loader

import (
	"fmt"
	"maps"
	"slices"
	"strings"
)

// parts are the arrays of one block.
type parts struct {
	name               string
	attn, grad, out    Array         // whole arrays
	attnL, gradL, outL map[int]Array // per-layer arrays
	allow, qpos        Array
	bare               bool // assembled from arrays outside the convention
}

func (p *parts) set(r role, layer int, a Array) error {
	dup := func() error {
		return &FormatError{File: a.File(), Array: a.Name(), Offset: -1, Msg: "given twice (or both as one array and per layer)"}
	}
	put := func(whole *Array, per *map[int]Array) error {
		if layer < 0 {
			if *whole != nil || len(*per) > 0 {
				return dup()
			}
			*whole = a
			return nil
		}
		if *whole != nil {
			return dup()
		}
		if *per == nil {
			*per = map[int]Array{}
		}
		if _, ok := (*per)[layer]; ok {
			return dup()
		}
		(*per)[layer] = a
		return nil
	}
	switch r {
	case roleAttn:
		return put(&p.attn, &p.attnL)
	case roleGrad:
		return put(&p.grad, &p.gradL)
	case roleOut:
		return put(&p.out, &p.outL)
	case roleAllow:
		if p.allow != nil {
			return dup()
		}
		p.allow = a
	case roleQPos:
		if p.qpos != nil {
			return dup()
		}
		p.qpos = a
	}
	return nil
}

// lowestLayer is the per-layer array of the lowest layer: the one messages
// name, the same from one run to the next (a map's order is not).
func lowestLayer(per map[int]Array) Array {
	return per[slices.Min(slices.Collect(maps.Keys(per)))]
}

// besideAttn is the array a message about a block without attention names:
// its gradient (of the lowest layer when per layer), else its mask.
func (p *parts) besideAttn() Array {
	if len(p.gradL) > 0 {
		return lowestLayer(p.gradL)
	}
	if p.grad != nil {
		return p.grad
	}
	return p.allow
}

// layerArrays returns the arrays of a whole-or-per-layer role in layer order,
// checking that per-layer indices run 0..L-1.
func layerArrays(block, role string, whole Array, per map[int]Array) ([]Array, bool, error) {
	if whole != nil {
		return []Array{whole}, false, nil
	}
	if len(per) == 0 {
		return nil, false, nil
	}
	out := make([]Array, len(per))
	for _, l := range slices.Sorted(maps.Keys(per)) {
		a := per[l]
		if l >= len(per) {
			return nil, true, ferr(a, "layer %d given but only %d %s/%s/N arrays: per-layer arrays must be numbered 0..%d without gaps", l, len(per), block, role, len(per)-1)
		}
		out[l] = a
	}
	return out, true, nil
}

// axisSpec is the resolved layout of the attention arrays.
type axisSpec struct {
	names                      []string
	layerAt, batchAt, headAt   int
	queryAt, keyAt, transposed int
}

func parseAxes(s string) []string {
	return strings.FieldsFunc(s, func(r rune) bool { return r == ' ' || r == ',' || r == '\t' })
}

// resolveAxes decides the axes of an attention array of the given rank;
// axesName is how messages name the axes setting (Options.name).
func resolveAxes(a Array, axes string, perLayer bool, axesName string) (axisSpec, error) {
	rank := len(a.Shape())
	var names []string
	if axes == "" {
		byRank := map[int]string{2: "query key", 3: "head query key", 4: "layer head query key", 5: "layer batch head query key"}
		if perLayer {
			byRank = map[int]string{2: "query key", 3: "head query key", 4: "batch head query key"}
		}
		s, ok := byRank[rank]
		if !ok {
			return axisSpec{}, ferr(a, "cannot infer the axes of a rank-%d array; give them with %s or the metadata's \"axes\"", rank, axesName)
		}
		names = parseAxes(s)
	} else {
		names = parseAxes(axes)
		if perLayer && len(names) == rank+1 {
			kept := names[:0:0]
			for _, n := range names {
				if n != "layer" {
					kept = append(kept, n)
				}
			}
			names = kept
		}
		if len(names) != rank {
			return axisSpec{}, ferr(a, "axes %q name %d axes, the array has %d (shape %v)", axes, len(names), rank, a.Shape())
		}
	}
	sp := axisSpec{names: names, layerAt: -1, batchAt: -1, headAt: -1, queryAt: -1, keyAt: -1}
	for i, n := range names {
		var at *int
		switch n {
		case "layer":
			at = &sp.layerAt
			if perLayer {
				return sp, ferr(a, "axes %q: a per-layer array has no layer axis", axes)
			}
		case "batch":
			at = &sp.batchAt
		case "head":
			at = &sp.headAt
		case "query":
			at = &sp.queryAt
		case "key":
			at = &sp.keyAt
		default:
			return sp, ferr(a, "axes %q: unknown axis %q (axes are layer, batch, head, query, key)", axes, n)
		}
		if *at >= 0 {
			return sp, ferr(a, "axes %q: axis %q given twice", axes, n)
		}
		*at = i
	}
	if sp.queryAt < 0 || sp.keyAt < 0 {
		return sp, ferr(a, "axes %q: need both a query and a key axis", axes)
	}
	if min(sp.queryAt, sp.keyAt) != rank-2 {
		return sp, ferr(a, "axes %q: query and key must be the last two axes", axes)
	}
	if sp.keyAt < sp.queryAt {
		sp.transposed = 1
	}
	return sp, nil
}

// dims4 is [layers, batch, heads, queries, keys] of an attention array under sp.
func (sp axisSpec) dims(shape []int, layers int) [5]int {
	d := [5]int{layers, 1, 1, shape[sp.queryAt], shape[sp.keyAt]}
	if sp.layerAt >= 0 {
		d[0] = shape[sp.layerAt]
	}
	if sp.batchAt >= 0 {
		d[1] = shape[sp.batchAt]
	}
	if sp.headAt >= 0 {
		d[2] = shape[sp.headAt]
	}
	return d
}

// slabs builds the per-layer slabs of arrays (one whole array or one per layer).
func slabs(arrs []Array, sp axisSpec, layers int) []slab {
	out := make([]slab, layers)
	for l := 0; l < layers; l++ {
		a := arrs[0]
		if len(arrs) > 1 {
			a = arrs[l]
		}
		s := slab{arr: a, prefix: make([]int, len(sp.names)-2), batchAt: -1, headAt: -1, transposed: sp.transposed == 1}
		if sp.layerAt >= 0 {
			s.prefix[sp.layerAt] = l
		}
		if sp.batchAt >= 0 {
			s.batchAt = sp.batchAt
		}
		if sp.headAt >= 0 {
			s.headAt = sp.headAt
		}
		if fr, ok := a.(flatReader); ok && isCOrder(a) {
			st := cStrides(a.Shape())
			s.flat = fr
			if sp.layerAt >= 0 {
				s.base = l * st[sp.layerAt]
			}
			if sp.batchAt >= 0 {
				s.batchStride = st[sp.batchAt]
			}
			if sp.headAt >= 0 {
				s.headStride = st[sp.headAt]
			}
		}
		out[l] = s
	}
	return out
}

func isCOrder(a Array) bool {
	if c, ok := a.(interface{ cOrder() bool }); ok {
		return c.cOrder()
	}
	return false
}

func buildBlock(p *parts, mb metaBlock, topCompute string, opt Options) (*Block, error) {
	b := &Block{Name: p.name}
	attnArrs, attnPer, err := layerArrays(p.name, "attn", p.attn, p.attnL)
	if err != nil {
		return nil, err
	}
	var first Array
	if len(attnArrs) > 0 {
		first = attnArrs[0]
	} else if p.out != nil {
		first = p.out
	} else if len(p.outL) > 0 {
		first = lowestLayer(p.outL)
	} else {
		return nil, ferr(p.besideAttn(), "block %q has no attention (%s/attn or %s/attn/N)", p.name, p.name, p.name)
	}
	st, err := settings(p, mb, topCompute, opt, first)
	if err != nil {
		return nil, err
	}
	b.Kind, b.QuerySide, b.KeySide = st.kind, st.query, st.key
	b.KindFrom, b.ComputeDType = st.kindFrom, st.compute
	b.Window, b.Prefix, b.KVHeads = st.window, st.prefix, st.kvHeads

	var dims [5]int
	if len(attnArrs) > 0 {
		a0 := attnArrs[0]
		sp, err := resolveAxes(a0, st.axes, attnPer, opt.name("axes"))
		if err != nil {
			return nil, err
		}
		layers := len(attnArrs)
		if !attnPer && sp.layerAt < 0 {
			layers = 1
		}
		for _, a := range attnArrs {
			if !a.DType().IsFloat() {
				return nil, ferr(a, "attention must be floating point (f16, bf16, f32, f64), got %s", a.DType())
			}
			if a.DType() != a0.DType() {
				return nil, ferr(a, "dtype %s differs from %s's %s", a.DType(), a0.Name(), a0.DType())
			}
			if !slices.Equal(a.Shape(), a0.Shape()) {
				return nil, ferr(a, "shape %v differs from %s's %v", a.Shape(), a0.Name(), a0.Shape())
			}
		}
		dims = sp.dims(a0.Shape(), layers)
		for i, n := range []string{"layer", "batch", "head", "query", "key"} {
			if dims[i] == 0 {
				return nil, ferr(a0, "the %s axis is empty (shape %v)", n, a0.Shape())
			}
		}
		if int64(dims[3])*int64(dims[4]) > maxHead {
			return nil, ferr(a0, "one head of %d queries x %d keys is larger than heed handles (%d values)", dims[3], dims[4], maxHead)
		}
		b.DType = a0.DType()
		b.Layers, b.Batch, b.Heads, b.Queries, b.Keys = dims[0], dims[1], dims[2], dims[3], dims[4]
		b.Axes = strings.Join(sp.names, " ")
		b.AxesFrom = st.axesFrom
		if b.AxesFrom == "" {
			b.AxesFrom = "rank"
			b.AxesOther = otherReading(len(a0.Shape()), attnPer)
		}
		b.attn = slabs(attnArrs, sp, b.Layers)
		b.Source = a0.Name()
		if attnPer {
			b.Source = fmt.Sprintf("%s/attn/{0..%d}", p.name, len(attnArrs)-1)
			if p.bare {
				b.Source = fmt.Sprintf("%s ... %s", attnArrs[0].Name(), attnArrs[len(attnArrs)-1].Name())
			}
		}

		gradArrs, gradPer, err := layerArrays(p.name, "grad", p.grad, p.gradL)
		if err != nil {
			return nil, err
		}
		if len(gradArrs) > 0 {
			for _, g := range gradArrs {
				if !g.DType().IsFloat() {
					return nil, ferr(g, "gradients must be floating point, got %s", g.DType())
				}
			}
			gs, err := resolveAxes(gradArrs[0], st.axes, gradPer, opt.name("axes"))
			if err != nil {
				return nil, err
			}
			gl := len(gradArrs)
			if !gradPer && gs.layerAt < 0 {
				gl = 1
			}
			gd := gs.dims(gradArrs[0].Shape(), gl)
			if gd != dims || gs.transposed != sp.transposed {
				return nil, ferr(gradArrs[0], "gradient shape %v (%d layers) does not match attention %s shape %v (%d layers): dL/dA must have the shape of A", gradArrs[0].Shape(), gd[0], a0.Name(), a0.Shape(), dims[0])
			}
			for _, g := range gradArrs {
				if !slices.Equal(g.Shape(), gradArrs[0].Shape()) {
					return nil, ferr(g, "shape %v differs from %s's %v", g.Shape(), gradArrs[0].Name(), gradArrs[0].Shape())
				}
			}
			b.HasGrad = true
			b.grad = slabs(gradArrs, gs, b.Layers)
		}

		if a := p.allow; a != nil {
			if a.DType() == String || a.DType() == Invalid {
				return nil, ferr(a, "allow must be bool, integer or float, got %s", a.DType())
			}
			sh := a.Shape()
			if len(sh) < 2 || len(sh) > 4 {
				return nil, ferr(a, "allow of shape %v is not broadcastable to [batch, head, query, key] = %v", sh, []int{b.Batch, b.Heads, b.Queries, b.Keys})
			}
			src := &allowSource{arr: a, shape4: [4]int{1, 1, 1, 1}, additive: a.DType().IsFloat()}
			copy(src.shape4[4-len(sh):], sh)
			want := [4]int{b.Batch, b.Heads, b.Queries, b.Keys}
			for i := range want {
				if src.shape4[i] != want[i] && src.shape4[i] != 1 {
					return nil, ferr(a, "allow of shape %v is not broadcastable to [batch, head, query, key] = %v", sh, want[:])
				}
			}
			b.HasAllow = true
			b.allow = src
		}
	} else {
		b.Axes = ""
		if a := p.besideAttn(); a != nil {
			return nil, ferr(a, "block %q has gradients or a mask but no attention (%s/attn)", p.name, p.name)
		}
	}

	outArrs, outPer, err := layerArrays(p.name, "out", p.out, p.outL)
	if err != nil {
		return nil, err
	}
	if len(outArrs) > 0 {
		o0 := outArrs[0]
		rank := len(o0.Shape())
		var sp axisSpec
		switch {
		case !outPer && rank == 4:
			sp = axisSpec{names: []string{"layer", "batch", "position", "feature"}, layerAt: 0, batchAt: 1, headAt: -1}
		case !outPer && rank == 3:
			sp = axisSpec{names: []string{"layer", "position", "feature"}, layerAt: 0, batchAt: -1, headAt: -1}
		case outPer && rank == 3:
			sp = axisSpec{names: []string{"batch", "position", "feature"}, layerAt: -1, batchAt: 0, headAt: -1}
		case outPer && rank == 2:
			sp = axisSpec{names: []string{"position", "feature"}, layerAt: -1, batchAt: -1, headAt: -1}
		default:
			want := "[layer, batch, position, feature] or [layer, position, feature]"
			if outPer {
				want = "[batch, position, feature] or [position, feature] per layer"
			}
			return nil, ferr(o0, "activations must be %s, got shape %v", want, o0.Shape())
		}
		for _, o := range outArrs {
			if !o.DType().IsFloat() {
				return nil, ferr(o, "activations must be floating point, got %s", o.DType())
			}
			if !slices.Equal(o.Shape(), o0.Shape()) {
				return nil, ferr(o, "shape %v differs from %s's %v", o.Shape(), o0.Name(), o0.Shape())
			}
		}
		sh := o0.Shape()
		layers, batch := len(outArrs), 1
		if sp.layerAt >= 0 {
			layers = sh[0]
		}
		if sp.batchAt >= 0 {
			batch = sh[sp.batchAt]
		}
		if len(attnArrs) > 0 && batch != b.Batch {
			return nil, ferr(o0, "activations have batch %d, the attention %d", batch, b.Batch)
		}
		if layers == 0 || batch == 0 || sh[rank-2] == 0 || sh[rank-1] == 0 {
			return nil, ferr(o0, "an axis is empty (shape %v)", sh)
		}
		b.OutLayers, b.Positions, b.Features = layers, sh[rank-2], sh[rank-1]
		b.OutDType = o0.DType()
		if len(attnArrs) == 0 {
			b.Batch = batch
			b.DType = o0.DType()
		}
		// Reuse the attention slab machinery: position and feature play query and key.
		sp.queryAt, sp.keyAt = rank-2, rank-1
		b.out = slabs(outArrs, sp, layers)
	}

	// Rules' parameters.
	if b.Layers > 0 {
		if b.Window < 0 || b.Prefix < 0 {
			return nil, ferr(first, "window and prefix must not be negative")
		}
		if b.Prefix > b.Keys {
			return nil, ferr(first, "prefix %d is longer than the %d keys", b.Prefix, b.Keys)
		}
		if b.KVHeads > 0 && (b.KVHeads > b.Heads || b.Heads%b.KVHeads != 0) {
			return nil, ferr(first, "kv_heads %d does not divide the %d heads", b.KVHeads, b.Heads)
		}
		if b.Kind == KindCausal {
			if b.Queries > b.Keys {
				return nil, ferr(first, "causal block with more queries (%d) than keys (%d): check the axes (%s)", b.Queries, b.Keys, b.Axes)
			}
			b.QueryOffset = b.Keys - b.Queries
			if b.QueryOffset > 0 {
				b.PosFrom = "offset"
			}
		}
		if err := setQueryPos(b, p.qpos, st, first); err != nil {
			return nil, err
		}
	} else if p.qpos != nil {
		return nil, ferr(p.qpos, "block %q has query positions but no attention (%s/attn)", p.name, p.name)
	}
	return b, nil
}

// otherReading returns the axes (an Options.Axes value) of the other way an attention array
// of this rank could be read when its axes were taken from the rank, or ""
// when the rank's reading is the only common one. A whole rank-4 array is
// [layer, head, query, key] by rank, but one layer saved alone as [batch,
// head, query, key] has the same rank; a rank-3 array is [head, query, key]
// by rank, or a batch of one averaged head.
func otherReading(rank int, perLayer bool) string {
	switch {
	case rank == 4 && !perLayer:
		return "batch head query key"
	case rank == 3:
		return "batch query key"
	}
	return ""
}

// maxQPos bounds the elements of a BLOCK/qpos array (read whole).
const maxQPos = 1 << 24

// setQueryPos places the block's query rows among its keys from BLOCK/qpos
// or query_start; without either, rows keep QueryOffset.
func setQueryPos(b *Block, qpos Array, st blockSettings, first Array) error {
	if qpos != nil && st.queryStart != nil && st.startFrom != "option" {
		return ferr(qpos, "block %q has both %s/qpos and query_start: give one", b.Name, b.Name)
	}
	switch {
	case st.startFrom == "option" || (qpos == nil && st.queryStart != nil):
		if len(st.queryStart) != 1 && len(st.queryStart) != b.Batch {
			return &FormatError{File: first.File(), Array: "meta", Offset: -1, Msg: fmt.Sprintf("block %q: query_start lists %d positions for %d batch items", b.Name, len(st.queryStart), b.Batch)}
		}
		pos := make([][]int, len(st.queryStart))
		for i, s0 := range st.queryStart {
			if s0+b.Queries > b.Keys { // s0 >= 0: settings checked it
				return &FormatError{File: first.File(), Array: "query_start", Offset: -1,
					Msg: fmt.Sprintf("batch item %d: %d queries from key position %d run past the %d keys", i, b.Queries, s0, b.Keys)}
			}
			pos[i] = make([]int, b.Queries)
			for q := range pos[i] {
				pos[i][q] = s0 + q
			}
		}
		b.QPos, b.PosFrom = pos, st.startFrom
	case qpos != nil:
		if !qpos.DType().IsInt() || qpos.DType() == Bool {
			return ferr(qpos, "query positions must be integers, got %s", qpos.DType())
		}
		sh := qpos.Shape()
		nb := 1
		switch {
		case len(sh) == 1 && sh[0] == b.Queries:
		case len(sh) == 2 && sh[1] == b.Queries && (sh[0] == b.Batch || sh[0] == 1):
			nb = sh[0]
		default:
			return ferr(qpos, "query positions must be [query] or [batch, query] = [%d, %d], got shape %v", b.Batch, b.Queries, sh)
		}
		if nb*b.Queries > maxQPos {
			return ferr(qpos, "%d query positions is more than heed reads (%d)", nb*b.Queries, maxQPos)
		}
		flat := make([]int64, nb*b.Queries)
		if err := qpos.ReadInt64(nil, flat); err != nil {
			return ferr(qpos, "%v", err)
		}
		pos := make([][]int, nb)
		for i := range pos {
			pos[i] = make([]int, b.Queries)
			for q := range pos[i] {
				v := flat[i*b.Queries+q]
				if v < 0 || v >= int64(b.Keys) {
					return ferr(qpos, "batch item %d, query %d is at key position %d, outside the %d keys", i, q, v, b.Keys)
				}
				pos[i][q] = int(v)
			}
		}
		b.QPos, b.PosFrom = pos, "qpos"
	default:
		return nil
	}
	b.QueryOffset = b.QPos[0][0]
	return nil
}

// maxHead bounds Queries*Keys: callers allocate one head as a buffer.
const maxHead = 1 << 30
