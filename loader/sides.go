// Sides: the tokens, padding (valid) and document segments of each side of
// an export, their lengths checked against each other and against the blocks
// that use the side.

package loader

import (
	"fmt"
	"maps"
	"slices"
	"strconv"
	"strings"
)

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
	for _, name := range slices.Sorted(maps.Keys(arrs)) {
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

	given := map[string]string{} // side -> the Source of the tokens given for it
	for _, tk := range opt.Tokens {
		sideName := tk.Side
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
				return &TokensSideError{Source: tk.Source, Sides: slices.Sorted(maps.Keys(set))}
			}
		}
		if prev, ok := given[sideName]; ok {
			return &FormatError{File: tk.Source, Offset: -1, Msg: fmt.Sprintf("tokens for side %q given twice (also by %s)", sideName, prev)}
		}
		given[sideName] = tk.Source
		if len(tk.Rows) == 0 || len(tk.Rows[0]) == 0 {
			return &FormatError{File: tk.Source, Offset: -1, Msg: "empty token list"}
		}
		s := side(sideName)
		n := len(tk.Rows[0])
		for _, r := range tk.Rows {
			if len(r) != n {
				return &FormatError{File: tk.Source, Offset: -1, Msg: fmt.Sprintf("token lists of different lengths (%d and %d)", n, len(r))}
			}
		}
		// The given tokens replace the export's own tokens for this side.
		if srcs[sideName].what == "tokens" {
			s.Len = -1
			if s.Valid != nil {
				s.Len = len(s.Valid[0])
			} else if s.Segments != nil {
				s.Len = len(s.Segments[0])
			}
		}
		if err := setLen(s, n, sideSrc{file: tk.Source, what: "tokens"}); err != nil {
			return err
		}
		s.Tokens = tk.Rows
	}

	// A block without sides uses the export's only side when it fits, or
	// always when the side's tokens were given (Options.Tokens: then a length that
	// does not fit is an error below).
	if len(ex.Sides) == 1 {
		var only *Side
		for _, s := range ex.Sides {
			only = s
		}
		forced := len(opt.Tokens) > 0
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
