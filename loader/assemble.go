package loader

import (
	"bytes"
	"encoding/json"
	"fmt"
	"maps"
	"os"
	"regexp"
	"slices"
	"sort"
	"strconv"
	"strings"
)

// FormatName is the metadata "format" of the convention this package reads.
const FormatName = "heed-export/1"

// metaDoc is the heed-export/1 metadata object.
type metaDoc struct {
	Format       string               `json:"format"`
	ComputeDType string               `json:"compute_dtype"`
	Blocks       map[string]metaBlock `json:"blocks"`
}

// metaBlock is one block's entry in the metadata; nil pointers are "not said".
type metaBlock struct {
	Kind    *string         `json:"kind"`
	Query   *string         `json:"query"`
	Key     *string         `json:"key"`
	Axes    json.RawMessage `json:"axes"` // "layer batch head query key" or a list of names
	Window  *int            `json:"window"`
	Prefix  *int            `json:"prefix"`
	KVHeads *int            `json:"kv_heads"`
	// ComputeDType is the dtype the model computed attention in.
	ComputeDType *string `json:"compute_dtype"`
	// QueryStart is the key position of query row 0: an integer, or a list
	// with one per batch item.
	QueryStart json.RawMessage `json:"query_start"`
}

// metaSource is metadata JSON and the file it came from.
type metaSource struct{ file, text string }

// attrReader is implemented by arrays that carry attributes (HDF5 datasets).
// The attention array's attributes kind, query, key, axes, window, prefix and
// kv_heads are used when the metadata does not say.
type attrReader interface {
	Attr(name string) (string, bool)
}

// Assemble builds an export from arrays named by the heed-export/1
// convention and the metadata JSON meta ("" when there is none); opt
// overrides both. See the package documentation of the convention in
// the README. Errors are *FormatError naming the array.
// The arrays are not closed by Export.Close: their owner closes them.
func Assemble(arrays []Array, meta string, opt Options) (*Export, error) {
	var metas []metaSource
	if meta != "" {
		metas = append(metas, metaSource{file: "(metadata)", text: meta})
	}
	return assemble(arrays, metas, opt)
}

type role int

const (
	roleOther role = iota
	roleAttn
	roleGrad
	roleAllow
	roleOut
	roleQPos
	roleTokens
	roleValid
	roleSegments
	roleLogits
	roleVocab
	roleMeta
)

var roleNames = map[string]role{"attn": roleAttn, "grad": roleGrad, "allow": roleAllow, "out": roleOut, "qpos": roleQPos}

// classify splits a convention name into its block (or side) name, role
// and layer (-1 for a whole array).
func classify(name string) (owner string, r role, layer int) {
	switch name {
	case "logits":
		return "", roleLogits, -1
	case "vocab":
		return "", roleVocab, -1
	case "meta":
		return "", roleMeta, -1
	}
	for prefix, r := range map[string]role{"tokens/": roleTokens, "valid/": roleValid, "segments/": roleSegments} {
		if strings.HasPrefix(name, prefix) && len(name) > len(prefix) {
			return name[len(prefix):], r, -1
		}
	}
	parts := strings.Split(name, "/")
	n := len(parts)
	if n >= 3 && isDigits(parts[n-1]) {
		if r, ok := roleNames[parts[n-2]]; ok && r != roleAllow && r != roleQPos && parts[0] != "" {
			l, err := strconv.Atoi(parts[n-1])
			if err == nil && l < 1<<20 {
				return strings.Join(parts[:n-2], "/"), r, l
			}
		}
	}
	if n >= 2 {
		if r, ok := roleNames[parts[n-1]]; ok && parts[0] != "" {
			return strings.Join(parts[:n-1], "/"), r, -1
		}
	}
	return "", roleOther, -1
}

func isDigits(s string) bool {
	if s == "" {
		return false
	}
	for _, c := range s {
		if c < '0' || c > '9' {
			return false
		}
	}
	return true
}

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

