package tui

import (
	"testing"

	tea "charm.land/bubbletea/v2"
	"github.com/charmbracelet/colorprofile"
	"github.com/heed-dev/heed/loader"
)

// benchModel opens a 2 layers x 4 heads x 1024 x 1024 export at 200x60.
func benchModel(b *testing.B) *Model {
	b.Helper()
	file := makeExportB(b, "big.npz", "--seq", "1024", "--layers", "2", "--heads", "4")
	set, err := loader.OpenSet([]string{file}, loader.NewOptions())
	if err != nil {
		b.Fatal(err)
	}
	m, err := New(set, Options{At: "decoder:L0:H0:q512", Background: "dark", Profile: colorprofile.TrueColor})
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(func() { m.Close() })
	m.Update(tea.WindowSizeMsg{Width: 200, Height: 60})
	return m
}

// BenchmarkHeadSwitch is one "next head" key on the Map at 200x60 of a
// 1024 x 1024 head, drawing included; the heads cycle through the cache.
func BenchmarkHeadSwitch(b *testing.B) {
	m := benchModel(b)
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		m.Update(tea.KeyPressMsg{Code: '}', Text: "}"})
		_ = m.View()
	}
}

// BenchmarkFirstFrame is New plus the first frame (the statistics are not
// started: Init is what the program calls next).
func BenchmarkFirstFrame(b *testing.B) {
	file := makeExportB(b, "big.npz", "--seq", "1024", "--layers", "2", "--heads", "4")
	set, err := loader.OpenSet([]string{file}, loader.NewOptions())
	if err != nil {
		b.Fatal(err)
	}
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		m, err := New(set, Options{At: "decoder:L0:H0:q512", Background: "dark", Profile: colorprofile.TrueColor})
		if err != nil {
			b.Fatal(err)
		}
		m.Update(tea.WindowSizeMsg{Width: 200, Height: 60})
		_ = m.View()
		m.Close()
	}
}

// BenchmarkHeadSwitchRead is "next head" on the Map at 200x60 of 2048 x 2048
// heads that are not in the cache (8 heads of 16 MB cycle through a 64 MB
// cache): reading the head, its colour scale, the rules of every row and
// the downsampled window, drawing included.
func BenchmarkHeadSwitchRead(b *testing.B) {
	file := makeExportB(b, "big2048.npz", "--seq", "2048", "--layers", "1", "--heads", "8")
	set, err := loader.OpenSet([]string{file}, loader.NewOptions())
	if err != nil {
		b.Fatal(err)
	}
	m, err := New(set, Options{At: "decoder:L0:H0:q1024", Background: "dark", Profile: colorprofile.TrueColor})
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(func() { m.Close() })
	m.Update(tea.WindowSizeMsg{Width: 200, Height: 60})
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		m.Update(tea.KeyPressMsg{Code: '}', Text: "}"})
		_ = m.View()
	}
}
