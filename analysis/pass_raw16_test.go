package analysis

import (
	"context"
	"encoding/binary"
	"encoding/json"
	"fmt"
	"math"
	"math/rand"
	"os"
	"path/filepath"
	"reflect"
	"testing"

	"github.com/heed-dev/heed/loader"
)

// writeST16 writes a causal [L, H, S, S] export of 16-bit patterns in the
// safetensors layout (its specification: u64 little-endian header size, the
// JSON header, then the little-endian C-order data).
func writeST16(t *testing.T, path, dtype string, shape []int, data []uint16) {
	writeST16Kind(t, path, dtype, "causal", shape, data)
}

// writeST16Kind is writeST16 for a block of the given kind.
func writeST16Kind(t *testing.T, path, dtype, kind string, shape []int, data []uint16) {
	t.Helper()
	meta := `{"format":"heed-export/1","blocks":{"decoder":{"kind":"` + kind + `","query":"target","key":"target","axes":"layer head query key"}}}`
	hdr, err := json.Marshal(map[string]any{
		"__metadata__": map[string]string{"meta": meta},
		"decoder/attn": map[string]any{"dtype": dtype, "shape": shape, "data_offsets": []int{0, 2 * len(data)}},
	})
	if err != nil {
		t.Fatal(err)
	}
	for len(hdr)%8 != 0 {
		hdr = append(hdr, ' ')
	}
	buf := binary.LittleEndian.AppendUint64(nil, uint64(len(hdr)))
	buf = append(buf, hdr...)
	for _, v := range data {
		buf = binary.LittleEndian.AppendUint16(buf, v)
	}
	if err := os.WriteFile(path, buf, 0o644); err != nil {
		t.Fatal(err)
	}
}

// randomHead16Mix fills a causal matrix of patterns: allowed keys with
// random small positive values, a few negative ones, +0/-0, subnormals
// (f16: exponent bits 0 with a mantissa; bf16 likewise), NaN and Inf rows,
// and forbidden keys mostly +0/-0 with some mass; negative values in a
// share negRows of the rows only, and forbidden keys all zero in rows without them or
// with a leak, so that most rows are clean (the pass's path for rows
// scanned on the way, cells16Clean) and some are not.
func randomHead16Mix(rng *rand.Rand, S int, bf bool, data []uint16, negRows float64) {
	one := uint16(0x3c00) // 1.0 in float16 (IEEE 754 binary16)
	exp, mant := uint16(0x7c00), uint16(0x03ff)
	if bf {
		one, exp, mant = 0x3f80, 0x7f80, 0x007f
	}
	for q := 0; q < S; q++ {
		negOK := rng.Float64() < negRows
		leak := negRows >= 1 || rng.Intn(4) == 0
		// in half the rows with negatives (when not every row has some),
		// they are only in forbidden keys
		forbOnly := negRows < 1 && rng.Intn(2) == 0
		for k := 0; k < S; k++ {
			var v uint16
			c, mass := rng.Intn(100), false
			if k > q && negRows < 1 && leak && c >= 85 {
				c, mass = rng.Intn(100), true // a forbidden key with mass: any value
			}
			switch {
			case k > q && !mass && (c < 85 || !leak):
				v = uint16(rng.Intn(2)) << 15 // +0 or -0
			case c < 5:
				v = uint16(rng.Intn(2)) << 15
			case c < 10:
				v = uint16(rng.Intn(int(mant))+1) | uint16(rng.Intn(2))<<15 // subnormal
				if !negOK || (forbOnly && k <= q) {
					v &= 0x7fff
				}
			case c < 13 && negOK && (!forbOnly || k > q):
				v = uint16(rng.Intn(int(one))) | 0x8000 // negative
			default:
				v = uint16(rng.Intn(int(one) + 1)) // in [0, 1]
			}
			data[q*S+k] = v
		}
		switch rng.Intn(30) {
		case 0:
			data[q*S+rng.Intn(S)] = exp | 1 // NaN
		case 1:
			data[q*S+rng.Intn(S)] = exp | 0x8000 // -Inf
		}
	}
}