func ferr(a Array, format string, args ...any) error {
	return &FormatError{File: a.File(), Array: a.Name(), Offset: -1, Msg: fmt.Sprintf(format, args...)}
}

var trailingNum = regexp.MustCompile(`^(.*?)[_.\-]?([0-9]+)$`)

func assemble(arrays []Array, metas []metaSource, opt Options) (*Export, error) {
	ex := &Export{Sides: map[string]*Side{}}
	blocks := map[string]*parts{}
	sideArrs := map[string]*[3]Array{} // tokens, valid, segments
	var others []Array
	seen := map[string]Array{}
	for _, a := range arrays {
		name := a.Name()
		if prev, ok := seen[name]; ok {
			return nil, &FormatError{File: a.File(), Array: name, Offset: -1,
				Msg: fmt.Sprintf("array name also used in %s", prev.File())}
		}
		seen[name] = a
		owner, r, layer := classify(name)
		switch r {
		case roleAttn, roleGrad, roleAllow, roleOut, roleQPos:
			p := blocks[owner]
			if p == nil {
				p = &parts{name: owner}
				blocks[owner] = p
			}
			if err := p.set(r, layer, a); err != nil {
				return nil, err
			}
		case roleTokens, roleValid, roleSegments:
			s := sideArrs[owner]
			if s == nil {
				s = &[3]Array{}
				sideArrs[owner] = s
			}
			s[int(r-roleTokens)] = a
		case roleLogits:
			ex.Logits = a
		case roleVocab:
			if a.DType() != String || len(a.Shape()) != 1 {
				return nil, ferr(a, "vocab must be a 1-d string array (the text of each vocabulary index), got %s %v", a.DType(), a.Shape())
			}
			v, err := a.ReadStrings()
			if err != nil {
				return nil, err
			}
			ex.Vocab = v
		case roleMeta:
			if a.DType() != String || prod(a.Shape()) != 1 {
				return nil, ferr(a, "meta must be one string (a 0-d string array holding the JSON)")
			}
			s, err := a.ReadStrings()
			if err != nil {
				return nil, ferr(a, "%v", err)
			}
			metas = append(metas, metaSource{file: a.File(), text: s[0]})
		default:
			others = append(others, a)
		}
	}

	md, err := mergeMeta(metas)
	if err != nil {
		return nil, err
	}
	ex.Format = md.Format

	// Arrays outside the convention become blocks when the convention found none.
	if len(blocks) == 0 {
		groups := map[string][]Array{}
		var order []string
		for _, a := range others {
			if !a.DType().IsFloat() || len(a.Shape()) < 2 || strings.Contains(a.Name(), "/") {
				continue
			}
			base := a.Name()
			if m := trailingNum.FindStringSubmatch(base); m != nil {
				base = m[1]
			}
			if _, ok := groups[base]; !ok {
				order = append(order, base)
			}
			groups[base] = append(groups[base], a)
		}
		used := map[Array]bool{}
		for _, base := range order {
			g := groups[base]
			if len(g) >= 2 {
				name := base
				if name == "" {
					name = "attn"
				}
				p := &parts{name: name, bare: true, attnL: map[int]Array{}}
				ok := true
				for _, a := range g {
					m := trailingNum.FindStringSubmatch(a.Name())
					l, _ := strconv.Atoi(m[2])
					if _, dup := p.attnL[l]; dup {
						ok = false
						break
					}
					p.attnL[l] = a
				}
				if ok && blocks[name] == nil {
					blocks[name] = p
					for _, a := range g {
						used[a] = true
					}
					continue
				}
			}
			for _, a := range g {
				name := a.Name()
				if name == "" {
					name = "attn"
				}
				if blocks[name] == nil {
					blocks[name] = &parts{name: name, bare: true, attn: a}
					used[a] = true
				}
			}
		}
		rest := others[:0:0]
		for _, a := range others {
			if !used[a] {
				rest = append(rest, a)
			}
		}
		others = rest
	}
	for _, a := range others {
		ex.Warnings = append(ex.Warnings, fmt.Sprintf("%s: %s: ignored: not a name of the heed-export/1 convention", a.File(), a.Name()))
	}
	for _, name := range slices.Sorted(maps.Keys(md.Blocks)) {
		if blocks[name] == nil {
			ex.Warnings = append(ex.Warnings, fmt.Sprintf("metadata describes block %q, which has no arrays", name))
		}
	}
	if len(blocks) == 0 {
		where := "the input"
		if len(arrays) > 0 {
			where = arrays[0].File()
		}
		return nil, &FormatError{File: where, Offset: -1, Msg: "no attention arrays: expected BLOCK/attn, BLOCK/attn/N or BLOCK/out (heed-export/1), or a single floating-point array"}
	}

	names := make([]string, 0, len(blocks))
	for n := range blocks {
		names = append(names, n)
	}
	sort.Strings(names)
	for _, n := range names {
		b, err := buildBlock(blocks[n], md.Blocks[n], md.ComputeDType, opt)
		if err != nil {
			return nil, err
		}
		ex.Blocks = append(ex.Blocks, b)
	}
	if err := buildSides(ex, sideArrs, opt); err != nil {
		return nil, err
	}
	if ex.Logits != nil {
		a := ex.Logits
		if !a.DType().IsFloat() || len(a.Shape()) < 2 || len(a.Shape()) > 3 {
			return nil, ferr(a, "logits must be a floating-point [batch, position, vocab] or [position, vocab] array, got %s %v", a.DType(), a.Shape())
		}
		if sh := a.Shape(); ex.Vocab != nil && len(ex.Vocab) != sh[len(sh)-1] {
			return nil, ferr(a, "logits have %d vocabulary entries, the vocab array %d", sh[len(sh)-1], len(ex.Vocab))
		}
	}
	for _, b := range ex.Blocks {
		if b.Layers > 0 && b.Heads == 1 {
			ex.Warnings = append(ex.Warnings, fmt.Sprintf("%s: one head per layer: heads were probably averaged at export, so per-head statistics and pruning do not apply", b.Name))
		}
		if b.Layers > 0 && b.AxesFrom == "rank" && b.AxesOther != "" {
			ex.Warnings = append(ex.Warnings, fmt.Sprintf("%s: axes guessed from the rank as %q (no metadata, no --axes); if the array is [%s], pass --axes %q (or meta blocks.%s.axes)",
				b.Name, b.Axes, strings.ReplaceAll(b.AxesOther, " ", ", "), b.AxesOther, b.Name))
		}
		if b.Window > 0 && b.Kind != KindCausal {
			ex.Warnings = append(ex.Warnings, fmt.Sprintf("%s: window %d is only checked for causal blocks", b.Name, b.Window))
		}
	}
	return ex, nil
}

