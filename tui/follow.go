package tui

import (
	"fmt"
	"math"
	"strconv"
	"strings"
)

// FollowState is what a guest of heed share needs to see what the
// presenter sees: the location (LOC, the cursor's cell included), the
// focused screen and the Map's zoom and origin, as one line:
//
//	decoder:L1:H2:B0:q5:k5 screen=2 scale=1:4 origin=0,0
//
// Screens are numbered as their tabs (1 Survey ... 5 Compare). The scale is
// the Map's as drawn, cells to pixels (1:4 = four cells a pixel side, 2:1 =
// a cell two pixels wide): a guest's terminal has another size, so the zoom
// step that gives the same scale differs.
func (m *Model) FollowState() string {
	l := m.screens[ScreenMap].(*mapScreen).layout
	scale := "fit"
	if l.Block > 0 {
		scale = fmt.Sprintf("%d:%d", min(l.MagX, l.MagY), l.Block)
	}
	return fmt.Sprintf("%s screen=%d scale=%s origin=%d,%d", m.LocationString(), m.active+1, scale, m.sel.Map.Q0, m.sel.Map.K0)
}

// FollowMsg moves the model to a FollowState (a plain LOC works too): the
// location, then the screen, zoom and origin when given.
type FollowMsg struct{ State string }

func (m *Model) follow(state string) error {
	f := strings.Fields(state)
	if len(f) == 0 {
		return nil
	}
	if err := m.gotoLoc(f[0], false); err != nil {
		return err
	}
	for _, kv := range f[1:] {
		k, v, _ := strings.Cut(kv, "=")
		switch k {
		case "screen":
			if i, err := strconv.Atoi(v); err == nil && i >= 1 && i <= len(m.screens) && (i-1 != ScreenCompare || m.hasCompare()) {
				m.switchTo(i - 1)
			}
		case "scale":
			a, b, _ := strings.Cut(v, ":")
			mag, e1 := strconv.Atoi(a)
			block, e2 := strconv.Atoi(b)
			if e1 == nil && e2 == nil && mag > 0 && block > 0 {
				m.sel.Map.Zoom = m.zoomForScale(mag, block)
			}
		case "origin":
			a, b, _ := strings.Cut(v, ",")
			q0, e1 := strconv.Atoi(a)
			k0, e2 := strconv.Atoi(b)
			if e1 == nil && e2 == nil && q0 >= 0 && k0 >= 0 {
				m.sel.Map.Q0, m.sel.Map.K0 = q0, k0
			}
		}
	}
	return nil
}

// zoomForScale is the zoom step at which this terminal draws the Map at mag
// pixels a cell and block cells a pixel, or the nearest.
func (m *Model) zoomForScale(mag, block int) int {
	md, err := m.mapData(&m.screens[ScreenMap].(*mapScreen).memo)
	if err != nil {
		return m.sel.Map.Zoom
	}
	want := math.Log(float64(mag) / float64(block))
	best, bestD := 0, math.Inf(1)
	for z, l := range m.zoomLayouts(md) {
		if d := math.Abs(math.Log(float64(min(l.MagX, l.MagY))/float64(l.Block)) - want); d < bestD-1e-9 {
			best, bestD = z, d
		}
	}
	return best
}
