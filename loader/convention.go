// The heed-export/1 convention: what an array's name means (BLOCK/attn[/N],
// BLOCK/grad[/N], BLOCK/allow, BLOCK/out[/N], BLOCK/qpos, tokens/SIDE,
// valid/SIDE, segments/SIDE, logits, vocab, meta), the metadata JSON and how
// it merges across files, and a block's settings as options, metadata and
// array attributes give them, validated.

package loader

import (
	"bytes"
	"encoding/json"
	"fmt"
	"maps"
	"slices"
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
	axesFrom                string // "option", "metadata", "attribute" or ""
	kindFrom                string // "option", "metadata", "attribute" or ""
	compute                 DType  // Invalid = not said
	queryStart              []int  // nil = not said; one value, or one per batch item
	startFrom               string // "option", "metadata", "attribute"
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
		s.kind, s.kindFrom = opt.Kind, "option"
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
		s.queryStart, s.startFrom = []int{opt.QueryStart}, "option"
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
		s.axes, s.axesFrom = opt.Axes, "option"
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