func mergeMeta(metas []metaSource) (metaDoc, error) {
	var out metaDoc
	out.Blocks = map[string]metaBlock{}
	origin := map[string]string{}
	for _, m := range metas {
		var d metaDoc
		dec := json.NewDecoder(strings.NewReader(m.text))
		if err := dec.Decode(&d); err != nil {
			return out, &FormatError{File: m.file, Array: "meta", Offset: -1, Msg: "metadata is not a JSON object of the heed-export/1 form", Err: err}
		}
		if d.Format != "" {
			if !strings.HasPrefix(d.Format, "heed-export/") {
				return out, &FormatError{File: m.file, Array: "meta", Offset: -1, Msg: fmt.Sprintf("format %q is not heed-export/1", d.Format)}
			}
			if d.Format != FormatName {
				return out, &FormatError{File: m.file, Array: "meta", Offset: -1, Msg: fmt.Sprintf("format %q is newer than this heed reads (%s)", d.Format, FormatName)}
			}
			out.Format = d.Format
		}
		if d.ComputeDType != "" {
			if out.ComputeDType != "" && out.ComputeDType != d.ComputeDType {
				return out, &FormatError{File: m.file, Array: "meta", Offset: -1, Msg: fmt.Sprintf("compute_dtype %q differs from %q given elsewhere", d.ComputeDType, out.ComputeDType)}
			}
			out.ComputeDType = d.ComputeDType
		}
		for _, name := range slices.Sorted(maps.Keys(d.Blocks)) {
			b := d.Blocks[name]
			if prev, ok := out.Blocks[name]; ok {
				pj, _ := json.Marshal(prev)
				bj, _ := json.Marshal(b)
				if !bytes.Equal(pj, bj) {
					return out, &FormatError{File: m.file, Array: "meta", Offset: -1, Msg: fmt.Sprintf("block %q described differently in %s", name, origin[name])}
				}
			}
			out.Blocks[name] = b
			origin[name] = m.file
		}
	}
	return out, nil
}

