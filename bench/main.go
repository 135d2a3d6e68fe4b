//go:build linux

// Command bench is heed's whole-process benchmark (make bench).
//
// It writes seeded float16 causal exports with numpy (bench/gen_export.py)
// into a cache directory, then in one run, alternating them in turn over
// several rounds with the page cache warm, times
//
//	(a) reading the file once: a fresh process of this program reading it
//	    with read(2) calls into a 1 MiB buffer;
//	(b) the plain numpy script bench/reference_stats.py computing row entropy,
//	    confidence, causal leak mass and mean distance per head;
//	(c) heed check followed by heed rank on the same file;
//	(d) a fresh process of this program mapping the file and looking at
//	    every 8 bytes of it once on all cores: the floor of any pass that
//	    reads every value through a mapping;
//	(e) starting heed twice (heed --version): with (a), the floor of two
//	    heed processes that each read the file once, (e) + 2 (a);
//	(f) heed both: check and rank in one process, from one pass over the
//	    file;
//
// and prints the medians and the ratios against the targets of the design
// (f at least 10x faster than b, within 3x of a). Before timing it compares
// heed's statistics with the numpy script's, head by head. -parts picks
// what to measure (timing, startup, memory, tui).
//
// Start-up: heed info on a small NPY against a fresh process of this
// program that prints one line and exits (a static Go binary when built
// without cgo, as go run builds it: it imports no package that needs cgo),
// and heed --version, in paired rounds with the order rotated.
//
// It then measures memory: the peak anonymous resident size (RssAnon in
// /proc/PID/status, sampled while the process runs; file-backed mapped
// pages are RssFile and do not count) of heed check and heed rank on the
// 0.3 GB export and on a 4 GiB one, to show the ceiling and that it does
// not grow with the file.
//
// Last, the TUI: in a detached tmux window of 200x60, the time from starting
// heed on an export (opening on the Map of the first head) to its first
// frame, and from a key press (next head) to the frame that shows it (see
// tui.go).
//
// Usage: go run ./bench [-heed ./heed] [-dir /tmp/heed-bench] [-rounds 7] [-big=false] [-tui 5] [-parts timing,memory,tui]
package main

import (
	"bytes"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"strings"
	"syscall"
	"time"
)

// shape of a generated export: [layers, heads, seq, seq] float16.
type shape struct{ layers, heads, seq int }

func (s shape) bytes() int64 {
	return int64(s.layers) * int64(s.heads) * int64(s.seq) * int64(s.seq) * 2
}

func (s shape) String() string { return fmt.Sprintf("[%d %d %d %d]", s.layers, s.heads, s.seq, s.seq) }

var (
	small = shape{12, 12, 1024} // 0.3 GB: the design's timing target
	big   = shape{32, 16, 2048} // 4 GiB: the memory target
	// mid has big's heads and sequence length with an eighth of its layers:
	// the same per-head buffers, an eighth of the file, to show that memory
	// does not grow with the file.
	mid = shape{4, 16, 2048}
)

type config struct {
	heed, python, dir, script string
	rounds                    int
	big                       bool
	sample                    time.Duration
	tuiRounds, startRounds    int
	parts                     string
}

// part reports whether the -parts flag names p.
func (c config) part(p string) bool {
	for _, s := range strings.Split(c.parts, ",") {
		if strings.TrimSpace(s) == p {
			return true
		}
	}
	return false
}

