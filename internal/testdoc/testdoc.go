// Package testdoc reads the parts of heed's documents that tests run or
// check against the code: the text between <!-- NAME --> and <!-- /NAME -->
// markers (the README's snippets, the demo's quoted figures). Only tests
// import it.
package testdoc

import (
	"os"
	"strings"
	"testing"
)

// Section returns the text of file between the markers <!-- name --> and
// <!-- /name -->, from just after the first to just before the second; it
// fails the test when the file cannot be read or the markers are missing.
func Section(t testing.TB, file, name string) string {
	t.Helper()
	raw, err := os.ReadFile(file)
	if err != nil {
		t.Fatal(err)
	}
	s := string(raw)
	open, end := "<!-- "+name+" -->", "<!-- /"+name+" -->"
	i, j := strings.Index(s, open), strings.Index(s, end)
	if i < 0 || j < i {
		t.Fatalf("no %s markers in %s", open, file)
	}
	return s[i+len(open) : j]
}

// Code is Section with the lines of code fences (```...) left out: the
// snippet as a program.
func Code(t testing.TB, file, name string) string {
	t.Helper()
	var lines []string
	for _, l := range strings.Split(Section(t, file, name), "\n") {
		if !strings.HasPrefix(strings.TrimSpace(l), "```") {
			lines = append(lines, l)
		}
	}
	return strings.Join(lines, "\n")
}