// blockSettings are a block's settings after options, metadata and attributes.
type blockSettings struct {
	kind                    Kind
	query, key              string
	axes                    string
	window, prefix, kvHeads int
	axesFrom                string // "--axes", "metadata", "attribute" or ""
	kindFrom                string // "--kind", "metadata", "attribute" or ""
	compute                 DType  // Invalid = not said
	queryStart              []int  // nil = not said; one value, or one per batch item
	startFrom               string // "--query-start", "metadata", "attribute"
}

func settings(p *parts, mb metaBlock, topCompute string, opt Options, attn Array) (blockSettings, error) {
	var s blockSettings
	attr := func(name string) (string, bool) {
		if ar, ok := attn.(attrReader); ok && attn != nil {
			return ar.Attr(name)
		}
		return "", false
	}
	metaErr := func(format string, a ...any) error {
		return &FormatError{File: attn.File(), Array: "meta", Offset: -1, Msg: fmt.Sprintf("block %q: ", p.name) + fmt.Sprintf(format, a...)}
	}
	// kind
	switch {
	case opt.Kind != "":
		s.kind, s.kindFrom = opt.Kind, "--kind"
	case mb.Kind != nil:
		s.kind, s.kindFrom = Kind(*mb.Kind), "metadata"
	default:
		if v, ok := attr("kind"); ok {
			s.kind, s.kindFrom = Kind(v), "attribute"
		}
	}
	if s.kind == KindUnknown {
		s.kindFrom = ""
	}
	// compute dtype
	var cname, cfrom string
	switch {
	case opt.ComputeDType != Invalid:
		s.compute = opt.ComputeDType
	case mb.ComputeDType != nil:
		cname, cfrom = *mb.ComputeDType, "metadata"
	case topCompute != "":
		cname, cfrom = topCompute, "metadata"
	default:
		if v, ok := attr("compute_dtype"); ok {
			cname, cfrom = v, "attribute"
		}
	}
	if cfrom != "" {
		d, err := ParseComputeDType(cname)
		if err != nil {
			return s, metaErr("%v", err)
		}
		s.compute = d
	}
	// query start
	switch {
	case opt.QueryStart >= 0:
		s.queryStart, s.startFrom = []int{opt.QueryStart}, "--query-start"
	case len(mb.QueryStart) > 0 && string(mb.QueryStart) != "null":
		var one int
		var list []int
		if err := json.Unmarshal(mb.QueryStart, &one); err == nil {
			list = []int{one}
		} else if err := json.Unmarshal(mb.QueryStart, &list); err != nil || len(list) == 0 {
			return s, metaErr("query_start must be an integer or a list of integers (one per batch item)")
		}
		for _, v := range list {
			if v < 0 {
				return s, metaErr("query_start %d is negative", v)
			}
		}
		s.queryStart, s.startFrom = list, "metadata"
	default:
		if v, ok := attr("query_start"); ok {
			n, err := strconv.Atoi(strings.TrimSpace(v))
			if err != nil || n < 0 {
				return s, &FormatError{File: attn.File(), Array: attn.Name(), Offset: -1, Msg: fmt.Sprintf("attribute query_start=%q is not a non-negative integer", v)}
			}
			s.queryStart, s.startFrom = []int{n}, "attribute"
		}
	}
	switch s.kind {
	case KindUnknown, KindCausal, KindBidirectional, KindCross:
	default:
		return s, metaErr("kind %q is not causal, bidirectional or cross", s.kind)
	}
	if mb.Query != nil {
		s.query = *mb.Query
	} else if v, ok := attr("query"); ok {
		s.query = v
	}
	if mb.Key != nil {
		s.key = *mb.Key
	} else if v, ok := attr("key"); ok {
		s.key = v
	}
	if s.key == "" {
		s.key = s.query
	}
	if s.query == "" {
		s.query = s.key
	}
	// axes
	switch {
	case opt.Axes != "":
		s.axes, s.axesFrom = opt.Axes, "--axes"
	case len(mb.Axes) > 0 && string(mb.Axes) != "null":
		var str string
		var list []string
		if err := json.Unmarshal(mb.Axes, &str); err == nil {
			s.axes = str
		} else if err := json.Unmarshal(mb.Axes, &list); err == nil {
			s.axes = strings.Join(list, " ")
		} else {
			return s, metaErr("axes must be a string such as \"layer batch head query key\" or a list of names")
		}
		s.axesFrom = "metadata"
	default:
		if v, ok := attr("axes"); ok {
			s.axes, s.axesFrom = v, "attribute"
		}
	}
	num := func(o int, m *int, name string) (int, error) {
		if o >= 0 {
			return o, nil
		}
		if m != nil {
			if *m < 0 {
				return 0, metaErr("%s %d is negative", name, *m)
			}
			return *m, nil
		}
		if v, ok := attr(name); ok {
			n, err := strconv.Atoi(strings.TrimSpace(v))
			if err != nil || n < 0 {
				return 0, &FormatError{File: attn.File(), Array: attn.Name(), Offset: -1, Msg: fmt.Sprintf("attribute %s=%q is not a non-negative integer", name, v)}
			}
			return n, nil
		}
		return 0, nil
	}
	var err error
	if s.window, err = num(opt.Window, mb.Window, "window"); err != nil {
		return s, err
	}
	if s.prefix, err = num(opt.Prefix, mb.Prefix, "prefix"); err != nil {
		return s, err
	}
	if s.kvHeads, err = num(opt.KVHeads, mb.KVHeads, "kv_heads"); err != nil {
		return s, err
	}
	return s, nil
}