func main() {
	if len(os.Args) == 3 && os.Args[1] == "-touch" {
		// (d): the child process that looks at every byte of the mapped file.
		if _, err := touchFile(os.Args[2]); err != nil {
			fmt.Fprintln(os.Stderr, "bench:", err)
			os.Exit(2)
		}
		return
	}
	if len(os.Args) == 2 && os.Args[1] == "-hello" {
		// the static hello-world of the start-up timing
		fmt.Println("hello")
		return
	}
	if len(os.Args) == 3 && os.Args[1] == "-read" {
		// (a): the child process that reads the file once.
		if _, err := readFile(os.Args[2]); err != nil {
			fmt.Fprintln(os.Stderr, "bench:", err)
			os.Exit(2)
		}
		return
	}
	var c config
	defDir := os.Getenv("HEED_BENCH_DIR")
	if defDir == "" {
		defDir = filepath.Join(os.TempDir(), "heed-bench")
	}
	flag.StringVar(&c.heed, "heed", "./heed", "the heed binary to time")
	flag.StringVar(&c.python, "python", "/usr/bin/python3", "a python with numpy")
	flag.StringVar(&c.dir, "dir", defDir, "cache directory for the generated exports (not committed)")
	flag.StringVar(&c.script, "scripts", "bench", "directory of gen_export.py and reference_stats.py")
	flag.IntVar(&c.rounds, "rounds", 7, "timed rounds (after one warm-up round)")
	flag.BoolVar(&c.big, "big", true, "also measure memory on a 4 GiB export (written once, about 4.3 GB of disk)")
	flag.DurationVar(&c.sample, "sample", time.Millisecond, "interval between /proc samples of the memory runs")
	flag.IntVar(&c.tuiRounds, "tui", 3, "TUI timing rounds in tmux at 200x60 (0 = none)")
	flag.IntVar(&c.startRounds, "startup-rounds", 50, "rounds of the start-up timing")
	flag.StringVar(&c.parts, "parts", "timing,startup,memory,tui", "what to measure, comma-separated: timing (the ratios), startup, memory, tui")
	flag.Parse()
	if err := bench(c); err != nil {
		fmt.Fprintln(os.Stderr, "bench:", err)
		os.Exit(1)
	}
}

func bench(c config) error {
	heed, err := filepath.Abs(c.heed)
	if err != nil {
		return err
	}
	if _, err := os.Stat(heed); err != nil {
		return fmt.Errorf("no heed binary at %s (make build)", heed)
	}
	c.heed = heed
	self, err := os.Executable()
	if err != nil {
		return err
	}
	if err := os.MkdirAll(c.dir, 0o755); err != nil {
		return err
	}
	fmt.Println("heed bench")
	fmt.Println("machine:", machine(c.python))

	file, err := ensureExport(c, small)
	if err != nil {
		return err
	}
	fmt.Printf("export:  %s, decoder/attn %s f16 causal, %.1f MB\n", file, small, float64(fileSize(file))/1e6)

	// Warm the page cache, then compare statistics with the numpy script.
	if _, err := readFile(file); err != nil {
		return err
	}
	if err := crossCheck(c, file); err != nil {
		return err
	}

	if c.part("timing") {
		if err := timing(c, self, file); err != nil {
			return err
		}
	}

	if c.part("startup") {
		if err := startup(c, self); err != nil {
			return err
		}
	}

	sizes := []sized{{file, small}}
	if c.big {
		for _, s := range []shape{mid, big} {
			f, err := ensureExport(c, s)
			if err != nil {
				return err
			}
			sizes = append(sizes, sized{f, s})
		}
	}
	if c.part("memory") {
		if err := memory(c, sizes); err != nil {
			return err
		}
	}
	if c.tuiRounds > 0 && c.part("tui") {
		fmt.Printf("\nTUI in tmux at 200x60, %d rounds: start -> first frame (Map of L0 H0), key } -> frame of the next head\n", c.tuiRounds)
		for _, sz := range sizes {
			if err := tuiTiming(c, sz.file, sz.s); err != nil {
				fmt.Println("  TUI timing:", err)
			}
		}
	}
	return nil
}

// sized is a generated export and its shape.
type sized struct {
	file string
	s    shape
}

