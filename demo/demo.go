// Package demo holds the demo exports embedded in the heed binary: two
// runs of a small encoder-decoder transformer trained by
// testdata/demo/generate.py (PyTorch) on an invented task, rewriting dates
// written in words into ISO 8601, once with a correct decoder mask and once
// with a mask that lets each position see one position ahead, and a
// decoder-only generation export (prefill and KV-cache decode steps).
//
// The files live in data/ (go:embed cannot reach outside the package
// directory; the generator writes there). data/checksums.json holds the sha256
// of each file as the generator computed it; data/results.json the measured
// training losses and greedy-decoding accuracies. demo imports nothing of
// heed's.
package demo

import (
	"crypto/rand"
	"embed"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
	"strings"
)

//go:embed data/*.npz data/*.h5 data/*.json
var data embed.FS

// Exports are the export files, in the order they are written and listed.
var Exports = []string{"clean.npz", "leaky.npz", "clean.h5", "leaky.h5", "generation.npz"}

// ResultsFile is the generator's record of losses and accuracies; Export writes it too.
const ResultsFile = "results.json"

// ChecksumsFile maps each generated file to its sha256 (hex), as the generator wrote it.
const ChecksumsFile = "checksums.json"

// FS returns the embedded files (exports, results.json, checksums.json) at its root.
func FS() fs.FS {
	sub, err := fs.Sub(data, "data")
	if err != nil { // fs.Sub fails only on an invalid path name; "data" is valid
		panic(err)
	}
	return sub
}

// ReadFile returns one embedded file by name ("leaky.npz", "results.json", ...).
func ReadFile(name string) ([]byte, error) { return fs.ReadFile(FS(), name) }

// Run is one training run of the encoder-decoder model as results.json records it.
type Run struct {
	DecoderMask string  `json:"decoder_mask"`
	TrainLoss   float64 `json:"train_loss"`
	// LossCurve is the mean training loss of each block of 100 steps.
	LossCurve  []float64 `json:"train_loss_every_100_steps"`
	ExactMatch float64   `json:"heldout_exact_match"`
	// PlusOneMass is, per [layer][head], the mean decoder mass at k = q+1.
	PlusOneMass [][]float64 `json:"decoder_mass_at_q_plus_1"`
	// Strongest is where the +1 leak is strongest (the leaky run only).
	Strongest struct {
		At       string  `json:"at"`
		MeanMass float64 `json:"mean_mass"`
	} `json:"strongest_plus_1_head"`
}

// Results is results.json: what the generator measured.
type Results struct {
	Task     string `json:"task"`
	Model    string `json:"model"`
	Training string `json:"training"`
	Heldout  int    `json:"heldout"`
	// LossFloor is the lowest mean per-token training loss a model that cannot
	// see ahead can reach on this data (derived by the generator).
	LossFloor float64        `json:"clean_loss_floor"`
	Runs      map[string]Run `json:"runs"`
	Batch     []struct {
		Source string `json:"source"`
		Target string `json:"target"`
	} `json:"export_batch"`
	Generation struct {
		Model      string   `json:"model"`
		Training   string   `json:"training"`
		TrainLoss  float64  `json:"train_loss"`
		ExactMatch float64  `json:"heldout_exact_match"`
		Prompts    []string `json:"prompts"`
		Expected   []string `json:"expected"`
		Answers    []string `json:"answers"`
		Steps      int      `json:"decode_steps"`
	} `json:"generation"`
	// Demo says where `heed demo` starts: the file, a location and a one-line hint.
	Demo struct {
		Open string `json:"open"`
		At   string `json:"at"`
		Hint string `json:"hint"`
	} `json:"demo"`
}

// LoadResults parses the embedded results.json.
func LoadResults() (*Results, error) {
	b, err := ReadFile(ResultsFile)
	if err != nil {
		return nil, err
	}
	var r Results
	if err := json.Unmarshal(b, &r); err != nil {
		return nil, fmt.Errorf("demo: %s: %w", ResultsFile, err)
	}
	return &r, nil
}

// Checksums parses the embedded checksums.json (file name -> sha256 hex).
func Checksums() (map[string]string, error) {
	b, err := ReadFile(ChecksumsFile)
	if err != nil {
		return nil, err
	}
	var m map[string]string
	if err := json.Unmarshal(b, &m); err != nil {
		return nil, fmt.Errorf("demo: %s: %w", ChecksumsFile, err)
	}
	return m, nil
}

