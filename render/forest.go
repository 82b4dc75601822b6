package render

import (
	"fmt"
	"image"
	"io"
	"math"
	"unicode/utf8"

	"golang.org/x/image/font"

	"github.com/apportion/apportion/gradattr"
)

// Forest plots: one row per feature, a point estimate and its interval as a
// whisker with end caps; several groups as panels side by side on one
// shared axis (small multiples), each panel's rows in the same order.

// Layout of forest plots, in PNG pixels.
const (
	forestPanelW    = 200 // width of a panel's axis
	forestPanelGap  = 28  // between panels
	forestPerBand   = 4   // panels side by side; more wrap into a new band
	forestCap       = 6   // height of a whisker's end caps
	maxForestPanels = 60
)

// ForestPanel is one panel of a forest plot.
type ForestPanel struct {
	// Title heads the panel.
	Title string
	// Point, Lo and Hi hold each row's estimate and interval; NaN for a
	// row the panel has no value for.
	Point, Lo, Hi []float64
	// Sign marks each row's point: +1 a filled orange disc, −1 an open
	// purple ring, 0 a grey diamond.
	Sign []int
}

// ForestChart is a forest plot: labels on the left, then the panels.
type ForestChart struct {
	// Title and Notes are drawn above the chart, wrapped to its width.
	Title string
	Notes []string
	// Labels name the rows, top to bottom.
	Labels []string
	Panels []ForestPanel
	// Axis is the axis's caption; Legend explains the marks.
	Axis   string
	Legend []legendItem
}

// forestLayout is where a forest plot's parts lie in the PNG.
type forestLayout struct {
	table         labelTable
	cells         [][]string
	lo, hi        float64 // the span of every panel's axis
	perBand       int     // panels side by side
	bands         int
	lines, footer []string
	top, bandH    int // y of the first band, height of a band
	size          image.Point
}

// axis is the axis of panel k.
func (l forestLayout) axis(k int) axis {
	x := pngMargin + l.table.width + int(dotRadius) + 8 + (k%l.perBand)*(forestPanelW+forestPanelGap)
	return newAxis(x, forestPanelW, l.lo, l.hi)
}

// bandTop is the y of the top of band b.
func (l forestLayout) bandTop(b int) int { return l.top + b*l.bandH }

// rowY is the y of the middle of row i of panel k.
func (l forestLayout) rowY(k, i int) int {
	return l.bandTop(k/l.perBand) + 2*pngLine + i*dotRowH + dotRowH/2
}

// axisY is the y of the axis of band b.
func (l forestLayout) axisY(b int) int {
	return l.bandTop(b) + 2*pngLine + len(l.cells)*dotRowH + 4
}

// layoutForest places the parts of chart, checking it.
func layoutForest(face font.Face, chart ForestChart) (forestLayout, error) {
	var l forestLayout
	n, np := len(chart.Labels), len(chart.Panels)
	if n == 0 || n > maxRows {
		return l, fmt.Errorf("png: forest plot of %d rows: expected 1 to %d", n, maxRows)
	}
	if np == 0 || np > maxForestPanels {
		return l, fmt.Errorf("png: forest plot of %d panels: expected 1 to %d", np, maxForestPanels)
	}
	lo, hi := 0.0, 0.0
	for k, p := range chart.Panels {
		if len(p.Point) != n || len(p.Lo) != n || len(p.Hi) != n || len(p.Sign) != n {
			return l, fmt.Errorf("png: forest plot panel %d: expected %d points, intervals and signs, got %d, %d, %d and %d", k, n, len(p.Point), len(p.Lo), len(p.Hi), len(p.Sign))
		}
		for i := range p.Point {
			for _, v := range []float64{p.Point[i], p.Lo[i], p.Hi[i]} {
				if math.IsInf(v, 0) {
					return l, fmt.Errorf("png: forest plot panel %d, row %d: %v is not finite", k, i, v)
				}
				if !math.IsNaN(v) {
					lo, hi = math.Min(lo, v), math.Max(hi, v)
				}
			}
			if p.Lo[i] > p.Hi[i] {
				return l, fmt.Errorf("png: forest plot panel %d, row %d: interval [%v, %v] has lo > hi", k, i, p.Lo[i], p.Hi[i])
			}
		}
	}
	l.cells = make([][]string, n)
	for i, label := range chart.Labels {
		l.cells[i] = []string{label}
	}
	l.table = newLabelTable(face, []Column{{Header: "feature"}}, l.cells)
	l.lo, l.hi = axisRange([]float64{lo, hi}, 0)
	l.perBand = min(np, forestPerBand)
	l.bands = (np + l.perBand - 1) / l.perBand
	width := max(l.axis(l.perBand-1).x0+forestPanelW+int(dotRadius)+8+pngMargin, minTextWidth+2*pngMargin)
	l.lines = wrapText(face, append([]string{chart.Title}, chart.Notes...), width-2*pngMargin)
	l.footer = wrapText(face, []string{chart.Axis}, width-2*pngMargin)
	l.bandH = 2*pngLine + n*dotRowH + 4 + tickLen + pngLine + 12
	l.top = pngMargin + len(l.lines)*pngLine + 8
	l.size = image.Pt(width, l.top+l.bands*l.bandH+len(l.footer)*pngLine+pngLine+8+pngMargin)
	return l, nil
}