// memory measures the peak anonymous memory of heed check and heed rank on
// each export.
func memory(c config, sizes []sized) error {
	fmt.Printf("\nmemory: peak RssAnon (anonymous resident memory; mapped file pages are RssFile and do not count), /proc sampled every %v\n", c.sample)
	fmt.Printf("  %-10s %-22s %10s %10s %10s %9s\n", "command", "export", "RssAnon", "RssFile", "wall", "samples")
	var peaks []int64
	for _, sz := range sizes {
		if _, err := readFile(sz.file); err != nil { // warm, as in the timing
			return err
		}
		for _, sub := range []string{"check", "rank", "both"} {
			r, err := spawn([]string{c.heed, sub, "--json", sz.file}, nil, c.sample)
			if err != nil {
				return err
			}
			if err := judge(sub, r); err != nil {
				return err
			}
			fmt.Printf("  %-10s %-22s %8.1f MB %7.0f MB %10s %9d\n", "heed "+sub,
				fmt.Sprintf("%s %.2f GB", sz.s, float64(fileSize(sz.file))/1e9),
				float64(r.peakAnon)/1e6, float64(r.peakFile)/1e6, ms(r.wall), r.samples)
			peaks = append(peaks, r.peakAnon)
		}
	}
	var top int64
	for _, p := range peaks {
		top = max(top, p)
	}
	fmt.Printf("  largest RssAnon %.1f MB (target < 100 MB: %s)\n", float64(top)/1e6, verdict(top < 100e6))
	if len(peaks) == 9 {
		fmt.Printf("  same heads, %.2f GB -> %.2f GB file (8x): check %+.1f MB, rank %+.1f MB, both %+.1f MB of RssAnon\n",
			float64(mid.bytes())/1e9, float64(big.bytes())/1e9,
			float64(peaks[6]-peaks[3])/1e6, float64(peaks[7]-peaks[4])/1e6, float64(peaks[8]-peaks[5])/1e6)
	}
	return nil
}

// timing runs the alternating rounds and prints medians and ratios.
func timing(c config, self, file string) error {
	type item struct {
		name string
		argv [][]string // run one after the other; the item's time is the sum
	}
	items := []item{
		{"(a) read the file once (read(2), 1 MiB buffer)", [][]string{{self, "-read", file}}},
		{"(b) numpy script bench/reference_stats.py", [][]string{{c.python, filepath.Join(c.script, "reference_stats.py"), file}}},
		{"(c) heed check + heed rank", [][]string{{c.heed, "check", "--json", file}, {c.heed, "rank", "--json", file}}},
		{"(d) touch the mapped file once, all cores", [][]string{{self, "-touch", file}}},
		{"(e) start heed twice (heed --version)", [][]string{{c.heed, "--version"}, {c.heed, "--version"}}},
		{"(f) heed both (check + rank, one process)", [][]string{{c.heed, "both", "--json", file}}},
	}
	wall := make([][]time.Duration, len(items))
	cpu := make([][]time.Duration, len(items))
	parts := make([][]time.Duration, 2) // check, rank separately
	for round := 0; round <= c.rounds; round++ {
		for j := range items {
			i := (j + round) % len(items) // rotate the order from round to round
			var w, u time.Duration
			for p, argv := range items[i].argv {
				r, err := spawn(argv, nil, 0)
				if err != nil {
					return err
				}
				if r.code != 0 && !((i == 2 && p == 0 || i == 5) && r.code == 1) {
					return fmt.Errorf("%s exited %d: %s", strings.Join(argv, " "), r.code, firstLine(r.stderr))
				}
				w += r.wall
				u += r.cpu
				if round > 0 && i == 2 {
					parts[p] = append(parts[p], r.wall)
				}
			}
			if round > 0 { // round 0 is the warm-up
				wall[i] = append(wall[i], w)
				cpu[i] = append(cpu[i], u)
			}
		}
	}
	fmt.Printf("\ntiming: %d rounds after a warm-up, (a) to (f) in turn with the order rotated each round;\n", c.rounds)
	fmt.Println("        wall time of whole processes (start to exit), page cache warm")
	fmt.Printf("  %-48s %9s %9s %9s %11s\n", "", "median", "min", "max", "cpu median")
	for i, it := range items {
		lo, hi := minmax(wall[i])
		fmt.Printf("  %-48s %9s %9s %9s %11s\n", it.name, ms(median(wall[i])), ms(lo), ms(hi), ms(median(cpu[i])))
	}
	fmt.Printf("  %-48s %9s\n", "    of which heed check", ms(median(parts[0])))
	fmt.Printf("  %-48s %9s\n", "    of which heed rank", ms(median(parts[1])))
	var speedup, overRead, touchRead, overTouch, floorRead, bothRead, bothNumpy, bothTwo []float64
	for r := range wall[0] {
		bothRead = append(bothRead, wall[5][r].Seconds()/wall[0][r].Seconds())
		bothNumpy = append(bothNumpy, wall[1][r].Seconds()/wall[5][r].Seconds())
		bothTwo = append(bothTwo, wall[5][r].Seconds()/wall[2][r].Seconds())
		speedup = append(speedup, wall[1][r].Seconds()/wall[2][r].Seconds())
		overRead = append(overRead, wall[2][r].Seconds()/wall[0][r].Seconds())
		touchRead = append(touchRead, wall[3][r].Seconds()/wall[0][r].Seconds())
		overTouch = append(overTouch, wall[2][r].Seconds()/wall[3][r].Seconds())
		// two heed processes that did nothing but read the file once each
		floorRead = append(floorRead, (wall[4][r].Seconds()+2*wall[0][r].Seconds())/wall[0][r].Seconds())
	}
	s, o := medianF(speedup), medianF(overRead)
	defer func() {
		// (d) is the least any process spends that looks at every value once
		// through a mapping; heed check and heed rank are two such processes.
		fmt.Printf("  touch / read = %5.1fx   (the floor of one pass over the mapped values, against (a))\n", medianF(touchRead))
		fmt.Printf("  heed  / touch = %4.1fx   (two passes, check and rank, against one touch)\n", medianF(overTouch))
		// (e) + 2 (a): starting heed twice and reading the file twice, with
		// no arithmetic at all, is what heed check + heed rank cannot go below
		fmt.Printf("  floor / read = %5.1fx   (two heed processes that only start and read the file once: (e) + 2 (a))\n", medianF(floorRead))
	}()
	fmt.Println("ratios (median of the per-round ratios):")
	b, br := medianF(bothNumpy), medianF(bothRead)
	fmt.Printf("  numpy / both = %5.1fx   (target >= 10x: %s)\n", b, verdict(b >= 10))
	fmt.Printf("  both  / read = %5.1fx   (target <= 3x: %s; 2x would be the arithmetic hidden behind the read)\n", br, verdict(br <= 3))
	fmt.Printf("  both  / (c)  = %5.2fx   (one process and one pass against check then rank)\n", medianF(bothTwo))
	fmt.Printf("  numpy / (c)  = %5.1fx   (check + rank as two processes)\n", s)
	fmt.Printf("  (c)   / read = %5.1fx\n", o)
	return nil
}

