package loader

import (
	"fmt"
	"path/filepath"
	"slices"
	"strings"
)

// Set is what the commands open: one or more examples of the same model
// layout (each an Export), opened lazily one at a time so that thousands of
// exported examples can be aggregated without holding them all open.
//
// Each path argument is a file, a directory (every export file under it) or
// a list file ("@LIST": one path a line). How the files, in the order given,
// group into examples is decided by Options.Group (the setting "group"):
//
//   - GroupAuto (the default): NPY files named with numbers (ex0000.npy,
//     ex0001.npy, ... or 0.npy, 1.npy, ...), when they are all the files
//     given, all outside the convention's names and share the stem before
//     the number, are examples, one file each (the rule "numbered files are
//     examples"; Grouping.Guessed, with a warning). Otherwise the names
//     decide (GroupLayers).
//   - GroupLayers: a file joins the current example unless one of its
//     array names is already in it (metadata only counts when it differs),
//     in which case it starts the next example. So a directory of
//     per-layer files (decoder/attn/3.npy, or files that each hold
//     decoder/attn/3) is one example, bare NPY files named with numbers are
//     the layers of one block (layer_0.npy, layer_1.npy: block "layer"), and
//     files that each hold a whole export are one example each. An NPY
//     file's array name comes from its path, so NPY files are grouped
//     without being opened; other files' headers are read in order, except
//     that when the first example is one such file (the second file's
//     names repeat its names) and no NPY file follows, every file is taken
//     as one example and its names are read when its example is opened.
//   - GroupExamples: every file is one example; a bare NPY file's array is
//     named after its stem without the number (ex0007.npy: "ex"; 7.npy:
//     "attn"), so that every example has the same block names.
//   - GroupOne: every file is part of one export (names must not repeat).
//
// OpenSet assembles the first example only; example i is opened, assembled
// and checked against the first when Open(i) is called (Check checks them
// all), so a task that reads a few examples of a large set opens only their
// files and the first example's.
//
// Examples must share the layout of the first one (see BlockLayout): block
// names, kinds, sides, layers, heads, KV heads and activation shapes. Batch
// size, query and key lengths, tokens, padding, prefix and window may differ
// from example to example (sequence lengths vary across a data set).
type Set struct {
	// Examples holds, per example, the files it is assembled from.
	Examples [][]string
	// Warnings of the grouping (when it was guessed) and of the first
	// example (see Export.Warnings).
	Warnings []string
	// Grouping says how the files were grouped into examples.
	Grouping Grouping
	opt      Options
	groups   [][]fileRef
	layout   []BlockLayout
}

// GroupMode is how OpenSet groups files into examples (see Set).
type GroupMode string

// Group modes; GroupAuto is the zero value.
const (
	GroupAuto     GroupMode = ""
	GroupExamples GroupMode = "examples"
	GroupLayers   GroupMode = "layers"
	GroupOne      GroupMode = "one"
)

// ParseGroupMode reads a group mode by name: auto, examples, layers or one.
func ParseGroupMode(s string) (GroupMode, error) {
	switch m := GroupMode(strings.ToLower(strings.TrimSpace(s))); m {
	case "auto", GroupAuto:
		return GroupAuto, nil
	case GroupExamples, GroupLayers, GroupOne:
		return m, nil
	}
	return GroupAuto, fmt.Errorf("group %q is not one of auto, examples, layers, one", s)
}