func TestRaw16SameAsFloat32(t *testing.T) {
	for _, c := range []struct {
		dtype string
		bf    bool
		s     int
		neg   float64 // share of rows with negative values
	}{{"F16", false, 37, 1}, {"BF16", true, 37, 1}, {"F16", false, 64, 1}, {"BF16", true, 9, 1},
		{"F16", false, 61, 0.1}, {"BF16", true, 33, 0.1}, {"F16", false, 40, 0}} {
		rng := rand.New(rand.NewSource(int64(c.s)))
		L, H, S := 2, 3, c.s
		data := make([]uint16, L*H*S*S)
		for i := 0; i < L*H; i++ {
			randomHead16Mix(rng, S, c.bf, data[i*S*S:(i+1)*S*S], c.neg)
		}
		path := filepath.Join(t.TempDir(), "x.safetensors")
		writeST16(t, path, c.dtype, []int{L, H, S, S}, data)
		// the file read with positioned reads (heed's way) and through the
		// mapping (loader.Options.ThroughMapping)
		var exs [2]*loader.Export
		for i := range exs {
			lo := loader.NewOptions()
			lo.ThroughMapping = i == 1
			ex, err := loader.Open([]string{path}, lo)
			if err != nil {
				t.Fatal(err)
			}
			defer ex.Close()
			exs[i] = ex
		}
		blk := exs[0].Blocks[0]
		if d, err := blk.ReadRaw16(0, 0, 0, make([]uint16, S*S)); err != nil || d == loader.Invalid {
			t.Fatalf("%s: ReadRaw16 = %v, %v: the pattern path is not taken", c.dtype, d, err)
		}
		for _, opt := range []Options{DefaultOptions(), {Tol: DefaultTol, RedundancyRows: -1}, {Tol: DefaultTol, NoRedundancy: true, NoStats: true}} {
			// the float32 path, the patterns copied (read from the file),
			// the patterns viewed in place in the mapping, the patterns
			// copied from the mapping
			var got [4]*Partial
			for i, mode := range []struct {
				read readPaths
				ex   *loader.Export
			}{{readFloat32, exs[0]}, {readNoViews, exs[0]}, {0, exs[1]}, {readNoViews, exs[1]}} {
				opt.read = mode.read
				p, err := Analyze(context.Background(), mode.ex, opt)
				if err != nil {
					t.Fatal(err)
				}
				got[i] = p
			}
			for i, how := range []string{"read from the file", "viewed in the mapping", "copied from the mapping"} {
				if !reflect.DeepEqual(got[0], got[i+1]) {
					t.Fatalf("%s S=%d: pattern path (%s) differs from the float32 path", c.dtype, S, how)
				}
			}
		}
	}
}

// TestBidirectionalStatsByDefinition: on a bidirectional float16 export
// (keys on both sides of every query, so the distance sums run leftwards
// and rightwards of it) the pass's mean entropy, confidence and distance
// are their definitions (docs/methods.md: -sum_k A ln A with 0 ln 0 = 0;
// max_k A; sum_k A |k - q|) computed here key by key in float64 with
// math.Log, to 1e-12, and the float32 path gives the same bits.
func TestBidirectionalStatsByDefinition(t *testing.T) {
	rng := rand.New(rand.NewSource(11))
	L, H, S := 1, 2, 45
	data := make([]uint16, L*H*S*S)
	tab := loader.F16ToF32Table()
	for i := range data {
		data[i] = uint16(rng.Intn(0x3c00)) // float16 in [0, 1)
		if rng.Intn(7) == 0 {
			data[i] = 0
		}
	}
	path := filepath.Join(t.TempDir(), "bi.safetensors")
	writeST16Kind(t, path, "F16", "bidirectional", []int{L, H, S, S}, data)
	ex, err := loader.Open([]string{path}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	defer ex.Close()
	opt := DefaultOptions()
	opt.SumBelow, opt.SumTol = true, 1e9 // rows are not normalised here
	var res [2]*Result
	for i, read := range []readPaths{0, readFloat32} {
		opt.read = read
		p, err := Analyze(context.Background(), ex, opt)
		if err != nil {
			t.Fatal(err)
		}
		res[i] = p.Result()
	}
	for h := 0; h < H; h++ {
		var ent, conf, dist float64
		for q := 0; q < S; q++ {
			var e, mx, d float64
			for k := 0; k < S; k++ {
				x := float64(tab[data[(h*S+q)*S+k]])
				if x > 0 {
					e -= x * math.Log(x)
				}
				mx = math.Max(mx, x)
				d += x * math.Abs(float64(k-q))
			}
			ent, conf, dist = ent+e, conf+mx, dist+d
		}
		got := res[0].Block("decoder").Head(0, h).Stats
		for _, c := range []struct {
			name      string
			got, want float64
		}{{"entropy", got.Entropy, ent / float64(S)}, {"confidence", got.Confidence, conf / float64(S)}, {"distance", got.Distance, dist / float64(S)}} {
			if !near(c.got, c.want, 1e-12) {
				t.Errorf("H%d %s = %.15g, want %.15g (by definition)", h, c.name, c.got, c.want)
			}
		}
		if f32 := res[1].Block("decoder").Head(0, h).Stats; fmt.Sprintf("%v", f32) != fmt.Sprintf("%v", got) {
			t.Errorf("H%d: float32 path %+v, pattern path %+v", h, f32, got)
		}
	}
}
