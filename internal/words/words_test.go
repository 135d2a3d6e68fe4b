package words

import "testing"

func TestLocRoundTrip(t *testing.T) {
	cases := []struct {
		in   string
		want Loc
		err  bool
	}{
		{"decoder:L3:H7:q12", Loc{"decoder", 3, 7, -1, 12, -1}, false},
		{"decoder:L7:H5:B0:q20:k41", Loc{"decoder", 7, 5, 0, 20, 41}, false},
		{"layers.3:self:L0:H1", Loc{"layers.3:self", 0, 1, -1, -1, -1}, false},
		{"cross:L1:H0:B2", Loc{"cross", 1, 0, 2, -1, -1}, false},
		{"decoder:H1:L0:k3", Loc{"decoder", 0, 1, -1, -1, 3}, false},
		{"decoder:L1", Loc{}, true},
		{"L1:H2", Loc{}, true},
		{"decoder:L-1:H2", Loc{}, true},
		{"", Loc{}, true},
	}
	for _, tc := range cases {
		got, err := ParseLoc(tc.in)
		if (err != nil) != tc.err || (!tc.err && got != tc.want) {
			t.Errorf("ParseLoc(%q) = %+v, %v; want %+v, error %v", tc.in, got, err, tc.want, tc.err)
			continue
		}
		if tc.err {
			continue
		}
		if back, err := ParseLoc(got.String()); err != nil || back != got {
			t.Errorf("ParseLoc(%q.String() = %q) = %+v, %v", tc.in, got.String(), back, err)
		}
	}
}

func TestRanges(t *testing.T) {
	cases := []struct {
		xs    []int
		total int
		want  string
	}{
		{[]int{0, 1, 2, 3, 7}, 0, "0-3,7"},
		{[]int{7, 0, 2, 1, 3}, 12, "0-3,7"},
		{[]int{0, 1, 2, 3}, 4, "all 4"},
		{[]int{0}, 1, "0"},
		{[]int{5}, 12, "5"},
		{nil, 3, ""},
		{[]int{1, 3, 5}, 0, "1,3,5"},
	}
	for _, tc := range cases {
		if got := Ranges(tc.xs, tc.total); got != tc.want {
			t.Errorf("Ranges(%v, %d) = %q, want %q", tc.xs, tc.total, got, tc.want)
		}
	}
}

func TestCount(t *testing.T) {
	for _, tc := range []struct {
		n    int
		want string
	}{{0, "0 findings"}, {1, "1 finding"}, {2, "2 findings"}} {
		if got := Count(tc.n, "finding", "findings"); got != tc.want {
			t.Errorf("Count(%d) = %q, want %q", tc.n, got, tc.want)
		}
	}
}

func TestWithOption(t *testing.T) {
	for _, tc := range []struct{ setting, fix, want string }{
		{"kind", "say the kind: meta blocks.decoder.kind", "say the kind: --kind causal|bidirectional|cross, or meta blocks.decoder.kind"},
		{"query_start", "give the queries' key positions: meta blocks.d.query_start", "give the queries' key positions: meta blocks.d.query_start, or --query-start P"},
		{"", "check valid/SIDE", "check valid/SIDE"},
	} {
		if got := WithOption(tc.setting, tc.fix); got != tc.want {
			t.Errorf("WithOption(%q, %q) = %q, want %q", tc.setting, tc.fix, got, tc.want)
		}
	}
}

// FuzzParseLoc: a location that parses prints (String) to text that parses
// to the same location, and ParseLoc never panics. Seeds: the corpus in
// testdata/fuzz/FuzzParseLoc (locations of the README and of heed's
// output, block names with colons and dots, and broken ones).
func FuzzParseLoc(f *testing.F) {
	f.Fuzz(func(t *testing.T, s string) {
		l, err := ParseLoc(s)
		if err != nil {
			return
		}
		if l.Block == "" || l.Layer < 0 || l.Head < 0 {
			t.Fatalf("ParseLoc(%q) = %+v without error: block, layer and head are required", s, l)
		}
		back, err := ParseLoc(l.String())
		if err != nil || back != l {
			t.Fatalf("ParseLoc(%q) = %+v; ParseLoc(%q) = %+v, %v", s, l, l.String(), back, err)
		}
	})
}

func TestOption(t *testing.T) {
	for setting, want := range map[string]string{"kind": "--kind", "query_start": "--query-start", "compute_dtype": "--compute-dtype",
		"sum_below": "--sum-below", "tol": "--tol", "axes": "--axes", "group": "--group", "no_such_setting": ""} {
		if got := Option(setting); got != want {
			t.Errorf("Option(%q) = %q, want %q", setting, got, want)
		}
	}
}

// TestSpan: compact index lists as check's and the invariance check's words
// print them (runs of minRun or more as a-b).
func TestSpan(t *testing.T) {
	for _, c := range []struct {
		xs     []int
		minRun int
		want   string
	}{
		{[]int{0, 2, 7, 8, 9}, 3, "0, 2, 7-9"},
		{[]int{4, 5}, 3, "4, 5"},
		{[]int{0, 1, 3}, 2, "0-1, 3"},
		{[]int{6}, 2, "6"},
		{nil, 2, ""},
	} {
		if got := Span(c.xs, c.minRun); got != c.want {
			t.Errorf("Span(%v, %d) = %q, want %q", c.xs, c.minRun, got, c.want)
		}
	}
	if got := List([]int{1, 2, 3}); got != "1, 2, 3" {
		t.Errorf("List(1, 2, 3) = %q", got)
	}
}
