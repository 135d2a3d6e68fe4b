package analysis

import (
	"context"
	"reflect"
	"runtime"
	"sync/atomic"
	"testing"

	"github.com/heed-dev/heed/loader"
)

// TestYieldHoldsThePass: Options.Yield is called while the pass runs, a
// Yield that blocks holds the pass until it returns, and the results are
// those of a pass without it.
func TestYieldHoldsThePass(t *testing.T) {
	ex, err := loader.Open([]string{"../testdata/fixtures/exports/causal.npz"}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	defer ex.Close()
	want, err := Analyze(context.Background(), ex, DefaultOptions())
	if err != nil {
		t.Fatal(err)
	}

	var calls atomic.Int64
	var released atomic.Bool
	release := make(chan struct{})
	opt := DefaultOptions()
	opt.Yield = func() {
		if calls.Add(1) == 1 {
			<-release // the first call blocks until the test lets go
		}
	}
	done := make(chan *Partial)
	go func() {
		p, err := Analyze(context.Background(), ex, opt)
		if err != nil {
			t.Error(err)
		}
		if !released.Load() {
			t.Error("the pass finished while Yield was blocking")
		}
		done <- p
	}()
	for calls.Load() == 0 {
		runtime.Gosched() // wait for the pass to reach its first Yield
	}
	released.Store(true)
	close(release)
	got := <-done
	if calls.Load() < 2 {
		t.Errorf("Yield called %d times", calls.Load())
	}
	if !reflect.DeepEqual(got, want) {
		t.Errorf("Yield changes the results")
	}
}
