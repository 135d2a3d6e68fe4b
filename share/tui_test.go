package share

import (
	"context"
	"strings"
	"sync/atomic"
	"testing"

	tea "charm.land/bubbletea/v2"
	"github.com/heed-dev/heed/analysis"
	"github.com/heed-dev/heed/loader"
	"github.com/heed-dev/heed/tui"
)

// TestLoadTUI is TestLoad with heed's own TUI in every session, as heed share
// wires it: one export opened once and one statistics pass for all sessions
// (tui.Options.Export and Result), each guest following the presenter.
func TestLoadTUI(t *testing.T) {
	requireSSH(t)
	set, err := loader.OpenSet([]string{"../testdata/cases/shift_bad.npz"}, loader.NewOptions())
	if err != nil {
		t.Fatal(err)
	}
	ex, err := set.Open(0)
	if err != nil {
		t.Fatal(err)
	}
	defer ex.Close()
	p, err := analysis.AnalyzeSet(context.Background(), set.Len(), func(i int) (*loader.Export, string, error) {
		e, err := set.Open(i)
		return e, "shift_bad", err
	}, analysis.DefaultOptions())
	if err != nil {
		t.Fatal(err)
	}
	res := p.Result()
	var arrived atomic.Int64
	testLoad(t, func(hub *Hub) loadApp {
		return loadApp{
			app: func(g Guest) tea.Model {
				m, err := tui.New(set, tui.Options{Export: ex, Result: res, Context: g.Ctx, Background: "dark", At: hub.Location(),
					OnLocation: func(loc string) {
						if strings.HasPrefix(loc, "decoder:L1:H1:") { // the Location names the query too
							arrived.Add(1)
						}
					}})
				if err != nil {
					t.Errorf("tui.New: %v", err)
					return nil
				}
				context.AfterFunc(g.Ctx, func() { m.Close() })
				return NewFollower(g.Ctx, hub, m, func(loc string) tea.Msg { return tui.GotoMsg{Loc: loc} })
			},
			ready: "following the presenter (decoder:L0:H0)",
			moved: func(n int) bool { return arrived.Load() == int64(n) },
		}
	})
}