// Grouping says how OpenSet grouped the files into examples.
type Grouping struct {
	// Rule names the rule that decided, for people: "numbered files are
	// examples", "array names", or the setting and its value ("group
	// examples", worded by Options.SettingName).
	Rule string
	// Guessed is true when nothing in the files or the options said how
	// they group (bare NPY files named with numbers).
	Guessed bool
	// Warning says what was guessed and how to say otherwise ("" when
	// nothing was guessed).
	Warning string
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

// OpenSet groups the files named by paths into examples (see Set) and
// assembles the first example, whose layout every other example must share:
// a bad first example fails here with a *FormatError. Nothing stays open;
// Open(i) opens one example, Check opens and checks all of them.
func OpenSet(paths []string, opt Options) (*Set, error) {
	refs, err := expand(paths)
	if err != nil {
		return nil, err
	}
	mode, err := ParseGroupMode(string(opt.Group))
	if err != nil {
		return nil, err
	}
	s := &Set{opt: opt}
	var first []Container // the first example's containers opened while grouping, by position (nil: not open)
	switch {
	case mode == GroupOne:
		s.groups = [][]fileRef{refs}
		s.Grouping.Rule = opt.name("group") + " one"
	case mode == GroupExamples:
		s.groups = oneEach(refs)
		s.Grouping.Rule = opt.name("group") + " examples"
	case mode == GroupAuto && numberedExamples(refs):
		s.groups = oneEach(refs)
		s.Grouping.Rule = "numbered files are examples"
		s.Grouping.Guessed = true
		s.Grouping.Warning = fmt.Sprintf("%d NPY files named with numbers (%s) taken as %d examples, one file each (no metadata says how they group); if they are the layers of one export, pass %s layers",
			len(refs), span(refs[0].path, refs[len(refs)-1].path), len(refs), opt.name("group"))
	default:
		if s.groups, first, err = groupByNames(refs, opt); err != nil {
			return nil, err
		}
		s.Grouping.Rule = "array names"
		if mode == GroupLayers {
			s.Grouping.Rule = opt.name("group") + " layers"
		} else if n := bareNumbered(s.groups[0], first); n >= 2 {
			s.Grouping.Guessed = true
			s.Grouping.Warning = fmt.Sprintf("%d NPY files named with numbers (%s) read as the layers of one export (their stems differ or other files sit beside them); if each is one example, pass %s examples",
				n, span(s.groups[0][0].path, s.groups[0][len(s.groups[0])-1].path), opt.name("group"))
		}
	}
	for _, g := range s.groups {
		paths := make([]string, len(g))
		for i, r := range g {
			paths[i] = r.path
		}
		s.Examples = append(s.Examples, paths)
	}
	// the first example: its layout is the set's
	ex, err := openGroup(s.groups[0], first, opt)
	if err != nil {
		return nil, err
	}
	s.layout = layoutOf(ex)
	if s.Grouping.Warning != "" {
		s.Warnings = append(s.Warnings, s.Grouping.Warning)
	}
	s.Warnings = append(s.Warnings, ex.Warnings...)
	ex.Close()
	return s, nil
}

// Check opens every example and checks it against the first, so that a bad
// file fails before any work starts (heed info, the terminal UI).
func (s *Set) Check() error {
	for i := 1; i < len(s.groups); i++ {
		ex, err := s.Open(i)
		if err != nil {
			return err
		}
		ex.Close()
	}
	return nil
}

// openRef opens one file of the set and tells o.opened (tests count the
// files a set opens).
func (o Options) openRef(r fileRef) (Container, error) {
	if o.opened != nil {
		o.opened(r.path)
	}
	return openFile(r)
}

// isNPYRef reports whether a file is grouped as an NPY file: its one array
// is named by its path (see expand), so its name is known without opening it.
func isNPYRef(r fileRef) bool { return strings.EqualFold(filepath.Ext(r.path), ".npy") }

// numbered returns the stem of an NPY file whose array name is outside the
// convention and ends in a number, without that number ("ex" for
// ex0007.npy, "" for 7.npy); ok is false for other files.
func numbered(r fileRef) (base string, ok bool) {
	if !isNPYRef(r) {
		return "", false
	}
	if _, role, _ := classify(r.npyName); role != roleOther {
		return "", false
	}
	m := trailingNum().FindStringSubmatch(stem(r.path))
	if m == nil {
		return "", false
	}
	return m[1], true
}

// numberedExamples is the rule "numbered files are examples": at least two
// files, all NPY files named with numbers after one shared stem.
func numberedExamples(refs []fileRef) bool {
	if len(refs) < 2 {
		return false
	}
	base0, ok := numbered(refs[0])
	if !ok {
		return false
	}
	for _, r := range refs[1:] {
		if b, ok := numbered(r); !ok || b != base0 {
			return false
		}
	}
	return true
}

// oneEach makes every file one example. A bare NPY file's array is named
// after its stem without its number, so that every example has the same
// block names ("attn" when nothing is left or the stem is a name of the
// convention).
func oneEach(refs []fileRef) [][]fileRef {
	out := make([][]fileRef, len(refs))
	for i, r := range refs {
		if base, ok := numbered(r); ok {
			r.npyName = base
			if _, role, _ := classify(base); base == "" || role != roleOther {
				r.npyName = "attn"
			}
		}
		out[i] = []fileRef{r}
	}
	return out
}

// bareNumbered counts the NPY files named with numbers in an example that
// holds nothing else that names what it is (a file of the convention, or
// metadata): files whose grouping into layers was guessed.
func bareNumbered(g []fileRef, open []Container) int {
	n := 0
	for i, r := range g {
		if _, ok := numbered(r); ok {
			n++
			continue
		}
		if i < len(open) && open[i] != nil {
			if _, has := open[i].Meta(); has {
				return 0
			}
		}
		if isNPYRef(r) {
			if _, role, _ := classify(r.npyName); role != roleOther {
				return 0
			}
		}
	}
	return n
}

// span names a run of files by its first and last.
func span(first, last string) string {
	if first == last {
		return first
	}
	return first + " … " + last
}

// groupByNames is the rule of GroupLayers (see Set). It returns the groups
// and the containers of the first group it opened while reading names
// (by position in the group; nil where it did not open one).
func groupByNames(refs []fileRef, opt Options) (groups [][]fileRef, first []Container, err error) {
	var (
		cur   []fileRef
		names = map[string]bool{}
		meta  string
		has   bool
	)
	for i, r := range refs {
		var (
			arrays []string
			m      string
			hasM   bool
			c      Container
		)
		if isNPYRef(r) {
			arrays = []string{r.npyName}
		} else {
			if c, err = opt.openRef(r); err != nil {
				closeAll(first)
				return nil, nil, err
			}
			for _, a := range c.Arrays() {
				arrays = append(arrays, a.Name())
			}
			m, hasM = c.Meta()
		}
		collide := hasM && has && m != meta
		for _, a := range arrays {
			if names[a] {
				collide = true
			}
		}
		if collide {
			groups = append(groups, cur)
			if len(groups) == 1 && len(cur) == 1 && !isNPYRef(cur[0]) && !slices.ContainsFunc(refs[i:], isNPYRef) {
				// the first file holds a whole export: so does every file
				if c != nil {
					c.Close()
				}
				for _, r := range refs[i:] {
					groups = append(groups, []fileRef{r})
				}
				return groups, first, nil
			}
			cur, names, meta, has = nil, map[string]bool{}, "", false
		}
		for _, a := range arrays {
			names[a] = true
		}
		if hasM {
			meta, has = m, true
		}
		cur = append(cur, r)
		if len(groups) == 0 {
			first = append(first, c)
		} else if c != nil {
			c.Close()
		}
	}
	return append(groups, cur), first, nil
}

// Open opens example i; the caller closes it. The example is checked
// against the set's layout again, in case its files changed.
func (s *Set) Open(i int) (*Export, error) {
	if i < 0 || i >= len(s.groups) {
		return nil, fmt.Errorf("loader: example %d of %d", i, len(s.groups))
	}
	ex, err := openGroup(s.groups[i], nil, s.opt)
	if err != nil {
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

// Name names example i by its files, joined by commas (what results record
// as a finding's example).
func (s *Set) Name(i int) string { return strings.Join(s.Examples[i], ",") }
