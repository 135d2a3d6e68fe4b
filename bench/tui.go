//go:build linux

package main

import (
	"bufio"
	"errors"
	"fmt"
	"io"
	"os"
	"os/exec"
	"strings"
	"time"
)

// tuiTiming measures the TUI from outside, as a person sees it: heed runs in
// a detached tmux window of 200 x 60 on a private tmux server, and the pane
// is read until the frame in question is on it.
//
//   - first frame: from just before tmux starts heed (`heed FILE --at
//     decoder:L0:H0:q<mid>`, which opens on the Map of that head) until the
//     pane shows the status line of that head; the head's heat map is drawn
//     in the same frame (the TUI reads a head when it first draws it);
//   - head switch: from just before the key } (next head) is sent until the
//     status line shows the next head, for several heads in turn, while the
//     statistics still run behind the progress bar, and again once they
//     are done.
//
// Every tmux command (new-session, send-keys, capture-pane) goes through one
// control-mode client (tmux -C) that stays attached to a session of its own:
// no tmux process is started per key or per look at the pane, which would
// cost several milliseconds of processor each and compete with heed on a
// small machine. The pane is looked at about every millisecond, so the
// figures include up to about a millisecond of slack.
func tuiTiming(c config, file string, s shape) error {
	if _, err := exec.LookPath("tmux"); err != nil {
		return fmt.Errorf("no tmux: %w", err)
	}
	// A private server per call: the previous one may still be shutting down.
	sock := fmt.Sprintf("heedbench-%d-%d", os.Getpid(), s.layers)
	// A session that keeps the server up (its start-up is not timed) and
	// that the control client attaches to.
	if err := exec.Command("tmux", "-L", sock, "new-session", "-d", "-s", "keep", "-x", "200", "-y", "60", "sleep", "3600").Run(); err != nil {
		return fmt.Errorf("tmux: %w", err)
	}
	defer exec.Command("tmux", "-L", sock, "kill-server").Run()
	tm, err := newControl(sock, "keep")
	if err != nil {
		return err
	}
	defer tm.close()
	const switches = 5
	var first, sw, idle []time.Duration
	for r := 0; r < c.tuiRounds; r++ {
		name := fmt.Sprintf("r%d", r)
		at := fmt.Sprintf("decoder:L0:H0:q%d", s.seq/2)
		t0 := time.Now()
		if _, err := tm.run(fmt.Sprintf("new-session -d -s %s -x 200 -y 60 %s %s --at %s", name, quote(c.heed), quote(file), at)); err != nil {
			return fmt.Errorf("tmux new-session: %w", err)
		}
		// the status line shows the cursor's location (decoder:L0:H0:q...:k...)
		d, err := tm.waitPane(name, t0, "decoder:L0:H0:", 10*time.Second)
		if err != nil {
			tm.run("kill-session -t " + name)
			return fmt.Errorf("first frame: %w", err)
		}
		first = append(first, d)
		next := func(h int, into *[]time.Duration) error {
			t := time.Now()
			if _, err := tm.run("send-keys -t " + name + " " + quote("}")); err != nil {
				return err
			}
			d, err := tm.waitPane(name, t, fmt.Sprintf("decoder:L0:H%d:", h), 5*time.Second)
			if err != nil {
				tm.run("kill-session -t " + name)
				return fmt.Errorf("switch to head %d: %w", h, err)
			}
			*into = append(*into, d)
			return nil
		}
		for h := 1; h <= switches && h < s.heads; h++ {
			if err := next(h, &sw); err != nil {
				return err
			}
		}
		// Once the statistics are done, the same without them competing for the CPUs.
		if err := tm.waitGone(name, "statistics ", 120*time.Second); err == nil {
			for h := switches + 1; h <= 2*switches && h < s.heads; h++ {
				if err := next(h, &idle); err != nil {
					return err
				}
			}
		}
		tm.run("send-keys -t " + name + " q")
		time.Sleep(100 * time.Millisecond)
		tm.run("kill-session -t " + name)
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

// quote makes s one word for tmux's command parser.
func quote(s string) string { return "'" + strings.ReplaceAll(s, "'", `'\''`) + "'" }

// control is a tmux client in control mode (tmux(1), CONTROL MODE): it reads
// commands a line each on its standard input and answers each between a
// "%begin" and an "%end" (or "%error") line, with notifications ("%output",
// "%session-changed", ...) in between that are not answers.
type control struct {
	cmd *exec.Cmd
	in  io.WriteCloser
	out *bufio.Reader
}

func newControl(sock, session string) (*control, error) {
	cmd := exec.Command("tmux", "-L", sock, "-C", "attach-session", "-t", session)
	in, err := cmd.StdinPipe()
	if err != nil {
		return nil, err
	}
	out, err := cmd.StdoutPipe()
	if err != nil {
		return nil, err
	}
	if err := cmd.Start(); err != nil {
		return nil, fmt.Errorf("tmux -C: %w", err)
	}
	c := &control{cmd: cmd, in: in, out: bufio.NewReaderSize(out, 1<<16)}
	// the attach itself is answered first (a block whose flags are 0)
	if _, err := c.answer(); err != nil {
		c.close()
		return nil, fmt.Errorf("tmux -C: %w", err)
	}
	return c, nil
}

// answer reads up to the next %begin .. %end block and returns its lines.
func (c *control) answer() (string, error) {
	for {
		line, err := c.out.ReadString('\n')
		if err != nil {
			return "", err
		}
		if strings.HasPrefix(line, "%begin ") {
			break
		}
	}
	var b strings.Builder
	for {
		line, err := c.out.ReadString('\n')
		if err != nil {
			return "", err
		}
		switch {
		case strings.HasPrefix(line, "%end "):
			return b.String(), nil
		case strings.HasPrefix(line, "%error "):
			return "", errors.New(strings.TrimSpace(b.String()))
		}
		b.WriteString(line)
	}
}

// run sends one command and returns its answer.
func (c *control) run(command string) (string, error) {
	if _, err := io.WriteString(c.in, command+"\n"); err != nil {
		return "", err
	}
	return c.answer()
}

func (c *control) close() {
	c.in.Close()
	c.cmd.Wait()
}

// waitPane looks at the pane until its text contains want; it returns the
// time since t0.
func (c *control) waitPane(name string, t0 time.Time, want string, limit time.Duration) (time.Duration, error) {
	for {
		out, err := c.run("capture-pane -p -t " + name)
		if err == nil && strings.Contains(out, want) {
			return time.Since(t0), nil
		}
		if time.Since(t0) > limit {
			last := strings.TrimSpace(out)
			if i := strings.LastIndex(last, "\n"); i >= 0 {
				last = last[i+1:]
			}
			return 0, fmt.Errorf("%q not on the pane after %v (last line %q)", want, limit, last)
		}
		time.Sleep(time.Millisecond)
	}
}

// waitGone looks at the pane until its text no longer contains what.
func (c *control) waitGone(name, what string, limit time.Duration) error {
	t0 := time.Now()
	for time.Since(t0) < limit {
		out, err := c.run("capture-pane -p -t " + name)
		if err == nil && !strings.Contains(out, what) {
			return nil
		}
		time.Sleep(50 * time.Millisecond)
	}
	return fmt.Errorf("%q still on the pane after %v", what, limit)
}
