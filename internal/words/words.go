// Package words is the one home of the words and numbers heed prints in
// more than one place: locations (the LOC syntax of --at, the JSON "loc"
// field, check's text, the Findings screen and the status line), compact
// index ranges ("0-3,7") and plurals. It is a leaf: it imports nothing of
// heed, so every package may use it (views excepted, which stays free of
// heed entirely and is handed finished strings).
package words

import (
	"fmt"
	"slices"
	"strconv"
	"strings"
)

// Loc is a place in an export a person can paste to a colleague:
//
//	BLOCK:L<layer>:H<head>[:B<batch>][:q<query>][:k<key>]
//
// e.g. "decoder:L3:H7:q12" or "decoder:L7:H5:B0:q20:k41". Batch, Query and
// Key are -1 when absent. The block name may itself contain colons.
type Loc struct {
	Block              string
	Layer, Head, Batch int
	Query, Key         int
}

// Syntax is the LOC syntax in words, for error messages and help.
const Syntax = "BLOCK:L<layer>:H<head>[:B<batch>][:q<query>][:k<key>], e.g. decoder:L3:H7:q12"

// String formats the location; absent parts are left out.
func (l Loc) String() string {
	var b strings.Builder
	b.WriteString(l.Block)
	b.WriteString(":L")
	b.WriteString(strconv.Itoa(l.Layer))
	b.WriteString(":H")
	b.WriteString(strconv.Itoa(l.Head))
	if l.Batch >= 0 {
		b.WriteString(":B")
		b.WriteString(strconv.Itoa(l.Batch))
	}
	if l.Query >= 0 {
		b.WriteString(":q")
		b.WriteString(strconv.Itoa(l.Query))
	}
	if l.Key >= 0 {
		b.WriteString(":k")
		b.WriteString(strconv.Itoa(l.Key))
	}
	return b.String()
}

// ParseLoc reads a location. The trailing L, H, B, q and k parts are taken
// from the right, so a block name may contain colons; L and H are required.
func ParseLoc(s string) (Loc, error) {
	l := Loc{Layer: -1, Head: -1, Batch: -1, Query: -1, Key: -1}
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
		return Loc{}, fmt.Errorf("location %q: want %s", s, Syntax)
	}
	return l, nil
}

// Ranges writes indices compactly, sorted: 0,1,2,3,7 as "0-3,7". When total
// > 1 and xs holds every index below total it says "all <total>".
func Ranges(xs []int, total int) string {
	if total > 1 && len(xs) == total {
		return "all " + strconv.Itoa(total)
	}
	ys := slices.Clone(xs)
	slices.Sort(ys)
	var parts []string
	for i := 0; i < len(ys); {
		j := i
		for j+1 < len(ys) && ys[j+1] == ys[j]+1 {
			j++
		}
		if j > i {
			parts = append(parts, strconv.Itoa(ys[i])+"-"+strconv.Itoa(ys[j]))
		} else {
			parts = append(parts, strconv.Itoa(ys[i]))
		}
		i = j + 1
	}
	return strings.Join(parts, ",")
}

// Span writes sorted indices compactly, separated by ", ": a run of at
// least minRun consecutive indices as "a-b", the others one by one
// ("0, 2, 7-9" with minRun 3; "0-1, 3" with minRun 2).
func Span(xs []int, minRun int) string {
	var out []string
	for i := 0; i < len(xs); {
		j := i
		for j+1 < len(xs) && xs[j+1] == xs[j]+1 {
			j++
		}
		if j-i+1 >= max(minRun, 2) {
			out = append(out, strconv.Itoa(xs[i])+"-"+strconv.Itoa(xs[j]))
		} else {
			for k := i; k <= j; k++ {
				out = append(out, strconv.Itoa(xs[k]))
			}
		}
		i = j + 1
	}
	return strings.Join(out, ", ")
}

// List writes indices one by one, separated by ", ".
func List(xs []int) string { return Span(xs, len(xs)+1) }

// Plural returns one when n is 1, else many.
func Plural(n int, one, many string) string {
	if n == 1 {
		return one
	}
	return many
}

// Count writes n and the noun in the right number: "1 finding", "3 findings".
func Count(n int, one, many string) string {
	return strconv.Itoa(n) + " " + Plural(n, one, many)
}

// Option is the command-line option that gives heed a setting of the
// engine (analysis and loader name settings, never options), "" for a
// setting without one.
func Option(setting string) string {
	switch setting {
	case "kind":
		return "--kind"
	case "query_start":
		return "--query-start"
	case "compute_dtype":
		return "--compute-dtype"
	case "sum_below":
		return "--sum-below"
	case "tol":
		return "--tol"
	case "axes":
		return "--axes"
	case "group":
		return "--group"
	}
	return ""
}

// WithOption words how a person gives heed a setting it lacked: the
// command-line option beside the export convention's way (fix, e.g. "say
// the kind: meta blocks.decoder.kind"). Settings it does not know leave fix
// as it is.
func WithOption(setting, fix string) string {
	switch setting {
	case "kind":
		if head, rest, ok := strings.Cut(fix, ": "); ok {
			return head + ": " + Option(setting) + " causal|bidirectional|cross, or " + rest
		}
		return fix + ", or " + Option(setting) + " causal|bidirectional|cross"
	case "query_start":
		return fix + ", or " + Option(setting) + " P"
	}
	return fix
}
