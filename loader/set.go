package loader

import (
	"fmt"
	"strings"
)

// Set is what the commands open: one or more examples of the same model
// layout (each an Export), opened lazily one at a time so that thousands of
// exported examples can be aggregated without holding them all open.
//
// Grouping rule (OpenSet): each path argument is a file, a directory (every
// export file under it), or a list file ("@LIST": one path a line). The
// files, in the order given, are gathered into examples greedily: a file
// joins the current example unless one of its array names is already in it
// (metadata only counts when it differs), in which case it starts the next
// example. So a directory of per-layer files is one example, and files that
// each hold a whole export are one example each.
//
// Examples must share the layout of the first one (see BlockLayout): block
// names, kinds, sides, layers, heads, KV heads and activation shapes. Batch
// size, query and key lengths, tokens, padding, prefix and window may differ
// from example to example (sequence lengths vary across a data set).
type Set struct {
	// Examples holds, per example, the files it is assembled from.
	Examples [][]string
	// Warnings of the first example (see Export.Warnings).
	Warnings []string
	opt      Options
	groups   [][]fileRef
	layout   []BlockLayout
}

// Len is the number of examples.
func (s *Set) Len() int { return len(s.Examples) }

// BlockLayout is what every example of a Set shares for one block.
type BlockLayout struct {
	Name      string
	Kind      Kind
	QuerySide string
	KeySide   string
	Layers    int
	Heads     int
	KVHeads   int
	OutLayers int
	Features  int
}

func layoutOf(ex *Export) []BlockLayout {
	out := make([]BlockLayout, len(ex.Blocks))
	for i, b := range ex.Blocks {
		out[i] = BlockLayout{Name: b.Name, Kind: b.Kind, QuerySide: b.QuerySide, KeySide: b.KeySide,
			Layers: b.Layers, Heads: b.Heads, KVHeads: b.KVHeads, OutLayers: b.OutLayers, Features: b.Features}
	}
	return out
}

// Layout returns the first example's blocks: what every example shares.
func (s *Set) Layout() []BlockLayout { return append([]BlockLayout(nil), s.layout...) }

// OpenSet reads the headers of every file named by paths, groups them into
// examples (see Set) and checks every example: each is assembled, so a bad
// file fails here with a *FormatError rather than half way through a run.
// Nothing stays open; Open(i) opens one example.
func OpenSet(paths []string, opt Options) (*Set, error) {
	refs, err := expand(paths)
	if err != nil {
		return nil, err
	}
	s := &Set{opt: opt}
	var (
		cur   []Container
		refsG []fileRef
		names = map[string]bool{}
		meta  string
		has   bool
	)
	flush := func() error {
		if len(cur) == 0 {
			return nil
		}
		ex, err := assembleContainers(cur, opt)
		if err != nil {
			closeAll(cur)
			cur = nil
			return err
		}
		if s.layout == nil {
			s.layout = layoutOf(ex)
			s.Warnings = ex.Warnings
		} else if err := s.sameLayout(ex); err != nil {
			ex.Close()
			cur = nil
			return err
		}
		ex.Close()
		paths := make([]string, len(refsG))
		for i, r := range refsG {
			paths[i] = r.path
		}
		s.Examples = append(s.Examples, paths)
		s.groups = append(s.groups, refsG)
		cur, refsG, names, meta, has = nil, nil, map[string]bool{}, "", false
		return nil
	}
	for _, r := range refs {
		c, err := openFile(r)
		if err != nil {
			closeAll(cur)
			return nil, err
		}
		m, hasM := c.Meta()
		collide := hasM && has && m != meta
		for _, a := range c.Arrays() {
			if names[a.Name()] {
				collide = true
			}
		}
		if collide {
			if err := flush(); err != nil {
				c.Close()
				return nil, err
			}
		}
		for _, a := range c.Arrays() {
			names[a.Name()] = true
		}
		if hasM {
			meta, has = m, true
		}
		cur = append(cur, c)
		refsG = append(refsG, r)
	}
	if err := flush(); err != nil {
		return nil, err
	}
	return s, nil
}

// Open opens example i; the caller closes it. The example is checked
// against the set's layout again, in case its files changed.
func (s *Set) Open(i int) (*Export, error) {
	if i < 0 || i >= len(s.groups) {
		return nil, fmt.Errorf("loader: example %d of %d", i, len(s.groups))
	}
	var cs []Container
	for _, r := range s.groups[i] {
		c, err := openFile(r)
		if err != nil {
			closeAll(cs)
			return nil, err
		}
		cs = append(cs, c)
	}
	ex, err := assembleContainers(cs, s.opt)
	if err != nil {
		closeAll(cs)
		return nil, err
	}
	if err := s.sameLayout(ex); err != nil {
		ex.Close()
		return nil, err
	}
	return ex, nil
}

// sameLayout checks an example against the first one.
func (s *Set) sameLayout(ex *Export) error {
	got := layoutOf(ex)
	file := strings.Join(ex.Paths, ", ")
	first := strings.Join(s.Examples[0], ", ")
	if len(got) != len(s.layout) {
		return &FormatError{File: file, Offset: -1, Msg: fmt.Sprintf("%d blocks, the first example (%s) has %d: examples must share one layout", len(got), first, len(s.layout))}
	}
	for i, g := range got {
		w := s.layout[i]
		if g != w {
			return &FormatError{File: file, Array: g.Name, Offset: -1,
				Msg: fmt.Sprintf("layout %s differs from the first example's (%s: %s): examples must share block names, kinds, sides, layers and heads", g.describe(), first, w.describe())}
		}
	}
	return nil
}

func (l BlockLayout) describe() string {
	s := fmt.Sprintf("%s kind=%q sides=%s/%s layers=%d heads=%d", l.Name, l.Kind, l.QuerySide, l.KeySide, l.Layers, l.Heads)
	if l.KVHeads > 0 {
		s += fmt.Sprintf(" kv_heads=%d", l.KVHeads)
	}
	if l.OutLayers > 0 {
		s += fmt.Sprintf(" out=%dx%d", l.OutLayers, l.Features)
	}
	return s
}