// crossCheck compares heed rank's per-head statistics and heed check's
// verdict with the numpy script's output on the same file.
func crossCheck(c config, file string) error {
	ref, err := spawn([]string{c.python, filepath.Join(c.script, "reference_stats.py"), file}, nil, 0)
	if err != nil || ref.code != 0 {
		return fmt.Errorf("reference_stats.py failed (%v): %s", err, firstLine(ref.stderr))
	}
	var want struct {
		Heads []map[string]any `json:"heads"`
	}
	if err := json.Unmarshal(ref.stdout, &want); err != nil {
		return fmt.Errorf("reference_stats.py output: %w", err)
	}
	rank, err := spawn([]string{c.heed, "rank", "--json", file}, nil, 0)
	if err != nil {
		return err
	}
	if err := judge("rank", rank); err != nil {
		return err
	}
	var got struct {
		Heads []map[string]any `json:"heads"`
	}
	if err := json.Unmarshal(rank.stdout, &got); err != nil {
		return fmt.Errorf("heed rank --json output: %w", err)
	}
	type key struct{ l, h int }
	byKey := map[key]map[string]any{}
	for _, h := range got.Heads {
		if b, _ := h["block"].(string); b != "" && b != "decoder" {
			continue
		}
		byKey[key{num(h["layer"]), num(h["head"])}] = h
	}
	fields := []string{"entropy", "entropy_norm", "confidence", "distance"}
	worst := map[string]float64{}
	compared := map[string]int{}
	for _, w := range want.Heads {
		g, ok := byKey[key{num(w["layer"]), num(w["head"])}]
		if !ok {
			return fmt.Errorf("heed rank has no head L%v H%v", w["layer"], w["head"])
		}
		for _, f := range fields {
			gv, ok := g[f].(float64)
			if !ok {
				continue
			}
			wv := w[f].(float64)
			d := math.Abs(gv-wv) / math.Max(1, math.Abs(wv))
			worst[f] = math.Max(worst[f], d)
			compared[f]++
		}
	}
	fmt.Printf("check:   heed rank vs numpy script, %d heads, largest difference (relative, or absolute below 1):", len(want.Heads))
	bad := false
	for _, f := range fields {
		if compared[f] == 0 {
			fmt.Printf(" %s not in heed's output;", f)
			continue
		}
		fmt.Printf(" %s %.1e", f, worst[f])
		if worst[f] > 1e-4 {
			fmt.Print(" (MISMATCH)")
			bad = true
		}
	}
	fmt.Println()

	// The export is causal and clean: the numpy script finds no leak mass,
	// and heed check must agree.
	var leak float64
	for _, w := range want.Heads {
		leak += w["leak_mass"].(float64)
	}
	chk, err := spawn([]string{c.heed, "check", "--json", file}, nil, 0)
	if err != nil {
		return err
	}
	if err := judge("check", chk); err != nil {
		return err
	}
	var res struct {
		Clean    bool             `json:"clean"`
		Findings []map[string]any `json:"findings"`
	}
	if err := json.Unmarshal(chk.stdout, &res); err != nil {
		return fmt.Errorf("heed check --json output: %w", err)
	}
	fmt.Printf("         numpy causal leak mass %g; heed check: clean %v, %d findings\n", leak, res.Clean, len(res.Findings))
	if (leak == 0) != res.Clean {
		bad = true
		fmt.Println("         (MISMATCH)")
	}
	if bad {
		return errors.New("heed and the numpy script disagree")
	}
	return nil
}

