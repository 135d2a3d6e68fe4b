package main

import (
	"errors"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"unicode/utf8"

	"github.com/heed-dev/heed/loader"
)

const tokensDir = "../../testdata/tokens"

// TestTokensFile: the forms of a --tokens file (one token a line, kept as
// written but for the line ends; a JSON list; a JSON list of lists, one per
// batch item), and a bad file is one *loader.FormatError naming it.
func TestTokensFile(t *testing.T) {
	eight := []string{" The", " cat", " sat", " on", " the", " mat", ".", "<eos>"}
	for _, c := range []struct {
		file string
		want [][]string
		err  string
	}{
		{"lines.txt", [][]string{eight}, ""},
		{"crlf.txt", [][]string{{"Le", "chat"}}, ""},
		{"list.json", [][]string{{"The", " cat", " sat", " on", " the", " mat", ".", "<eos>"}}, ""},
		{"batch.json", [][]string{{"a", "b", "c", "d", "e", "f", "g", "h"}, {"i", "j", "k", "l", "m", "n", "o", "p"}}, ""},
		{"bad.json", nil, "not a JSON list of strings or of lists of strings"},
		{"missing.txt", nil, "cannot read the tokens file"},
	} {
		path := filepath.Join(tokensDir, c.file)
		tk, err := readTokens(path)
		if c.err != "" {
			var fe *loader.FormatError
			if !errors.As(err, &fe) || fe.File != path || !strings.Contains(err.Error(), c.err) || strings.Contains(err.Error(), "\n") {
				t.Errorf("%s: error %v, want one line naming the file and %q", c.file, err, c.err)
			}
			continue
		}
		if err != nil || tk.Side != "" || tk.Source != path || !reflect.DeepEqual(tk.Rows, c.want) {
			t.Errorf("%s: %+v, %v; want rows %q", c.file, tk, err, c.want)
		}
	}
	for _, c := range []struct{ text, err string }{
		{"", "empty tokens file"}, {"\n", "empty tokens file"}, {"[]", "empty token list"}, {" [[]] ", "empty token list"},
		{"[1, 2]", "not a JSON list"}, {`["a"`, "not a JSON list"},
	} {
		if _, err := parseTokens("t", []byte(c.text)); err == nil || !strings.Contains(err.Error(), c.err) {
			t.Errorf("%q: %v, want %q", c.text, err, c.err)
		}
	}
	// SIDE=FILE names the side, unless a file of the whole name exists
	tk, err := readTokens("target=" + filepath.Join(tokensDir, "crlf.txt"))
	if err != nil || tk.Side != "target" || tk.Source != filepath.Join(tokensDir, "crlf.txt") {
		t.Errorf("SIDE=FILE: %+v, %v", tk, err)
	}
	dir := t.TempDir()
	odd := filepath.Join(dir, "a=b")
	if err := os.WriteFile(odd, []byte("x\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	t.Chdir(dir)
	if tk, err := readTokens("a=b"); err != nil || tk.Side != "" || tk.Source != "a=b" {
		t.Errorf("a file named a=b: %+v, %v", tk, err)
	}
}

// TestTokensSides: tokens without a side for an export with two sides is
// exit 2 and one line that lists the sides and says how to choose (the
// loader lists them, heed words the option); with SIDE= they label that side.
func TestTokensSides(t *testing.T) {
	export := filepath.Join(casesDir, "cross_padding_good.npz")
	tok := filepath.Join(tokensDir, "batch.json")
	r := runHeedProcess(t, "info", "--tokens", tok, export)
	want := "heed: " + tok + ": --tokens: the export has sides source, target; say which with --tokens SIDE=FILE\n"
	if r.code != 2 || r.stderr != want || r.stdout != "" {
		t.Errorf("no side: exit %d, stderr %q, stdout %q; want 2 and %q", r.code, r.stderr, r.stdout, want)
	}
	r = runHeedProcess(t, "info", "--tokens", "target="+tok, export)
	if r.code != 0 || !strings.Contains(r.stdout, `"a" "b" "c" "d" "e" "f" "g" "h"`) {
		t.Errorf("target=: exit %d\n%s%s", r.code, r.stdout, r.stderr)
	}
	r = runHeedProcess(t, "info", "--tokens", "source="+tok, export)
	if r.code != 2 || strings.Count(r.stderr, "\n") != 1 || !strings.Contains(r.stderr, tok+": 8 tokens, but") {
		t.Errorf("source= of the wrong length: exit %d, stderr %q", r.code, r.stderr)
	}
	r = runHeedProcess(t, "info", "--tokens", filepath.Join(tokensDir, "bad.json"), export)
	if r.code != 2 || r.stderr != "heed: "+filepath.Join(tokensDir, "bad.json")+": not a JSON list of strings or of lists of strings: json: cannot unmarshal string into Go value of type []string\n" {
		t.Errorf("bad tokens file: exit %d, stderr %q", r.code, r.stderr)
	}
}

// FuzzTokens: any tokens file parses or is refused with an error naming it,
// never a panic; what parses is a non-empty list of equal or unequal rows
// (the loader checks lengths against the export). Seeds: testdata/tokens.
//
//	go test ./cmd/heed -run '^$' -fuzz FuzzTokens -fuzztime 20s
func FuzzTokens(f *testing.F) {
	paths, _ := filepath.Glob(filepath.Join(tokensDir, "*"))
	for _, p := range paths {
		if b, err := os.ReadFile(p); err == nil {
			f.Add(b)
		}
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		rows, err := parseTokens("fuzz.txt", b)
		if err != nil {
			if !strings.HasPrefix(err.Error(), "fuzz.txt: ") {
				t.Fatalf("error %q does not name the file", err)
			}
			return
		}
		if len(rows) == 0 || len(rows[0]) == 0 {
			t.Fatalf("parsed to no tokens: %q", rows)
		}
		if utf8.Valid(b) {
			for _, r := range rows {
				for _, s := range r {
					if !utf8.ValidString(s) {
						t.Fatalf("token %q is not UTF-8, the input was", s)
					}
				}
			}
		}
	})
}
