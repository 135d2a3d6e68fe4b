package views

// Tabs draws the screen names on one line, the active one marked, and right
// (e.g. the file name) at the right end.
func Tabs(w int, names []string, active int, right string, st Styles) *Canvas {
	c := NewCanvas(w, 1)
	x := c.Text(0, 0, "heed ", st.Title, -1)
	for i, n := range names {
		style := st.Tab
		label := " " + n + " "
		if i == active {
			style = st.TabActive
			label = "[" + n + "]"
		}
		x += c.Text(x, 0, label, style, -1)
	}
	if right != "" {
		rw := StringWidth(right)
		room := w - x - 2
		if room > 3 {
			s := Ellipsize(right, room)
			c.Text(w-min(rw, room), 0, s, st.Faint, -1)
		}
	}
	return c
}

// Status draws the status bar: fields (block, layer, head, batch, cell...)
// from the left and msg (a notice, the copied location, progress) at the right.
func Status(w int, fields []Field, msg string, msgStyle Style, st Styles) *Canvas {
	c := NewCanvas(w, 1)
	c.Fill(0, 0, w, 1, ' ', st.Bar)
	x := 1
	for _, f := range fields {
		if x >= w {
			break
		}
		if f.Name != "" {
			x += c.Text(x, 0, f.Name+" ", st.BarDim, w-x)
		}
		x += c.Text(x, 0, f.Value, Style{FG: st.Bar.FG, BG: st.Bar.BG, Attr: Bold}, w-x)
		x += c.Text(x, 0, "  ", st.Bar, w-x)
	}
	if msg != "" {
		if msgStyle.BG == NoColour {
			msgStyle.BG = st.Bar.BG
		}
		room := w - x - 1
		if room > 3 {
			s := Ellipsize(msg, room)
			c.Text(w-1-StringWidth(s), 0, s, msgStyle, -1)
		}
	}
	return c
}
