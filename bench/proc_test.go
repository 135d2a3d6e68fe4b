//go:build linux

package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

// proc(5), /proc/PID/status: "VmRSS: Resident set size. Note that the value
// here is the sum of RssAnon, RssFile, and RssShmem." The parser must find
// all four, in bytes, and they must add up (the kernel writes them from one
// snapshot of the counters).
func TestParseStatusSelf(t *testing.T) {
	st, err := readStatus("/proc/self/status")
	if err != nil {
		t.Fatal(err)
	}
	for _, k := range []string{"VmRSS", "RssAnon", "RssFile", "RssShmem"} {
		if _, ok := st[k]; !ok {
			t.Fatalf("no %s in /proc/self/status: %v", k, st)
		}
	}
	if sum := st["RssAnon"] + st["RssFile"] + st["RssShmem"]; sum != st["VmRSS"] {
		t.Errorf("RssAnon+RssFile+RssShmem = %d, VmRSS = %d", sum, st["VmRSS"])
	}
	if st["VmRSS"]%1024 != 0 {
		t.Errorf("VmRSS = %d bytes, want a multiple of 1024 (the file counts kB)", st["VmRSS"])
	}
}

func TestParseStatusLines(t *testing.T) {
	in := "Name:\tcat\nRssAnon:\t     108 kB\nRssFile:\t    1536 kB\nThreads:\t1\nVmFlags: x y\n"
	st, err := parseStatus(strings.NewReader(in))
	if err != nil {
		t.Fatal(err)
	}
	if st["RssAnon"] != 108<<10 || st["RssFile"] != 1536<<10 {
		t.Errorf("parseStatus = %v, want RssAnon %d RssFile %d", st, 108<<10, 1536<<10)
	}
	if _, ok := st["Threads"]; ok {
		t.Errorf("parseStatus kept Threads, which is not in kB")
	}
}

func TestMedian(t *testing.T) {
	for _, c := range []struct {
		in   []time.Duration
		want time.Duration
	}{
		{nil, 0},
		{[]time.Duration{3}, 3},
		{[]time.Duration{5, 1, 3}, 3},
		{[]time.Duration{4, 1, 3, 2}, 2}, // (2+3)/2 in integer nanoseconds
	} {
		if got := median(c.in); got != c.want {
			t.Errorf("median(%v) = %v, want %v", c.in, got, c.want)
		}
	}
	if got := medianF([]float64{1, 4, 2, 3}); got != 2.5 {
		t.Errorf("medianF = %v, want 2.5", got)
	}
}

// The read baseline must read every byte of the file.
func TestReadFile(t *testing.T) {
	p := filepath.Join(t.TempDir(), "f")
	data := make([]byte, 3<<20+17)
	if err := os.WriteFile(p, data, 0o644); err != nil {
		t.Fatal(err)
	}
	n, err := readFile(p)
	if err != nil || n != int64(len(data)) {
		t.Errorf("readFile = %d, %v; want %d", n, err, len(data))
	}
}

// spawn must see the child's anonymous memory: a python that holds 64 MB
// of touched bytes shows at least that much RssAnon.
func TestSpawnSamplesRssAnon(t *testing.T) {
	if _, err := os.Stat("/usr/bin/python3"); err != nil {
		t.Skip("no /usr/bin/python3")
	}
	r, err := spawn([]string{"/usr/bin/python3", "-c", "import time; b = b'x' * (64 << 20); time.sleep(0.3)"}, nil, 5*time.Millisecond)
	if err != nil || r.code != 0 {
		t.Fatalf("spawn: %v, exit %d: %s", err, r.code, r.stderr)
	}
	if r.peakAnon < 64<<20 {
		t.Errorf("peak RssAnon %d, want >= %d", r.peakAnon, 64<<20)
	}
	if r.samples < 2 {
		t.Errorf("%d samples", r.samples)
	}
}