// judge accepts exit 0, and 1 for check (findings); anything else is an error.
func judge(sub string, r run) error {
	if r.code == 0 || (sub == "check" && r.code == 1) {
		return nil
	}
	return fmt.Errorf("heed %s exited %d: %s", sub, r.code, firstLine(r.stderr))
}

// ensureExport returns the cached export of shape s, writing it with numpy
// first when it is missing or has the wrong size.
func ensureExport(c config, s shape) (string, error) {
	name := filepath.Join(c.dir, fmt.Sprintf("attn-%dx%dx%d.safetensors", s.layers, s.heads, s.seq))
	if st, err := os.Stat(name); err == nil && st.Size() > s.bytes() && st.Size() < s.bytes()+4096 {
		return name, nil
	}
	var fs syscall.Statfs_t
	if err := syscall.Statfs(c.dir, &fs); err != nil {
		return "", err
	}
	free := int64(fs.Bavail) * int64(fs.Bsize)
	if need := s.bytes() + 1<<30; free < need {
		return "", fmt.Errorf("%s has %.1f GB free; the %s export needs %.1f GB (use -dir, or -big=false)",
			c.dir, float64(free)/1e9, s, float64(need)/1e9)
	}
	fmt.Printf("writing %s with numpy (%.2f GB; %.0f GB free in %s)...\n", name, float64(s.bytes())/1e9, float64(free)/1e9, c.dir)
	cmd := exec.Command(c.python, filepath.Join(c.script, "gen_export.py"), name,
		"--layers", fmt.Sprint(s.layers), "--heads", fmt.Sprint(s.heads), "--seq", fmt.Sprint(s.seq))
	cmd.Stdout, cmd.Stderr = os.Stdout, os.Stderr
	if err := cmd.Run(); err != nil {
		return "", fmt.Errorf("gen_export.py: %w", err)
	}
	return name, nil
}