// ExistsError reports files Export refused to overwrite.
type ExistsError struct{ Paths []string }

func (e *ExistsError) Error() string {
	verb := "exist"
	if len(e.Paths) == 1 {
		verb = "exists"
	}
	return fmt.Sprintf("%s already %s (use --force to overwrite)", strings.Join(e.Paths, ", "), verb)
}

// SourceError reports a directory Export refused because it holds source
// files: a source tree (a Go module or package, a Python project...) is no
// place for data files, with or without force. (The repository's own demo/
// is such a directory: "heed demo --export demo/" from a clone would write
// the exports beside demo.go.)
type SourceError struct {
	Dir   string
	Files []string // the first few source files found
}

func (e *SourceError) Error() string {
	return fmt.Sprintf("%s holds source files (%s): write the demo exports to a directory of their own, e.g. heed-demo/", e.Dir, strings.Join(e.Files, ", "))
}

// sourceExts are the extensions of the source files that make a directory
// a source tree; go.mod and go.work count too.
var sourceExts = map[string]bool{".go": true, ".py": true, ".c": true, ".h": true, ".cc": true, ".cpp": true,
	".rs": true, ".java": true, ".js": true, ".ts": true}

// sourceFiles lists up to three source files directly in dir (none when
// dir does not exist yet).
func sourceFiles(dir string) ([]string, error) {
	ents, err := os.ReadDir(dir)
	if errors.Is(err, fs.ErrNotExist) {
		return nil, nil
	}
	if err != nil {
		return nil, err
	}
	var out []string
	for _, e := range ents {
		n := e.Name()
		if n == "go.mod" || n == "go.work" || !e.IsDir() && sourceExts[strings.ToLower(filepath.Ext(n))] {
			out = append(out, n)
			if len(out) == 3 {
				break
			}
		}
	}
	return out, nil
}

// Export writes the export files and results.json into dir (created when
// missing) and returns the paths written, in Exports order. It writes
// nothing into a directory that holds source files (a *SourceError names
// some). Without force it writes nothing when any of the files exists (an
// *ExistsError lists them); with force each file is replaced atomically
// (written beside it, then renamed).
func Export(dir string, force bool) ([]string, error) {
	src, err := sourceFiles(dir)
	if err != nil {
		return nil, err
	}
	if len(src) > 0 {
		return nil, &SourceError{Dir: dir, Files: src}
	}
	names := append(append([]string(nil), Exports...), ResultsFile)
	paths := make([]string, len(names))
	for i, n := range names {
		paths[i] = filepath.Join(dir, n)
	}
	if !force {
		var exist []string
		for _, p := range paths {
			if _, err := os.Lstat(p); err == nil {
				exist = append(exist, p)
			} else if !errors.Is(err, fs.ErrNotExist) {
				return nil, err
			}
		}
		if len(exist) > 0 {
			return nil, &ExistsError{Paths: exist}
		}
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return nil, err
	}
	for i, n := range names {
		b, err := ReadFile(n)
		if err != nil {
			return paths[:i], err
		}
		if force {
			err = replaceFile(paths[i], b)
		} else {
			err = createFile(paths[i], b)
		}
		if err != nil {
			return paths[:i], err
		}
	}
	return paths, nil
}

// createFile writes a new file, failing if it appeared since the check.
func createFile(path string, b []byte) error {
	f, err := os.OpenFile(path, os.O_WRONLY|os.O_CREATE|os.O_EXCL, 0o644)
	if err != nil {
		return err
	}
	if _, err := f.Write(b); err != nil {
		f.Close()
		os.Remove(path)
		return err
	}
	return f.Close()
}

// replaceFile writes b to a temporary file beside path and renames it over path.
func replaceFile(path string, b []byte) error {
	var rnd [6]byte
	if _, err := rand.Read(rnd[:]); err != nil {
		return err
	}
	tmp := path + ".tmp-" + hex.EncodeToString(rnd[:])
	if err := createFile(tmp, b); err != nil {
		return err
	}
	if err := os.Rename(tmp, path); err != nil {
		os.Remove(tmp)
		return err
	}
	return nil
}
