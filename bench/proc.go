//go:build linux

package main

import (
	"bufio"
	"bytes"
	"fmt"
	"io"
	"os"
	"os/exec"
	"runtime"
	"sort"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"time"
	"unsafe"
)

// run is one finished child process: its wall time, CPU time, exit code and,
// when sampled, the largest anonymous and file-backed resident sizes seen.
type run struct {
	wall, cpu time.Duration
	code      int
	// peakAnon and peakFile are the largest RssAnon and RssFile (bytes) seen
	// in /proc/PID/status while the process ran; 0 when not sampled.
	peakAnon, peakFile int64
	samples            int
	stdout, stderr     []byte
}

// spawn runs argv to the end. With sample > 0 it reads /proc/PID/status
// every sample while the child runs. Output is kept in memory (the commands
// timed here print little); stdin is /dev/null.
func spawn(argv []string, env []string, sample time.Duration) (run, error) {
	var r run
	cmd := exec.Command(argv[0], argv[1:]...)
	cmd.Env = append(os.Environ(), env...)
	var out, errb bytes.Buffer
	cmd.Stdout, cmd.Stderr = &out, &errb
	start := time.Now()
	if err := cmd.Start(); err != nil {
		return r, err
	}
	done := make(chan struct{})
	sampled := make(chan struct{})
	if sample > 0 {
		go func() {
			defer close(sampled)
			path := fmt.Sprintf("/proc/%d/status", cmd.Process.Pid)
			t := time.NewTicker(sample)
			defer t.Stop()
			for {
				if st, err := readStatus(path); err == nil {
					r.samples++
					r.peakAnon = max(r.peakAnon, st["RssAnon"])
					r.peakFile = max(r.peakFile, st["RssFile"])
				}
				select {
				case <-done:
					return
				case <-t.C:
				}
			}
		}()
	} else {
		close(sampled)
	}
	err := cmd.Wait()
	r.wall = time.Since(start)
	close(done)
	<-sampled
	r.stdout, r.stderr = out.Bytes(), errb.Bytes()
	if ps := cmd.ProcessState; ps != nil {
		if ru, ok := ps.SysUsage().(*syscall.Rusage); ok {
			r.cpu = time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
		}
		r.code = ps.ExitCode()
	}
	if _, isExit := err.(*exec.ExitError); isExit {
		err = nil // the exit code is reported, judged by the caller
	}
	return r, err
}

// readStatus reads the "Key: N kB" lines of a /proc/PID/status file
// (proc(5)) and returns them in bytes.
func readStatus(path string) (map[string]int64, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	return parseStatus(f)
}

func parseStatus(r io.Reader) (map[string]int64, error) {
	m := map[string]int64{}
	sc := bufio.NewScanner(r)
	for sc.Scan() {
		key, val, ok := strings.Cut(sc.Text(), ":")
		if !ok {
			continue
		}
		fields := strings.Fields(val)
		if len(fields) != 2 || fields[1] != "kB" {
			continue
		}
		n, err := strconv.ParseInt(fields[0], 10, 64)
		if err != nil {
			continue
		}
		m[key] = n << 10
	}
	return m, sc.Err()
}

// median of ds (the mean of the middle two for an even count); 0 for none.
func median(ds []time.Duration) time.Duration {
	if len(ds) == 0 {
		return 0
	}
	s := append([]time.Duration(nil), ds...)
	sort.Slice(s, func(i, j int) bool { return s[i] < s[j] })
	n := len(s)
	if n%2 == 1 {
		return s[n/2]
	}
	return (s[n/2-1] + s[n/2]) / 2
}

// medianF is median for float64 values.
func medianF(xs []float64) float64 {
	if len(xs) == 0 {
		return 0
	}
	s := append([]float64(nil), xs...)
	sort.Float64s(s)
	n := len(s)
	if n%2 == 1 {
		return s[n/2]
	}
	return (s[n/2-1] + s[n/2]) / 2
}

// touchFile maps path read-only and ORs together every 8 bytes of it, the
// work split in contiguous shares over GOMAXPROCS goroutines: the least a
// program does that looks at every value of a mapped export once (page
// faults on the mapping, every cache line brought in). It returns the OR so
// that the loop is not optimised away.
func touchFile(path string) (uint64, error) {
	f, err := os.Open(path)
	if err != nil {
		return 0, err
	}
	defer f.Close()
	st, err := f.Stat()
	if err != nil {
		return 0, err
	}
	n := int(st.Size()) &^ 7
	if n == 0 {
		return 0, nil
	}
	m, err := syscall.Mmap(int(f.Fd()), 0, n, syscall.PROT_READ, syscall.MAP_SHARED)
	if err != nil {
		return 0, err
	}
	defer syscall.Munmap(m)
	words := unsafe.Slice((*uint64)(unsafe.Pointer(&m[0])), n/8)
	nw := runtime.GOMAXPROCS(0)
	out := make([]uint64, nw)
	var wg sync.WaitGroup
	for i := range nw {
		lo, hi := len(words)*i/nw, len(words)*(i+1)/nw
		wg.Add(1)
		go func() {
			defer wg.Done()
			var acc uint64
			for _, w := range words[lo:hi] {
				acc |= w
			}
			out[i] = acc
		}()
	}
	wg.Wait()
	var acc uint64
	for _, v := range out {
		acc |= v
	}
	return acc, nil
}

// readFile reads path once with read(2) calls into a 1 MiB buffer and
// returns the byte count: the "read the file once" baseline, run in a fresh
// process like the commands it is compared with.
func readFile(path string) (int64, error) {
	f, err := os.Open(path)
	if err != nil {
		return 0, err
	}
	defer f.Close()
	buf := make([]byte, 1<<20)
	var n int64
	for {
		k, err := f.Read(buf)
		n += int64(k)
		if err == io.EOF {
			return n, nil
		}
		if err != nil {
			return n, err
		}
	}
}
