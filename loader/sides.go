// Sides: the tokens, padding (valid) and document segments of each side of
// an export, their lengths checked against each other and against the blocks
// that use the side.

package loader

import (
	"bytes"
	"encoding/json"
	"fmt"
	"os"
	"sort"
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
