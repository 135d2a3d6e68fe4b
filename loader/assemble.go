// Assembling: the arrays of one or more containers become an Export. Names
// are sorted into blocks and sides by the convention (convention.go), arrays
// outside it become blocks when nothing follows it, and the export-wide
// checks and warnings are made here; blocks.go and sides.go build the parts.

package loader

import (
	"fmt"
	"maps"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"sync"
)

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

func ferr(a Array, format string, args ...any) error {
	return &FormatError{File: a.File(), Array: a.Name(), Offset: -1, Msg: fmt.Sprintf(format, args...)}
}

// trailingNum is compiled on first use, not at every start of heed.
var trailingNum = sync.OnceValue(func() *regexp.Regexp { return regexp.MustCompile(`^(.*?)[_.\-]?([0-9]+)$`) })

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
			if n := a.Shape()[0]; n > maxSide {
				return nil, ferr(a, "%d vocabulary entries is more than heed reads (%d)", n, maxSide)
			}
			ex.Vocab = a
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
		var err error
		if blocks, others, err = bareBlocks(others); err != nil {
			return nil, err
		}
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

	for _, n := range slices.Sorted(maps.Keys(blocks)) {
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
		if sh := a.Shape(); ex.Vocab != nil && ex.Vocab.Shape()[0] != sh[len(sh)-1] {
			return nil, ferr(a, "logits have %d vocabulary entries, the vocab array %d", sh[len(sh)-1], ex.Vocab.Shape()[0])
		}
	}
	for _, b := range ex.Blocks {
		if b.Layers > 0 && b.Heads == 1 {
			ex.Warnings = append(ex.Warnings, fmt.Sprintf("%s: one head per layer: heads were probably averaged at export, so per-head statistics and pruning do not apply", b.Name))
		}
		if b.Layers > 0 && b.AxesFrom == "rank" && b.AxesOther != "" {
			ex.Warnings = append(ex.Warnings, fmt.Sprintf("%s: axes guessed from the rank as %q (no metadata, no %s); if the array is [%s], pass %s %q (or meta blocks.%s.axes)",
				b.Name, b.Axes, opt.name("axes"), strings.ReplaceAll(b.AxesOther, " ", ", "), opt.name("axes"), b.AxesOther, b.Name))
		}
		if b.Window > 0 && b.Kind != KindCausal {
			ex.Warnings = append(ex.Warnings, fmt.Sprintf("%s: window %d is only checked for causal blocks", b.Name, b.Window))
		}
	}
	return ex, nil
}

// bareBlocks makes blocks of the floating-point arrays of rank 2 or more
// outside the convention (used when nothing in the input follows it), and
// returns the arrays it left. Arrays named with numbers after one stem
// (layer_0, layer_1, ...) are the layers of one block named by the stem
// ("attn" for 0, 1, ...); any other array is a block of its own name. Where
// two arrays could both be meant (a stem both with and without a number, two
// arrays of one layer number, two arrays that make one block name), it is an
// error naming them and how to choose.
func bareBlocks(others []Array) (map[string]*parts, []Array, error) {
	groups := map[string][]Array{}
	var order []string
	var rest []Array
	for _, a := range others {
		if !a.DType().IsFloat() || len(a.Shape()) < 2 || strings.Contains(a.Name(), "/") {
			rest = append(rest, a)
			continue
		}
		base := a.Name()
		if m := trailingNum().FindStringSubmatch(base); m != nil {
			base = m[1]
		}
		if _, ok := groups[base]; !ok {
			order = append(order, base)
		}
		groups[base] = append(groups[base], a)
	}
	blocks := map[string]*parts{}
	from := map[string][]Array{} // a block's arrays, for messages
	add := func(p *parts, arrs []Array) error {
		if prev, ok := from[p.name]; ok {
			return ambiguous(append(slices.Clone(prev), arrs...), fmt.Sprintf("could each be the attention of block %q", p.name))
		}
		blocks[p.name], from[p.name] = p, arrs
		return nil
	}
	for _, base := range order {
		g := groups[base]
		if len(g) == 1 {
			name := g[0].Name()
			if name == "" {
				name = "attn"
			}
			if err := add(&parts{name: name, bare: true, attn: g[0]}, g); err != nil {
				return nil, nil, err
			}
			continue
		}
		name := base
		if name == "" {
			name = "attn"
		}
		p := &parts{name: name, bare: true, attnL: map[int]Array{}}
		for _, a := range g {
			m := trailingNum().FindStringSubmatch(a.Name())
			if m == nil {
				return nil, nil, ambiguous(g, fmt.Sprintf("could each be the attention of block %q (%s as a whole, the others as its layers)", name, a.Name()))
			}
			l, err := strconv.Atoi(m[2])
			if err != nil || l >= 1<<20 {
				return nil, nil, ferr(a, "layer number %s is larger than heed reads", m[2])
			}
			if prev, dup := p.attnL[l]; dup {
				return nil, nil, ambiguous([]Array{prev, a}, fmt.Sprintf("both number layer %d of block %q", l, name))
			}
			p.attnL[l] = a
		}
		if err := add(p, g); err != nil {
			return nil, nil, err
		}
	}
	return blocks, rest, nil
}

// ambiguous is the error for arrays outside the convention that could each
// be meant where heed takes one: it names them (and their files) and says
// how to choose.
func ambiguous(arrs []Array, what string) error {
	var names, files []string
	for _, a := range arrs {
		names = append(names, a.Name())
		if !slices.Contains(files, a.File()) {
			files = append(files, a.File())
		}
	}
	list := strings.Join(names[:len(names)-1], ", ") + " and " + names[len(names)-1]
	return &FormatError{File: strings.Join(files, ", "), Offset: -1,
		Msg: fmt.Sprintf("arrays %s %s: say which by naming them by the heed-export/1 convention (BLOCK/attn for a whole array, BLOCK/attn/N for layer N), or leave the others out", list, what)}
}
