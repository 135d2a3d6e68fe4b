package main

import (
	"bytes"
	"encoding/json"
	"path/filepath"
	"strings"
	"testing"
)

// bothInputs are testdata exports of every verdict (clean, findings, not
// judged), with and without gradients, several dtypes and containers, and
// one example set of three files.
func bothInputs(t *testing.T) [][]string {
	t.Helper()
	var out [][]string
	for _, pat := range []string{filepath.Join(casesDir, "*.npz"), "../../testdata/verdict/*.np[yz]"} {
		files, err := filepath.Glob(pat)
		if err != nil || len(files) == 0 {
			t.Fatalf("%s: %v (%d files)", pat, err, len(files))
		}
		for _, f := range files {
			out = append(out, []string{f})
		}
	}
	return append(out, []string{filepath.Join(casesDir, "importance")})
}

// TestBothEqualsCheckAndRank: heed both's JSON holds under "check" exactly
// the bytes heed check --json prints and under "rank" those of heed rank
// --json (re-indented at the top level with encoding/json's Indent, the
// indentation every --json uses), its text is check's text, a blank line
// and rank's text, and its exit code is check's, on every testdata export.
func TestBothEqualsCheckAndRank(t *testing.T) {
	for _, in := range bothInputs(t) {
		flags := [][]string{nil}
		if strings.HasSuffix(in[0], "window_bad.npz") { // flags of both commands
			flags = append(flags, []string{"--rule", "window", "--prune", "2", "--sort", "-entropy"})
		}
		for _, fl := range flags {
			checkFlags, rankFlags := []string{}, []string{}
			for i := 0; i < len(fl); i += 2 {
				if fl[i] == "--rule" {
					checkFlags = append(checkFlags, fl[i], fl[i+1])
				} else {
					rankFlags = append(rankFlags, fl[i], fl[i+1])
				}
			}
			if len(checkFlags) > 0 { // rank has no --rule: compare it only without
				rankFlags = nil
			}
			args := func(cmd string, extra ...string) []string {
				return append(append(append([]string{cmd}, in...), extra...), fl...)
			}
			cj, _, ccode := runSplit(t, append([]string{"check"}, append(append(in, "--json"), checkFlags...)...)...)
			ct, _, _ := runSplit(t, append([]string{"check"}, append(in, checkFlags...)...)...)
			if ccode == 2 {
				t.Fatalf("check %v: exit 2: %s", in, cj)
			}
			bj, berr, bcode := runSplit(t, args("both", "--json")...)
			bt, _, bcode2 := runSplit(t, args("both")...)
			if bcode != ccode || bcode2 != ccode {
				t.Errorf("both %v %v: exit %d (text %d), check exits %d: %s", in, fl, bcode, bcode2, ccode, berr)
			}
			var parts map[string]json.RawMessage
			if err := json.Unmarshal([]byte(bj), &parts); err != nil {
				t.Fatalf("both %v --json: %v\n%s", in, err, bj)
			}
			if len(parts) != 2 {
				t.Errorf("both %v --json: keys %v, want check and rank", in, keys(parts))
			}
			part := func(name string) string {
				var b bytes.Buffer
				if err := json.Indent(&b, parts[name], "", "  "); err != nil {
					t.Fatalf("both %v: %s: %v", in, name, err)
				}
				return b.String() + "\n"
			}
			if got := part("check"); got != cj {
				t.Errorf("both %v %v: the check part differs from heed check --json\nboth:\n%s\ncheck:\n%s", in, fl, got, cj)
			}
			if !strings.HasPrefix(bt, ct+"\n") {
				t.Errorf("both %v %v: text does not start with heed check's text and a blank line\nboth:\n%s\ncheck:\n%s", in, fl, bt, ct)
			}
			if rankFlags == nil && len(checkFlags) > 0 {
				continue
			}
			rj, _, rcode := runSplit(t, append([]string{"rank"}, append(append(in, "--json"), rankFlags...)...)...)
			rt, _, _ := runSplit(t, append([]string{"rank"}, append(in, rankFlags...)...)...)
			if rcode != 0 {
				t.Fatalf("rank %v: exit %d: %s", in, rcode, rj)
			}
			if got := part("rank"); got != rj {
				t.Errorf("both %v %v: the rank part differs from heed rank --json\nboth:\n%s\nrank:\n%s", in, fl, got, rj)
			}
			if bt != ct+"\n"+rt {
				t.Errorf("both %v %v: text is not check's, a blank line, rank's\nboth:\n%s\nrank:\n%s", in, fl, bt, rt)
			}
		}
	}
}

func keys(m map[string]json.RawMessage) []string {
	var out []string
	for k := range m {
		out = append(out, k)
	}
	return out
}

// heed both refuses what check and rank refuse, with exit 2 and nothing on
// stdout.
func TestBothBadInput(t *testing.T) {
	good := filepath.Join(casesDir, "shift_good.npz")
	for _, args := range [][]string{
		{"both", filepath.Join(casesDir, "expected.json")},
		{"both", good, "--rule", "nonsense"},
		{"both", good, "--sort", "nonsense"},
		{"both", good, "--prune", "2", "--prune-frac", "0.5"},
		{"both", good, "--csv"},
	} {
		out, errOut, code := runSplit(t, args...)
		if code != 2 || out != "" || errOut == "" {
			t.Errorf("%v: exit %d, stdout %q, stderr %q; want 2, nothing, one line", args, code, out, errOut)
		}
	}
}
