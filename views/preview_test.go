package views

import (
	"fmt"
	"os"
	"testing"

	"github.com/charmbracelet/colorprofile"
)

func TestPreview(t *testing.T) {
	if os.Getenv("HEED_PREVIEW") == "" {
		t.Skip("set HEED_PREVIEW=1")
	}
	cm, _ := ColormapByName("iridescent")
	for _, p := range []colorprofile.Profile{colorprofile.TrueColor, colorprofile.ASCII} {
		st := NewStyles(p, true, cm)
		d := causalMap(16, 1, demoTokens)
		c, _ := RenderMap(d, 80, 22, MapOptions{CursorQ: 3, CursorK: 4}, st)
		fmt.Println(c.Render(p))
		d = causalMap(300, 0, nil)
		d.Weights[10*300+200] = 0.5
		c, _ = RenderMap(d, 80, 22, MapOptions{CursorQ: 3, CursorK: 4}, st)
		fmt.Println(c.Render(p))
	}
}
