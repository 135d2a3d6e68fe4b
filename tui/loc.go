package tui

import (
	"fmt"
	"strconv"
	"strings"
)

// Loc is a location a person can paste to a colleague (DESIGN.md):
// BLOCK:L<layer>:H<head>[:B<batch>][:q<query>], e.g. "decoder:L3:H7:q12".
// heed also reads an optional ":k<key>" for the key of a cell.
type Loc struct {
	Block              string
	Layer, Head, Batch int
	// Query and Key are -1 when not given.
	Query, Key int
}

// String formats the location; the batch item is written when withBatch
// is set or it is not 0, the key when it is set.
func (l Loc) format(withBatch bool) string {
	var b strings.Builder
	fmt.Fprintf(&b, "%s:L%d:H%d", l.Block, l.Layer, l.Head)
	if withBatch || l.Batch != 0 {
		fmt.Fprintf(&b, ":B%d", l.Batch)
	}
	if l.Query >= 0 {
		fmt.Fprintf(&b, ":q%d", l.Query)
	}
	if l.Key >= 0 {
		fmt.Fprintf(&b, ":k%d", l.Key)
	}
	return b.String()
}

// String formats the location as BLOCK:L<layer>:H<head>[:B<batch>][:q<query>][:k<key>].
func (l Loc) String() string { return l.format(false) }

// ParseLoc reads a location. The block name may itself contain colons: the
// trailing L, H, B, q and k parts are taken from the right.
func ParseLoc(s string) (Loc, error) {
	l := Loc{Layer: -1, Head: -1, Query: -1, Key: -1}
	parts := strings.Split(strings.TrimSpace(s), ":")
	seen := map[byte]bool{}
	i := len(parts)
	for i > 1 {
		p := parts[i-1]
		if len(p) < 2 {
			break
		}
		c := p[0]
		if !strings.ContainsRune("LHBqk", rune(c)) || seen[c] {
			break
		}
		n, err := strconv.Atoi(p[1:])
		if err != nil || n < 0 {
			break
		}
		seen[c] = true
		switch c {
		case 'L':
			l.Layer = n
		case 'H':
			l.Head = n
		case 'B':
			l.Batch = n
		case 'q':
			l.Query = n
		case 'k':
			l.Key = n
		}
		i--
	}
	l.Block = strings.Join(parts[:i], ":")
	if l.Block == "" || !seen['L'] || !seen['H'] {
		return Loc{}, fmt.Errorf("tui: location %q: want BLOCK:L<layer>:H<head>[:B<batch>][:q<query>], e.g. decoder:L3:H7:q12", s)
	}
	return l, nil
}
