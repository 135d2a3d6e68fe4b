// Package arch holds the test that keeps the project's dependency picture
// (DEVELOPERS.md, "Architecture") true: it fails when a package imports a
// package of heed it must not.
package arch

import (
	"bytes"
	"encoding/json"
	"os/exec"
	"strings"
	"testing"
)

const module = "github.com/heed-dev/heed/"

// allowed lists, per package, the packages of heed it may import (its
// non-test files). A package not listed may import nothing of heed.
var allowed = map[string][]string{
	"loader":              {},
	"internal/bigmem":     {},
	"internal/words":      {},
	"internal/kernels":    {},
	"internal/testpy":     {},
	"internal/termtest":   {},
	"internal/testdoc":    {},
	"views":               {},
	"analysis":            {"loader", "internal/bigmem", "internal/words", "internal/kernels"},
	"analysis/trace":      {"analysis", "loader", "internal/bigmem", "internal/words", "internal/kernels"},
	"analysis/plan":       {"analysis", "loader", "internal/bigmem", "internal/words", "internal/kernels"},
	"analysis/invariance": {"analysis", "loader", "internal/bigmem", "internal/words", "internal/kernels"},
	"internal/prose":      {"analysis", "analysis/invariance", "analysis/trace", "loader", "internal/words"},
	"picture":             {"views"},
	"tui":                 {"analysis", "analysis/trace", "analysis/plan", "loader", "views", "internal/bigmem", "internal/words", "internal/prose"},
	"share":               {},
	"demo":                {},
	"python":              {},
	"cmd/heed":            {"analysis", "analysis/trace", "analysis/plan", "analysis/invariance", "loader", "views", "tui", "share", "picture", "demo", "python", "internal/words", "internal/bigmem", "internal/prose", "internal/kernels"},
}

func TestImportDirection(t *testing.T) {
	out, err := exec.Command("go", "list", "-json", module+"...").Output()
	if err != nil {
		t.Fatalf("go list: %v", err)
	}
	dec := json.NewDecoder(bytes.NewReader(out))
	seen := 0
	for dec.More() {
		var p struct {
			ImportPath string
			Imports    []string
		}
		if err := dec.Decode(&p); err != nil {
			t.Fatal(err)
		}
		name := strings.TrimPrefix(p.ImportPath, module)
		if name == "bench" || name == "e2e" || name == "internal/arch" {
			continue // programs and tests, not part of the picture
		}
		ok, listed := allowed[name]
		if !listed {
			t.Errorf("package %s is not in the dependency picture: add it to DEVELOPERS.md and to allowed", name)
			continue
		}
		seen++
		for _, imp := range p.Imports {
			if !strings.HasPrefix(imp, module) {
				continue
			}
			dep := strings.TrimPrefix(imp, module)
			good := false
			for _, a := range ok {
				good = good || a == dep
			}
			if !good {
				t.Errorf("%s imports %s, against the picture in DEVELOPERS.md (it may import: %v)", name, dep, ok)
			}
		}
	}
	if seen < 8 {
		t.Fatalf("only %d packages checked: go list gave less than the module", seen)
	}
}
