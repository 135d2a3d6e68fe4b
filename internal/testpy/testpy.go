// Package testpy finds the Python interpreter that heed's tests use as their
// reference (numpy, scipy, h5py, PyTorch, Pillow from Debian's packages):
// HEED_PYTHON when set (`make test` sets it), else Debian's /usr/bin/python3.
// The python3 first on PATH may be another interpreter without them, so it
// is never used. Only tests import this package.
package testpy

import (
	"os"
	"os/exec"
	"strings"
	"testing"
)

// Path is the reference interpreter: HEED_PYTHON, else /usr/bin/python3.
func Path() string {
	if p := os.Getenv("HEED_PYTHON"); p != "" {
		return p
	}
	return "/usr/bin/python3"
}

// Require returns Path when it imports every module named, and otherwise
// skips the test, saying why; under CI (CI set), where
// scripts/install-deps.sh installs the modules, it fails the test instead.
func Require(t testing.TB, modules ...string) string {
	t.Helper()
	py := Path()
	if len(modules) == 0 {
		return py
	}
	list := strings.Join(modules, ", ")
	if err := exec.Command(py, "-c", "import "+list).Run(); err != nil {
		if os.Getenv("CI") != "" {
			t.Fatalf("%s cannot import %s (%v); scripts/install-deps.sh installs them", py, list, err)
		}
		t.Skipf("skipping: %s cannot import %s (%v); set HEED_PYTHON to an interpreter that can", py, list, err)
	}
	return py
}
