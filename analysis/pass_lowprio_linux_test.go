package analysis

import (
	"context"
	"os"
	"reflect"
	"strconv"
	"strings"
	"sync"
	"testing"

	"github.com/heed-dev/heed/loader"
)

// threadNice reads the nice value of the calling thread from
// /proc/thread-self/stat (proc(5): field 19, counting from 1, the fields
// after the command name in parentheses starting at field 3).
func threadNice(t *testing.T) int {
	b, err := os.ReadFile("/proc/thread-self/stat")
	if err != nil {
		t.Skipf("no /proc/thread-self: %v", err)
	}
	s := string(b)
	f := strings.Fields(s[strings.LastIndexByte(s, ')')+1:])
	n, err := strconv.Atoi(f[19-3])
	if err != nil {
		t.Fatalf("stat %q: %v", s, err)
	}
	return n
}

// TestBackgroundWorkersNiced: with Options.Background every worker runs on
// a thread whose nice value is 19 (the lowest priority on Linux), without
// it on threads of the process's own; the pass's results are the same.
func TestBackgroundWorkersNiced(t *testing.T) {
	ws := []*worker{{}, {}}
	for _, bg := range []bool{false, true} {
		var mu sync.Mutex
		seen := map[int]bool{}
		err := parallel(context.Background(), ws, 8, bg, nil, func(w *worker, i int) error {
			n := threadNice(t)
			mu.Lock()
			seen[n] = true
			mu.Unlock()
			return nil
		})
		if err != nil {
			t.Fatal(err)
		}
		want := 19
		if !bg {
			want = threadNice(t) // the test's own thread: the process's priority
		}
		if len(seen) != 1 || !seen[want] {
			t.Errorf("Background=%v: workers ran at nice %v, want only %d", bg, seen, want)
		}
	}
	// the thread a Background worker lowered is not handed back to other goroutines
	if n := threadNice(t); n == 19 {
		t.Errorf("the test's goroutine runs on a lowered thread after the pass")
	}

	ex, err := loader.Open([]string{"../testdata/fixtures/exports/causal.npz"}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	defer ex.Close()
	var got [2]*Partial
	for i, bg := range []bool{false, true} {
		opt := DefaultOptions()
		opt.Background = bg
		if got[i], err = Analyze(context.Background(), ex, opt); err != nil {
			t.Fatal(err)
		}
	}
	if !reflect.DeepEqual(got[0], got[1]) {
		t.Errorf("Background changes the results")
	}
}
