package analysis_test

import (
	"context"
	"encoding/binary"
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"testing"

	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/loader"
	"github.com/x448/float16"
)

// benchExport writes a seeded float16 causal export [layers, heads, seq, seq]
// to a safetensors file under dir (layout from the safetensors README: u64
// LE header size, JSON header padded with spaces to 8 bytes, raw LE data)
// and returns its path. Rows are softmaxes over the allowed keys k <= q with
// a temperature per head, like bench/gen_export.py; leak > 0 moves that much
// mass of each row of head 0 onto the key just above the diagonal, so the
// checks have findings to group and diagnose.
func benchExport(tb testing.TB, dir string, layers, heads, seq int, leak float64) string {
	tb.Helper()
	rng := rand.New(rand.NewPCG(7, uint64(seq)))
	n := layers * heads * seq * seq
	data := make([]byte, 2*n)
	logits := make([]float64, seq)
	i := 0
	for l := 0; l < layers; l++ {
		for h := 0; h < heads; h++ {
			scale := 0.25 + 3*float64((l*heads+h)%7)/6
			for q := 0; q < seq; q++ {
				mx := math.Inf(-1)
				for k := 0; k <= q; k++ {
					logits[k] = rng.NormFloat64() * scale
					mx = max(mx, logits[k])
				}
				var s float64
				for k := 0; k <= q; k++ {
					logits[k] = math.Exp(logits[k] - mx)
					s += logits[k]
				}
				moved := 0.0
				if leak > 0 && h == 0 && q+1 < seq {
					moved = leak
				}
				for k := 0; k < seq; k++ {
					var p float64
					switch {
					case k <= q:
						p = logits[k] / s * (1 - moved)
					case k == q+1:
						p = moved
					}
					binary.LittleEndian.PutUint16(data[2*i:], float16.Fromfloat32(float32(p)).Bits())
					i++
				}
			}
		}
	}
	meta, _ := json.Marshal(map[string]any{"format": "heed-export/1",
		"blocks": map[string]any{"decoder": map[string]any{"kind": "causal", "query": "target", "key": "target",
			"axes": "layer head query key"}}})
	hdr, _ := json.Marshal(map[string]any{
		"__metadata__": map[string]string{"meta": string(meta)},
		"decoder/attn": map[string]any{"dtype": "F16", "shape": []int{layers, heads, seq, seq}, "data_offsets": []int{0, len(data)}},
	})
	for len(hdr)%8 != 0 {
		hdr = append(hdr, ' ')
	}
	out := make([]byte, 8, 8+len(hdr)+len(data))
	binary.LittleEndian.PutUint64(out, uint64(len(hdr)))
	out = append(append(out, hdr...), data...)
	path := filepath.Join(dir, fmt.Sprintf("attn-%dx%dx%d.safetensors", layers, heads, seq))
	if err := os.WriteFile(path, out, 0o644); err != nil {
		tb.Fatal(err)
	}
	return path
}

var benchSizes = []struct{ layers, heads, seq int }{
	{1, 12, 128},
	{1, 12, 512},
	{2, 12, 1024},
}

// BenchmarkAnalyze is the statistics and checks pass (analysis.Analyze) over
// a mapped float16 safetensors export, every head, all cores; the bytes are
// the export's stored bytes.
func BenchmarkAnalyze(b *testing.B) {
	benchPassSizes(b, 0, func(b *testing.B, p *analysis.Partial) {})
}

// BenchmarkCheckFindings is the checks end to end on a leaking export: the
// pass, then Result (findings grouped, diagnoses named).
func BenchmarkCheckFindings(b *testing.B) {
	benchPassSizes(b, 0.01, func(b *testing.B, p *analysis.Partial) {
		if res := p.Result(); res.Clean() {
			b.Fatal("the leaking export came out clean")
		}
	})
}

// benchPassSizes runs the pass with the default options over an export of
// each of benchSizes, written once with leak mass above the diagonal, and
// then then on its partial.
func benchPassSizes(b *testing.B, leak float64, then func(b *testing.B, p *analysis.Partial)) {
	dir := b.TempDir() // written once, outside the sub-benchmarks' calibration runs
	for _, sz := range benchSizes {
		path := benchExport(b, dir, sz.layers, sz.heads, sz.seq, leak)
		b.Run(fmt.Sprintf("L%dxH%dxS%d", sz.layers, sz.heads, sz.seq), func(b *testing.B) {
			ex, err := loader.Open([]string{path}, loader.NewOptions())
			if err != nil {
				b.Fatal(err)
			}
			defer ex.Close()
			opt := analysis.DefaultOptions()
			b.SetBytes(int64(sz.layers * sz.heads * sz.seq * sz.seq * 2))
			b.ReportAllocs()
			b.ResetTimer()
			for range b.N {
				p, err := analysis.Analyze(context.Background(), ex, opt)
				if err != nil {
					b.Fatal(err)
				}
				then(b, p)
			}
		})
	}
}

// BenchmarkResult is Partial.Result alone (statistics from the exact sums,
// findings and diagnoses) on a leaking export's partial.
func BenchmarkResult(b *testing.B) {
	path := benchExport(b, b.TempDir(), 2, 12, 256, 0.01)
	ex, err := loader.Open([]string{path}, loader.NewOptions())
	if err != nil {
		b.Fatal(err)
	}
	defer ex.Close()
	p, err := analysis.Analyze(context.Background(), ex, analysis.DefaultOptions())
	if err != nil {
		b.Fatal(err)
	}
	b.ReportAllocs()
	b.ResetTimer()
	for range b.N {
		p.Result()
	}
}

// BenchmarkAnalyzeFile runs the pass over the export named by
// HEED_BENCH_EXPORT (e.g. the 0.3 GB file make bench writes with
// bench/gen_export.py), to profile the real thing:
//
//	HEED_BENCH_EXPORT=/tmp/heed-bench/attn-12x12x1024.safetensors \
//	  go test -run '^$' -bench AnalyzeFile -cpuprofile cpu.prof ./analysis
func BenchmarkAnalyzeFile(b *testing.B) {
	path := os.Getenv("HEED_BENCH_EXPORT")
	if path == "" {
		b.Skip("HEED_BENCH_EXPORT not set")
	}
	st, err := os.Stat(path)
	if err != nil {
		b.Fatal(err)
	}
	ex, err := loader.Open([]string{path}, loader.NewOptions())
	if err != nil {
		b.Fatal(err)
	}
	defer ex.Close()
	b.SetBytes(st.Size())
	b.ReportAllocs()
	for range b.N {
		if _, err := analysis.Analyze(context.Background(), ex, analysis.DefaultOptions()); err != nil {
			b.Fatal(err)
		}
	}
}
