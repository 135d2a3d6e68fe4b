// Package views holds heed's pure renderers: each takes plain data, a size
// and a Styles value and returns a Canvas (a grid of cells, each a glyph with
// foreground and background colours and attributes) that can be turned into
// a terminal string (Canvas.String, Canvas.Render) or, by other packages, into
// a picture. views never touches the terminal, the clock or any global state,
// which is what makes every screen golden-testable.
//
// The screens are: Map (one head's query x key heat map), Survey (layers x
// heads grid of one statistic), Findings (mask-check findings and diagnosis),
// Trace (input tokens as bars of their share), Compare (difference map and
// the heads that changed most), plus the status line and legends.
package views