// Forest writes the forest plot of chart as a PNG.
func Forest(w io.Writer, chart ForestChart) error {
	face, err := newFace()
	if err != nil {
		return err
	}
	defer face.Close()
	l, err := layoutForest(face, chart)
	if err != nil {
		return err
	}
	c := newCanvas(l.size.X, l.size.Y, face)
	c.writeLines(l.lines)
	for b := 0; b < l.bands; b++ {
		rowsTop := l.bandTop(b) + 2*pngLine
		l.table.draw(c, nil, rowsTop-6)
		for i := range l.cells {
			l.table.draw(c, l.cells[i], rowsTop+i*dotRowH+dotRowH/2+5)
		}
	}
	for k, p := range chart.Panels {
		ax, b := l.axis(k), k/l.perBand
		title := p.Title
		for utf8.RuneCountInString(title) > 1 && textWidth(face, title) > forestPanelW+forestPanelGap/2 {
			r := []rune(title)
			title = string(r[:len(r)-2]) + "…"
		}
		c.text(title, ax.x0, l.bandTop(b)+pngLine-5, 0, colorInk)
		for i := range l.cells {
			guide(c, ax, l.rowY(k, i))
		}
		zx := int(math.Round(ax.x(0)))
		c.fill(image.Rect(zx, l.bandTop(b)+2*pngLine-4, zx+1, l.axisY(b)), colorAxis)
		for i := range l.cells {
			if math.IsNaN(p.Point[i]) {
				continue
			}
			y := l.rowY(k, i)
			if !math.IsNaN(p.Lo[i]) && !math.IsNaN(p.Hi[i]) {
				x0, x1 := int(math.Round(ax.x(p.Lo[i]))), int(math.Round(ax.x(p.Hi[i])))
				c.fill(image.Rect(x0, y, x1+1, y+1), colorInk)
				c.fill(image.Rect(x0, y-forestCap/2, x0+1, y+forestCap/2+1), colorInk)
				c.fill(image.Rect(x1, y-forestCap/2, x1+1, y+forestCap/2+1), colorInk)
			}
			signMark(c, ax.x(p.Point[i]), float64(y), p.Sign[i])
		}
		ax.draw(c, l.axisY(b))
	}
	y := l.bandTop(l.bands)
	c.footer(l.footer, y, chart.Legend)
	return c.encode(w)
}

// signMark draws the mark of a sign: +1 a filled orange disc, −1 an open
// purple ring, 0 a grey diamond.
func signMark(c *canvas, x, y float64, sign int) {
	switch {
	case sign > 0:
		c.disc(x, y, dotRadius, colorPositive)
	case sign < 0:
		c.ring(x, y, dotRadius, 2, colorNegative)
	default:
		c.diamond(x, y, dotRadius+1, colorMixed)
	}
}

// summaryLegend explains the marks of a summary's forest plot.
var summaryLegend = []legendItem{
	{func(c *canvas, x, y float64) { signMark(c, x, y, 1) }, "raises the output (mean signed attribution's interval above 0)"},
	{func(c *canvas, x, y float64) { signMark(c, x, y, -1) }, "lowers it (below 0)"},
	{func(c *canvas, x, y float64) { signMark(c, x, y, 0) }, "either (spans 0)"},
}

// SummaryPNG draws a summary as a forest plot of mean |attribution| with
// its bootstrap interval: over all rows, then one panel per group on the
// same axis, the features in the order of all rows' ranking (the 64 largest
// when there are more). Each point's mark tells the sign of the feature's
// mean signed attribution in that panel.
func SummaryPNG(w io.Writer, s *gradattr.Summary) error {
	chart, err := summaryChart(s)
	if err != nil {
		return err
	}
	return Forest(w, chart)
}

// summaryChart is the forest plot of summary s.
func summaryChart(s *gradattr.Summary) (ForestChart, error) {
	ranked := s.Overall().Ranked()
	if len(ranked) == 0 {
		return ForestChart{}, fmt.Errorf("no rows were summarised: nothing to draw")
	}
	groups := s.Groups()
	if 1+len(groups) > maxForestPanels {
		return ForestChart{}, fmt.Errorf("%d groups are more than a chart can show (%d); -format table, csv or json lists them all", len(groups), maxForestPanels-1)
	}
	o := s.Options()
	title := fmt.Sprintf("%s: mean |attribution| per feature, with 95%% bootstrap intervals (%d replicates)", o.Method.Title(), o.Bootstrap)
	var notes []string
	if len(ranked) > MaxFeatures {
		notes = append(notes, fmt.Sprintf("the %d features of largest mean |attribution| of %d, over all rows", MaxFeatures, len(ranked)))
		ranked = ranked[:MaxFeatures]
	}
	labels := make([]string, len(ranked))
	for i, f := range ranked {
		labels[i] = f.Feature
	}
	panel := func(title string, g gradattr.GroupStats) ForestPanel {
		p := ForestPanel{Title: fmt.Sprintf("%s (%s)", title, Count(g.Rows, "row", "rows"))}
		for _, f := range ranked {
			if g.Rows == 0 || f.Index >= len(g.Features) {
				p.Point, p.Lo, p.Hi, p.Sign = append(p.Point, math.NaN()), append(p.Lo, math.NaN()), append(p.Hi, math.NaN()), append(p.Sign, 0)
				continue
			}
			st := g.Features[f.Index]
			sign := 0
			switch {
			case st.MeanLo > 0:
				sign = 1
			case st.MeanHi < 0:
				sign = -1
			}
			p.Point, p.Lo, p.Hi, p.Sign = append(p.Point, st.MeanAbs), append(p.Lo, st.MeanAbsLo), append(p.Hi, st.MeanAbsHi), append(p.Sign, sign)
		}
		return p
	}
	panels := []ForestPanel{panel("all rows", s.Overall())}
	for _, g := range groups {
		panels = append(panels, panel(o.GroupBy+" = "+g.Name, g))
	}
	return ForestChart{Title: title, Notes: notes, Labels: labels, Panels: panels,
		Axis: "mean |attribution| over the rows, one axis for every panel", Legend: summaryLegend}, nil
}