// layerArrays returns the arrays of a whole-or-per-layer role in layer order,
// checking that per-layer indices run 0..L-1.
// lowestLayer is the per-layer array of the lowest layer: the one messages
// name, the same from one run to the next (a map's order is not).
func lowestLayer(per map[int]Array) Array {
	best := -1
	for l := range per {
		if best < 0 || l < best {
			best = l
		}
	}
	return per[best]
}

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

// resolveAxes decides the axes of an attention array of the given rank.
func resolveAxes(a Array, axes string, perLayer bool) (axisSpec, error) {
	rank := len(a.Shape())
	var names []string
	if axes == "" {
		byRank := map[int]string{2: "query key", 3: "head query key", 4: "layer head query key", 5: "layer batch head query key"}
		if perLayer {
			byRank = map[int]string{2: "query key", 3: "head query key", 4: "batch head query key"}
		}
		s, ok := byRank[rank]
		if !ok {
			return axisSpec{}, ferr(a, "cannot infer the axes of a rank-%d array; give them with --axes or the metadata's \"axes\"", rank)
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

func shapeEq(a, b []int) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
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
		a := p.grad
		if a == nil {
			a = p.allow
		}
		if len(p.gradL) > 0 {
			a = lowestLayer(p.gradL)
		}
		return nil, ferr(a, "block %q has no attention (%s/attn or %s/attn/N)", p.name, p.name, p.name)
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
		sp, err := resolveAxes(a0, st.axes, attnPer)
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
			if !shapeEq(a.Shape(), a0.Shape()) {
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
			gs, err := resolveAxes(gradArrs[0], st.axes, gradPer)
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
				if !shapeEq(g.Shape(), gradArrs[0].Shape()) {
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
		if p.grad != nil || len(p.gradL) > 0 || p.allow != nil {
			a := p.grad
			if a == nil {
				a = p.allow
			}
			if len(p.gradL) > 0 {
				a = lowestLayer(p.gradL)
			}
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
			if !shapeEq(o.Shape(), o0.Shape()) {
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

// otherReading returns the --axes value of the other way an attention array
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
	if qpos != nil && st.queryStart != nil && st.startFrom != "--query-start" {
		return ferr(qpos, "block %q has both %s/qpos and query_start: give one", b.Name, b.Name)
	}
	switch {
	case st.startFrom == "--query-start" || (qpos == nil && st.queryStart != nil):
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

// maxSide bounds the number of elements of a tokens, valid or segments
// array, which are read whole (a sparse HDF5 dataset can claim any shape).
const maxSide = 1 << 24

// sideSrc is where a side's length was first established, for messages.
type sideSrc struct {
	arr  Array
	file string // tokens file when arr is nil
	what string
}

func (s sideSrc) err(format string, a ...any) error {
	if s.arr != nil {
		return ferr(s.arr, format, a...)
	}
	return &FormatError{File: s.file, Offset: -1, Msg: fmt.Sprintf(format, a...)}
}

func buildSides(ex *Export, arrs map[string]*[3]Array, opt Options) error {
	srcs := map[string]sideSrc{}
	side := func(name string) *Side {
		s := ex.Sides[name]
		if s == nil {
			s = &Side{Name: name, Len: -1}
			ex.Sides[name] = s
		}
		return s
	}
	// setLen records a side length and checks it against earlier ones.
	setLen := func(s *Side, n int, src sideSrc) error {
		if s.Len < 0 {
			s.Len = n
			srcs[s.Name] = src
			return nil
		}
		if s.Len != n {
			prev := srcs[s.Name]
			return src.err("%d %s, but %s gives side %q %d positions", n, src.what, prev.describe(), s.Name, s.Len)
		}
		return nil
	}
	rows0 := func(a Array) (batch, n int, err error) {
		sh := a.Shape()
		switch len(sh) {
		case 1:
			return 1, sh[0], nil
		case 2:
			return sh[0], sh[1], nil
		}
		return 0, 0, ferr(a, "must be [seq] or [batch, seq], got shape %v", sh)
	}
	rows := func(a Array) (int, int, error) {
		bt, n, err := rows0(a)
		if err == nil && int64(bt)*int64(n) > maxSide {
			return 0, 0, ferr(a, "%d x %d positions is more than heed reads for a side (%d)", bt, n, maxSide)
		}
		return bt, n, err
	}
	names := make([]string, 0, len(arrs))
	for n := range arrs {
		names = append(names, n)
	}
	sort.Strings(names)
	for _, name := range names {
		a3 := arrs[name]
		s := side(name)
		if a := a3[0]; a != nil {
			bt, n, err := rows(a)
			if err != nil {
				return err
			}
			var toks []string
			switch {
			case a.DType() == String:
				toks, err = a.ReadStrings()
			case a.DType().IsInt():
				// Token ids instead of strings: show the ids.
				ids := make([]int64, bt*n)
				if err = a.ReadInt64(nil, ids); err == nil {
					toks = make([]string, len(ids))
					for i, v := range ids {
						toks[i] = strconv.FormatInt(v, 10)
					}
				}
			default:
				return ferr(a, "tokens must be strings (or integer ids), got %s", a.DType())
			}
			if err != nil {
				return ferr(a, "%v", err)
			}
			if err := setLen(s, n, sideSrc{arr: a, what: "tokens"}); err != nil {
				return err
			}
			s.Tokens = splitRows(toks, bt, n)
		}
		if a := a3[1]; a != nil {
			bt, n, err := rows(a)
			if err != nil {
				return err
			}
			if a.DType() == String || a.DType() == Invalid {
				return ferr(a, "valid must be bool or integer (1 = real token, 0 = padding), got %s", a.DType())
			}
			if err := setLen(s, n, sideSrc{arr: a, what: "positions"}); err != nil {
				return err
			}
			v := make([]float32, bt*n)
			if err := a.ReadFloat32(nil, v); err != nil {
				return ferr(a, "%v", err)
			}
			s.Valid = make([][]bool, bt)
			for i := range s.Valid {
				s.Valid[i] = make([]bool, n)
				for j := range s.Valid[i] {
					s.Valid[i][j] = v[i*n+j] != 0
				}
			}
		}
		if a := a3[2]; a != nil {
			bt, n, err := rows(a)
			if err != nil {
				return err
			}
			if !a.DType().IsInt() || a.DType() == Bool {
				return ferr(a, "segments must be integer document ids, got %s", a.DType())
			}
			if err := setLen(s, n, sideSrc{arr: a, what: "positions"}); err != nil {
				return err
			}
			v := make([]int64, bt*n)
			if err := a.ReadInt64(nil, v); err != nil {
				return ferr(a, "%v", err)
			}
			s.Segments = make([][]int64, bt)
			for i := range s.Segments {
				s.Segments[i] = v[i*n : (i+1)*n : (i+1)*n]
			}
		}
	}

	if opt.TokensFile != "" {
		sideName, path := "", opt.TokensFile
		if i := strings.IndexByte(path, '='); i > 0 && !strings.ContainsAny(path[:i], `/\.`) {
			if _, err := os.Stat(path); err != nil {
				sideName, path = path[:i], path[i+1:]
			}
		}
		toks, err := readTokensFile(path)
		if err != nil {
			return err
		}
		if sideName == "" {
			set := map[string]bool{}
			for n := range ex.Sides {
				set[n] = true
			}
			for _, b := range ex.Blocks {
				if b.QuerySide != "" {
					set[b.QuerySide] = true
				}
				if b.KeySide != "" {
					set[b.KeySide] = true
				}
			}
			switch len(set) {
			case 0:
				sideName = "target"
			case 1:
				for n := range set {
					sideName = n
				}
			default:
				var all []string
				for n := range set {
					all = append(all, n)
				}
				sort.Strings(all)
				return &FormatError{File: path, Offset: -1, Msg: fmt.Sprintf("--tokens: the export has sides %s; say which with --tokens SIDE=FILE", strings.Join(all, ", "))}
			}
		}
		s := side(sideName)
		n := len(toks[0])
		for _, r := range toks {
			if len(r) != n {
				return &FormatError{File: path, Offset: -1, Msg: fmt.Sprintf("token lists of different lengths (%d and %d)", n, len(r))}
			}
		}
		// The file replaces the export's own tokens for this side.
		if srcs[sideName].what == "tokens" {
			s.Len = -1
			if s.Valid != nil {
				s.Len = len(s.Valid[0])
			} else if s.Segments != nil {
				s.Len = len(s.Segments[0])
			}
		}
		if err := setLen(s, n, sideSrc{file: path, what: "tokens"}); err != nil {
			return err
		}
		s.Tokens = toks
	}

	// A block without sides uses the export's only side when it fits, or
	// always when the side's tokens came from --tokens (then a length that
	// does not fit is an error below).
	if len(ex.Sides) == 1 {
		var only *Side
		for _, s := range ex.Sides {
			only = s
		}
		forced := opt.TokensFile != ""
		for _, b := range ex.Blocks {
			fits := only.Len == b.Keys && b.Queries <= b.Keys
			if b.QuerySide == "" && b.KeySide == "" && b.Kind != KindCross && b.Layers > 0 && (fits || forced) {
				b.QuerySide, b.KeySide = only.Name, only.Name
			}
		}
	}

	// Lengths and batch sizes must agree with the blocks that use each side.
	for _, b := range ex.Blocks {
		if b.Layers == 0 {
			continue
		}
		check := func(name string, n int, what string) error {
			if name == "" {
				return nil
			}
			s := side(name)
			if s.Len < 0 {
				s.Len = n
				srcs[name] = sideSrc{what: "positions", file: "block " + b.Name}
				return nil
			}
			if s.Len != n {
				src := srcs[name]
				if src.arr == nil && strings.HasPrefix(src.file, "block ") {
					return &FormatError{File: b.Source, Offset: -1, Msg: fmt.Sprintf("block %q has %d %s on side %q, but %s has %d", b.Name, n, what, name, src.file, s.Len)}
				}
				return src.err("%d %s, but block %q has %d %s", s.Len, src.what, b.Name, n, what)
			}
			return nil
		}
		qn, qwhat := b.Queries, "queries"
		if b.QuerySide == b.KeySide && b.Queries < b.Keys {
			// queries are the last Q positions of the side
			qn, qwhat = b.Keys, fmt.Sprintf("positions (its %d queries are the last ones)", b.Queries)
		}
		if err := check(b.QuerySide, qn, qwhat); err != nil {
			return err
		}
		if err := check(b.KeySide, b.Keys, "keys"); err != nil {
			return err
		}
		for _, name := range []string{b.QuerySide, b.KeySide} {
			s := ex.Sides[name]
			if s == nil {
				continue
			}
			for _, rowsN := range []int{len(s.Tokens), len(s.Valid), len(s.Segments)} {
				if rowsN > 1 && rowsN != b.Batch {
					src := srcs[name]
					return src.err("side %q has %d batch rows, block %q has batch %d", name, rowsN, b.Name, b.Batch)
				}
			}
		}
	}
	for name, s := range ex.Sides {
		if s.Len < 0 {
			delete(ex.Sides, name)
		}
	}
	return nil
}

func (s sideSrc) describe() string {
	if s.arr != nil {
		return s.arr.Name()
	}
	return s.file
}

func splitRows(v []string, batch, n int) [][]string {
	out := make([][]string, batch)
	for i := range out {
		out[i] = v[i*n : (i+1)*n : (i+1)*n]
	}
	return out
}

// readTokensFile reads --tokens: a JSON list of strings, a JSON list of
// lists (one per batch item), or one token a line.
func readTokensFile(path string) ([][]string, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, &FormatError{File: path, Offset: -1, Msg: "cannot read the tokens file", Err: err}
	}
	t := bytes.TrimSpace(b)
	if len(t) > 0 && t[0] == '[' {
		var flat []string
		if err := json.Unmarshal(t, &flat); err == nil {
			if len(flat) == 0 {
				return nil, &FormatError{File: path, Offset: -1, Msg: "empty token list"}
			}
			return [][]string{flat}, nil
		}
		var nested [][]string
		if err := json.Unmarshal(t, &nested); err != nil {
			return nil, &FormatError{File: path, Offset: -1, Msg: "not a JSON list of strings or of lists of strings", Err: err}
		}
		if len(nested) == 0 || len(nested[0]) == 0 {
			return nil, &FormatError{File: path, Offset: -1, Msg: "empty token list"}
		}
		return nested, nil
	}
	s := string(b)
	s = strings.TrimSuffix(s, "\n")
	if s == "" {
		return nil, &FormatError{File: path, Offset: -1, Msg: "empty tokens file"}
	}
	lines := strings.Split(s, "\n")
	for i, l := range lines {
		lines[i] = strings.TrimSuffix(l, "\r")
	}
	return [][]string{lines}, nil
}
