package views

import (
	"fmt"
	"strconv"
)

// RowKey is one key in the row inspector.
type RowKey struct {
	Key    int
	Token  string
	Weight float32
	// Status is "allowed", "forbidden by <rule>" or "not judged".
	Status    string
	Forbidden bool
}

// RowData is the row inspector of the cursor's query.
type RowData struct {
	Query      int
	QueryToken string
	Position   int // the query's key position (its row plus the offset)
	Judged     bool
	Sum        float64
	Entropy    float64
	Forbidden  float64
	ForbidKeys int
	Keys       int
	Top        []RowKey
}

// RowPanel draws the row inspector in w x h.
func RowPanel(d *RowData, w, h int, st Styles) *Canvas {
	c := NewCanvas(w, h)
	title := "row q" + strconv.Itoa(d.Query)
	if d.QueryToken != "" {
		title += quoteTok(d.QueryToken)
	}
	if d.Position != d.Query {
		title += " at position " + strconv.Itoa(d.Position)
	}
	c.Text(0, 0, title, st.Title, w)
	y := 1
	line := func(s string, style Style) {
		for _, ln := range wrap(s, w) {
			if y < h {
				c.Text(0, y, ln, style, w)
			}
			y++
		}
	}
	if !d.Judged {
		line("a padding query row: not judged by the checks", st.Faint)
	}
	line(fmt.Sprintf("sum %s · entropy %s nats", FormatValue(d.Sum), FormatValue(d.Entropy)), st.Text)
	if d.ForbidKeys > 0 {
		line(fmt.Sprintf("forbidden mass %s on %d of %d keys", FormatValue(d.Forbidden), d.ForbidKeys, d.Keys), st.Bad)
	} else if d.Judged {
		line("no mass on forbidden keys", st.Good)
	}
	line("heaviest keys:", st.Faint)
	kw := 0
	for _, k := range d.Top {
		kw = max(kw, StringWidth("k"+strconv.Itoa(k.Key)+quoteTok(k.Token)))
	}
	kw = min(kw, max(8, w/2))
	for _, k := range d.Top {
		if y >= h {
			break
		}
		label := "k" + strconv.Itoa(k.Key) + quoteTok(k.Token)
		x := c.Text(0, y, padRight(label, kw), st.Label, w)
		x += c.Text(x, y, " "+padLeft(FormatWeight(k.Weight), 9)+" ", Style{Attr: Bold}, w-x)
		style := st.Faint
		if k.Forbidden {
			style = st.Bad
		}
		c.Text(x, y, k.Status, style, w-x)
		y++
	}
	return c
}
