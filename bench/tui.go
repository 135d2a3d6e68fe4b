//go:build linux

package main

import (
	"fmt"
	"os"
	"os/exec"
	"strings"
	"time"
)

// tuiTiming measures the TUI from outside, as a person sees it: heed runs in
// a detached tmux window of 200 x 60 on a private tmux server, and the pane
// is read with capture-pane until the frame in question is on it.
//
//   - first frame: from just before tmux starts heed (`heed FILE --at
//     decoder:L0:H0:q<mid>`, which opens on the Map of that head) until the
//     pane shows the status line of that head; the head's heat map is drawn
//     in the same frame (the TUI reads a head when it first draws it);
//   - head switch: from just before `send-keys }` (next head) until the
//     status line shows the next head, for several heads in turn, while the
//     statistics still run behind the progress bar, and again once they
//     are done.
//
// Each capture-pane is a tmux client process, so the figures include up to
// one poll (a few milliseconds) of slack: they err on the slow side.
func tuiTiming(c config, file string, s shape) error {
	if _, err := exec.LookPath("tmux"); err != nil {
		return fmt.Errorf("no tmux: %w", err)
	}
	// A private server per call: the previous one may still be shutting down.
	sock := fmt.Sprintf("heedbench-%d-%d", os.Getpid(), s.layers)
	tm := func(args ...string) ([]byte, error) {
		return exec.Command("tmux", append([]string{"-L", sock}, args...)...).Output()
	}
	// A session that keeps the server up, so its start-up is not timed.
	if _, err := tm("new-session", "-d", "-s", "keep", "-x", "200", "-y", "60", "sleep", "3600"); err != nil {
		return fmt.Errorf("tmux: %w", err)
	}
	defer tm("kill-server")
	const switches = 5
	var first, sw, idle []time.Duration
	var polls int
	for r := 0; r < c.tuiRounds; r++ {
		name := fmt.Sprintf("r%d", r)
		at := fmt.Sprintf("decoder:L0:H0:q%d", s.seq/2)
		t0 := time.Now()
		if _, err := tm("new-session", "-d", "-s", name, "-x", "200", "-y", "60", c.heed, file, "--at", at); err != nil {
			return fmt.Errorf("tmux new-session: %w", err)
		}
		d, n, err := waitPane(tm, name, t0, " L0  H0  ", 10*time.Second)
		polls += n
		if err != nil {
			tm("kill-session", "-t", name)
			return fmt.Errorf("first frame: %w", err)
		}
		first = append(first, d)
		for h := 1; h <= switches && h < s.heads; h++ {
			t := time.Now()
			if _, err := tm("send-keys", "-t", name, "}"); err != nil {
				return err
			}
			d, n, err := waitPane(tm, name, t, fmt.Sprintf(" L0  H%d  ", h), 5*time.Second)
			polls += n
			if err != nil {
				tm("kill-session", "-t", name)
				return fmt.Errorf("switch to head %d: %w", h, err)
			}
			sw = append(sw, d)
		}
		// Once the statistics are done, the same without them competing for the CPUs.
		if err := waitGone(tm, name, "statistics ", 120*time.Second); err == nil {
			for h := switches + 1; h <= 2*switches && h < s.heads; h++ {
				t := time.Now()
				if _, err := tm("send-keys", "-t", name, "}"); err != nil {
					return err
				}
				d, n, err := waitPane(tm, name, t, fmt.Sprintf(" L0  H%d  ", h), 5*time.Second)
				polls += n
				if err != nil {
					tm("kill-session", "-t", name)
					return fmt.Errorf("switch to head %d: %w", h, err)
				}
				idle = append(idle, d)
			}
		}
		tm("send-keys", "-t", name, "q")
		time.Sleep(100 * time.Millisecond)
		tm("kill-session", "-t", name)
	}
	lo, hi := minmax(first)
	slo, shi := minmax(sw)
	fmt.Printf("  %-22s first frame median %s (min %s, max %s; target <= 300 ms: %s)\n",
		fmt.Sprintf("%s %.2f GB", s, float64(fileSize(file))/1e9), ms(median(first)), ms(lo), ms(hi), verdict(median(first) <= 300*time.Millisecond))
	fmt.Printf("  %-22s head switch while the statistics run: median %s (min %s, max %s, %d switches; target <= 50 ms: %s)\n",
		"", ms(median(sw)), ms(slo), ms(shi), len(sw), verdict(median(sw) <= 50*time.Millisecond))
	if len(idle) > 0 {
		ilo, ihi := minmax(idle)
		fmt.Printf("  %-22s head switch after the statistics:   median %s (min %s, max %s, %d switches; target <= 50 ms: %s)\n",
			"", ms(median(idle)), ms(ilo), ms(ihi), len(idle), verdict(median(idle) <= 50*time.Millisecond))
	}
	return nil
}

// waitGone polls the pane until its text no longer contains what.
func waitGone(tm func(...string) ([]byte, error), name, what string, limit time.Duration) error {
	t0 := time.Now()
	for time.Since(t0) < limit {
		out, err := tm("capture-pane", "-p", "-t", name)
		if err == nil && !strings.Contains(string(out), what) {
			return nil
		}
		time.Sleep(50 * time.Millisecond)
	}
	return fmt.Errorf("%q still on the pane after %v", what, limit)
}

// waitPane polls the pane until its text contains want; it returns the time
// since t0 and the number of polls.
func waitPane(tm func(...string) ([]byte, error), name string, t0 time.Time, want string, limit time.Duration) (time.Duration, int, error) {
	for n := 1; ; n++ {
		out, err := tm("capture-pane", "-p", "-t", name)
		if err == nil && strings.Contains(string(out), want) {
			return time.Since(t0), n, nil
		}
		if time.Since(t0) > limit {
			last := strings.TrimSpace(string(out))
			if i := strings.LastIndex(last, "\n"); i >= 0 {
				last = last[i+1:]
			}
			return 0, n, fmt.Errorf("%q not on the pane after %v (last line %q)", want, limit, last)
		}
	}
}