// machine describes where the figures come from.
func machine(python string) string {
	model := "unknown CPU"
	if b, err := os.ReadFile("/proc/cpuinfo"); err == nil {
		for _, l := range strings.Split(string(b), "\n") {
			if k, v, ok := strings.Cut(l, ":"); ok && strings.TrimSpace(k) == "model name" {
				model = strings.TrimSpace(v)
				break
			}
		}
	}
	mem := ""
	if st, err := readStatus("/proc/meminfo"); err == nil {
		mem = fmt.Sprintf(", %.1f GiB RAM", float64(st["MemTotal"])/(1<<30))
	}
	kernel := ""
	if b, err := os.ReadFile("/proc/sys/kernel/osrelease"); err == nil {
		kernel = ", Linux " + strings.TrimSpace(string(b))
	}
	np := "numpy ?"
	if out, err := exec.Command(python, "-c", "import numpy, sys; print('python', sys.version.split()[0], 'numpy', numpy.__version__)").Output(); err == nil {
		np = strings.TrimSpace(string(out))
	}
	return fmt.Sprintf("%s, %d CPUs%s%s; bench built with %s; %s", model, runtime.NumCPU(), mem, kernel, runtime.Version(), np)
}

func fileSize(path string) int64 {
	st, err := os.Stat(path)
	if err != nil {
		return 0
	}
	return st.Size()
}

func num(v any) int {
	f, _ := v.(float64)
	return int(f)
}

func minmax(ds []time.Duration) (lo, hi time.Duration) {
	for i, d := range ds {
		if i == 0 || d < lo {
			lo = d
		}
		if d > hi {
			hi = d
		}
	}
	return lo, hi
}

func ms(d time.Duration) string { return fmt.Sprintf("%.1f ms", d.Seconds()*1e3) }

func verdict(ok bool) string {
	if ok {
		return "met"
	}
	return "MISSED"
}

func firstLine(b []byte) string {
	line, _, _ := bytes.Cut(bytes.TrimSpace(b), []byte("\n"))
	return string(line)
}

// startup times heed info on a small NPY export, heed --version and a
// static hello-world (this program with -hello), in paired rounds with the
// order rotated, and prints medians and the median of the per-round ratios.
func startup(c config, self string) error {
	dir := filepath.Join(c.dir, "containers-2x4x128")
	npy := filepath.Join(dir, "attn.npy")
	if _, err := os.Stat(npy); err != nil {
		cmd := exec.Command(c.python, filepath.Join(c.script, "gen_containers.py"), dir, "--layers", "2", "--heads", "4", "--seq", "128")
		cmd.Stdout, cmd.Stderr = os.Stdout, os.Stderr
		if err := cmd.Run(); err != nil {
			return fmt.Errorf("gen_containers.py: %w", err)
		}
	}
	items := []struct {
		name string
		argv []string
	}{
		{"static hello-world Go binary", []string{self, "-hello"}},
		{"heed info attn.npy [2 4 128 128] f16", []string{c.heed, "info", "--kind", "causal", npy}},
		{"heed --version", []string{c.heed, "--version"}},
	}
	wall := make([][]time.Duration, len(items))
	for round := 0; round < c.startRounds+3; round++ {
		for j := range items {
			i := (j + round) % len(items)
			r, err := spawn(items[i].argv, nil, 0)
			if err != nil {
				return err
			}
			if r.code != 0 {
				return fmt.Errorf("%s exited %d: %s", strings.Join(items[i].argv, " "), r.code, firstLine(r.stderr))
			}
			if round >= 3 { // three warm-up rounds
				wall[i] = append(wall[i], r.wall)
			}
		}
	}
	fmt.Printf("\nstart-up: %d rounds after 3 warm-up rounds, in turn with the order rotated; wall time of whole processes\n", c.startRounds)
	ratios := make([]float64, len(items)) // median of the per-round ratios to the hello-world
	for i, it := range items {
		lo, hi := minmax(wall[i])
		var ratio []float64
		for r := range wall[i] {
			ratio = append(ratio, wall[i][r].Seconds()/wall[0][r].Seconds())
		}
		ratios[i] = medianF(ratio)
		fmt.Printf("  %-40s median %9s  min %9s  max %9s  / hello %5.2fx\n", it.name, ms(median(wall[i])), ms(lo), ms(hi), ratios[i])
	}
	m := ratios[1]
	fmt.Printf("  heed info (NPY) / hello = %.2fx   (target <= 2x: %s)\n", m, verdict(m <= 2))
	return nil
}
