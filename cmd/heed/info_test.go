package main

import (
	"bytes"
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"

	"github.com/heed-dev/heed/loader"
)

const fixturesDir = "../../testdata/fixtures"

// infoRun executes "heed info" with args; it returns stdout, the error and the exit code.
func infoRun(t *testing.T, args ...string) (string, error, int) {
	t.Helper()
	cmd := newRootCmd()
	var out, errb bytes.Buffer
	cmd.SetOut(&out)
	cmd.SetErr(&errb)
	cmd.SetArgs(append([]string{"info"}, args...))
	err := cmd.ExecuteContext(context.Background())
	code := 0
	if err != nil {
		code = 2
		var f *findingsError
		if ok := asFindings(err, &f); ok {
			code = 1
		}
	}
	return out.String(), err, code
}

func asFindings(err error, f **findingsError) bool {
	v, ok := err.(*findingsError)
	*f = v
	return ok
}

// TestInfoJSONFixtures compares "heed info --json" with what the fixture
// generator (testdata/gen_fixtures.py) wrote each export with: numpy savez,
// h5py, hand-written safetensors, a directory of NPY files.
func TestInfoJSONFixtures(t *testing.T) {
	var expect map[string]struct {
		Blocks []map[string]any `json:"blocks"`
		Sides  []map[string]any `json:"sides"`
	}
	b, err := os.ReadFile(filepath.Join(fixturesDir, "exports", "expect.json"))
	if err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(b, &expect); err != nil {
		t.Fatal(err)
	}
	if len(expect) < 7 {
		t.Fatalf("%d exports in expect.json", len(expect))
	}
	for file, want := range expect {
		t.Run(file, func(t *testing.T) {
			if strings.HasSuffix(file, ".h5") && !loader.HDF5Supported {
				t.Skip("built without HDF5")
			}
			out, err, code := infoRun(t, "--json", filepath.Join(fixturesDir, "exports", file))
			if code != 0 {
				t.Fatalf("exit %d: %v", code, err)
			}
			var got struct {
				Format string           `json:"format"`
				Blocks []map[string]any `json:"blocks"`
				Sides  []map[string]any `json:"sides"`
			}
			if err := json.Unmarshal([]byte(out), &got); err != nil {
				t.Fatalf("%v\n%s", err, out)
			}
			if len(got.Blocks) != len(want.Blocks) || len(got.Sides) != len(want.Sides) {
				t.Fatalf("%d blocks %d sides, want %d and %d\n%s", len(got.Blocks), len(got.Sides), len(want.Blocks), len(want.Sides), out)
			}
			for i, wb := range want.Blocks {
				for k, v := range wb {
					if !reflect.DeepEqual(got.Blocks[i][k], v) {
						t.Errorf("block %v: %s = %v, want %v", wb["name"], k, got.Blocks[i][k], v)
					}
				}
			}
			for i, ws := range want.Sides {
				for k, v := range ws {
					if !reflect.DeepEqual(got.Sides[i][k], v) {
						t.Errorf("side %v: %s = %v, want %v", ws["name"], k, got.Sides[i][k], v)
					}
				}
			}
		})
	}
}

func TestInfoText(t *testing.T) {
	out, err, code := infoRun(t, filepath.Join(fixturesDir, "exports", "causal.npz"))
	if code != 0 {
		t.Fatal(err)
	}
	for _, want := range []string{"block decoder  (causal, f16)", "2 layers x batch 2 x 2 heads x 5 queries x 5 keys",
		"rules       causal, padding, nan_rows, row_sum", `"The" " cat" " sat" " on" "<pad>"`, "2 padding positions", "not verdicts"} {
		if !strings.Contains(out, want) {
			t.Errorf("text output lacks %q:\n%s", want, out)
		}
	}
}

// TestInfoFlags: --kind and --tokens turn a metadata-less array into a causal block with tokens.
func TestInfoFlags(t *testing.T) {
	tok := filepath.Join(t.TempDir(), "tokens.json")
	os.WriteFile(tok, []byte(`["w","x","y","z"]`), 0o644)
	out, err, code := infoRun(t, "--json", "--kind", "causal", "--tokens", tok, filepath.Join(fixturesDir, "exports", "lone.npy"))
	if code != 0 {
		t.Fatal(err)
	}
	var got infoReport
	if err := json.Unmarshal([]byte(out), &got); err != nil {
		t.Fatal(err)
	}
	b := got.Blocks[0]
	if b.Kind != "causal" || b.QuerySide != "target" || !reflect.DeepEqual(b.Rules, []string{"causal", "nan_rows", "row_sum"}) ||
		len(got.Sides) != 1 || !reflect.DeepEqual(got.Sides[0].FirstTokens, []string{"w", "x", "y", "z"}) {
		t.Errorf("info = %+v", got)
	}
	_, err, code = infoRun(t, "--kind", "sideways", filepath.Join(fixturesDir, "exports", "lone.npy"))
	if code != 2 || !strings.Contains(err.Error(), "--kind") {
		t.Errorf("bad --kind: exit %d, %v", code, err)
	}
}

// TestInfoBadInputs: every bad input is exit 2 with one line naming the file.
func TestInfoBadInputs(t *testing.T) {
	files, _ := filepath.Glob(filepath.Join(fixturesDir, "bad", "*"))
	if len(files) < 20 {
		t.Fatalf("%d bad inputs", len(files))
	}
	for _, f := range files {
		_, err, code := infoRun(t, f)
		if code != 2 || err == nil {
			t.Errorf("%s: exit %d, want 2", f, code)
			continue
		}
		if msg := err.Error(); strings.Contains(msg, "\n") || !strings.Contains(msg, f) {
			t.Errorf("%s: error %q, want one line naming the file", f, msg)
		}
	}
	if _, err, code := infoRun(t, filepath.Join(fixturesDir, "no-such-file.npz")); code != 2 || !strings.Contains(err.Error(), "no such file") {
		t.Errorf("missing file: exit %d, %v", code, err)
	}
}
