package render

import (
	"fmt"
	"image"
	"io"
	"math"
	"strconv"

	"golang.org/x/image/font"
)

// Dot plots (Cleveland & McGill 1984, "Graphical perception: theory,
// experimentation, and application to the development of graphical
// methods"): one row per feature, a dot at its value on one shared axis,
// a thin stem from zero, the zero line drawn through every row. A positive
// value is a filled orange dot, a negative one an open purple ring, so the
// sign reads in greyscale too.

// Layout of dot and forest plots, in PNG pixels.
const (
	dotRowH   = 20  // height of a row
	dotPlotW  = 360 // width of a dot plot's axis
	dotRadius = 5.0 // radius of a dot
	stemW     = 2   // width of a stem
	// stemOpacity is how much of the mark's colour a stem lays over white:
	// a stem is lighter than its mark.
	stemOpacity = 0.55
	tickLen     = 5
)

// Column is one text column of a chart's label table.
type Column struct {
	// Header is the column's heading.
	Header string
	// Right aligns the column's cells on the right (numbers).
	Right bool
}

// DotRow is one row of a dot plot: its text cells, one per Column, and its
// value.
type DotRow struct {
	Cells []string
	Value float64
}

// DotChart is a dot plot: a label table on the left, the dots in the
// middle, each value printed on the right.
type DotChart struct {
	// Title and Notes are drawn above the chart, wrapped to its width.
	Title string
	Notes []string
	// Columns are the label table's columns; Rows the rows, top to bottom.
	Columns []Column
	Rows    []DotRow
	// Scale is the least extent of the axis (see Scale): an axis that
	// would span less is widened to it, each side in proportion, so that
	// values far below it show as small. 0 sets no floor.
	// ScaleNote says what it is.
	Scale     float64
	ScaleNote string
	// Axis is the axis's caption.
	Axis string
}

// axisRange is the span an axis shows: from min(0, min v) to max(0, max v),
// widened to at least scale, each side by its share of the span (all to
// the positive side when every value is 0).
func axisRange(values []float64, scale float64) (lo, hi float64) {
	for _, v := range values {
		lo, hi = math.Min(lo, v), math.Max(hi, v)
	}
	if span := hi - lo; span < scale {
		if span == 0 {
			hi = scale
		} else {
			lo, hi = lo*scale/span, hi*scale/span
		}
	}
	if hi == lo {
		hi = lo + 1
	}
	return lo, hi
}

// niceTicks returns the ticks of an axis over [lo, hi]: the multiples
// within it of a step of 1, 2 or 5 times a power of ten, about five of
// them: the span over four rounded to the nearest such number (Heckbert
// 1990, "Nice numbers for graph labels": a fraction f of its power of ten
// rounds to 1 below 1.5, 2 below 3, 5 below 7, else 10; from memory).
func niceTicks(lo, hi float64) []float64 {
	raw := (hi - lo) / 4
	p := math.Pow(10, math.Floor(math.Log10(raw)))
	step := 10 * p
	switch f := raw / p; {
	case f < 1.5:
		step = p
	case f < 3:
		step = 2 * p
	case f < 7:
		step = 5 * p
	}
	first, last := math.Ceil(lo/step-1e-9), math.Floor(hi/step+1e-9)
	ticks := make([]float64, 0, int(last-first)+1)
	for k := first; k <= last; k++ {
		// k·step to 12 significant digits: 3·0.2 is 0.6, not 0.6000000000000001.
		v, _ := strconv.ParseFloat(strconv.FormatFloat(k*step, 'g', 12, 64), 64)
		if math.Abs(v) < step*1e-9 {
			v = 0
		}
		ticks = append(ticks, v)
	}
	return ticks
}

// axis maps values in [lo, hi] to x pixels x0..x0+w.
type axis struct {
	x0, w  int
	lo, hi float64
	ticks  []float64
}

// axisPad is the share of the span an axis adds beyond a value's end
// that is not zero, so that no mark sits on the axis's edge.
const axisPad = 0.04

// newAxis returns the axis from x0, w pixels wide, that shows [lo, hi]
// (lo ≤ 0 ≤ hi), padded at the ends that are not zero.
func newAxis(x0, w int, lo, hi float64) axis {
	pad := axisPad * (hi - lo)
	if lo < 0 {
		lo -= pad
	}
	if hi > 0 {
		hi += pad
	}
	return axis{x0: x0, w: w, lo: lo, hi: hi, ticks: niceTicks(lo, hi)}
}

// x is the pixel column of value v.
func (a axis) x(v float64) float64 {
	return float64(a.x0) + (v-a.lo)/(a.hi-a.lo)*float64(a.w)
}

// draw draws the axis line at y with its ticks and their labels below.
func (a axis) draw(c *canvas, y int) {
	c.fill(image.Rect(a.x0, y, a.x0+a.w+1, y+1), colorAxis)
	for _, v := range a.ticks {
		x := int(math.Round(a.x(v)))
		c.fill(image.Rect(x, y, x+1, y+tickLen), colorAxis)
		c.text(tickLabel(v), x, y+tickLen+pngLine-4, 0.5, colorInk)
	}
}

// tickLabel writes a tick's value with a real minus sign.
func tickLabel(v float64) string {
	s := strconv.FormatFloat(v, 'g', 4, 64)
	if v < 0 {
		s = "−" + s[1:]
	}
	return s
}

// labelTable lays out the text columns of rows: each column's width and
// its x.
type labelTable struct {
	cols  []Column
	x, w  []int
	width int // of the whole table
}

func newLabelTable(face font.Face, cols []Column, cells [][]string) labelTable {
	t := labelTable{cols: cols, x: make([]int, len(cols)), w: make([]int, len(cols))}
	for k, col := range cols {
		t.w[k] = textWidth(face, col.Header)
		for _, row := range cells {
			if k < len(row) {
				t.w[k] = max(t.w[k], textWidth(face, cutLabel(row[k])))
			}
		}
	}
	x := pngMargin
	for k := range cols {
		t.x[k] = x
		x += t.w[k] + columnGap
	}
	t.width = x - pngMargin
	return t
}

// draw draws row cells (or the headers, for nil) with their baseline at y.
func (t labelTable) draw(c *canvas, cells []string, y int) {
	for k, col := range t.cols {
		s := col.Header
		if cells != nil {
			if k >= len(cells) {
				continue
			}
			s = cutLabel(cells[k])
		}
		if col.Right {
			c.text(s, t.x[k]+t.w[k], y, 1, colorInk)
		} else {
			c.text(s, t.x[k], y, 0, colorInk)
		}
	}
}

// mark draws the mark of a value at (x, y): a filled orange disc for a
// positive value, an open purple ring for a negative one, a small grey ring
// for zero.
func mark(c *canvas, x, y, v float64) {
	switch {
	case v > 0:
		c.disc(x, y, dotRadius, colorPositive)
	case v < 0:
		c.ring(x, y, dotRadius, 2, colorNegative)
	default:
		c.ring(x, y, 3, 1.5, colorMixed)
	}
}

// legend draws the marks' key at y from x, and returns the x after it.
func legend(c *canvas, x, y int, items []legendItem) int {
	for _, it := range items {
		it.draw(c, float64(x)+dotRadius, float64(y)-4)
		x += int(2*dotRadius) + 6
		c.text(it.text, x, y, 0, colorInk)
		x += textWidth(c.face, it.text) + 18
	}
	return x
}

// legendItem is a mark and what it means.
type legendItem struct {
	draw func(c *canvas, x, y float64)
	text string
}

var signLegend = []legendItem{
	{func(c *canvas, x, y float64) { mark(c, x, y, 1) }, "positive: raises the output"},
	{func(c *canvas, x, y float64) { mark(c, x, y, -1) }, "negative: lowers it"},
}

// dotLayout is where a dot plot's parts lie in the PNG.
type dotLayout struct {
	table         labelTable
	ax            axis
	lines, footer []string // the title and notes, the axis's caption
	texts         []string // the values as printed
	valueX        int      // right edge of the printed values
	top, rowsTop  int      // y of the column headings' line and of the first row
	axisY         int
	size          image.Point
	values        []float64
	cells         [][]string
}

// rowY is the y of the middle of row i.
func (l dotLayout) rowY(i int) int { return l.rowsTop + i*dotRowH + dotRowH/2 }

// layoutDots places the parts of chart, checking it.
func layoutDots(face font.Face, chart DotChart) (dotLayout, error) {
	var l dotLayout
	n := len(chart.Rows)
	if n == 0 || n > maxRows {
		return l, fmt.Errorf("png: dot plot of %d rows: expected 1 to %d", n, maxRows)
	}
	l.values = make([]float64, n)
	l.cells = make([][]string, n)
	for i, r := range chart.Rows {
		l.values[i], l.cells[i] = r.Value, r.Cells
	}
	if err := checkFiniteValues("png: dot value", l.values); err != nil {
		return l, err
	}
	if math.IsNaN(chart.Scale) || math.IsInf(chart.Scale, 0) || chart.Scale < 0 {
		return l, fmt.Errorf("png: dot plot scale %v: expected a finite number ≥ 0", chart.Scale)
	}
	l.table = newLabelTable(face, chart.Columns, l.cells)
	l.texts = make([]string, n)
	valueW := textWidth(face, "attribution")
	for i, v := range l.values {
		l.texts[i] = signed(v)
		valueW = max(valueW, textWidth(face, l.texts[i]))
	}
	lo, hi := axisRange(l.values, chart.Scale)
	l.ax = newAxis(pngMargin+l.table.width+dotRadius+8, dotPlotW, lo, hi)
	l.valueX = l.ax.x0 + l.ax.w + int(dotRadius) + 16 + valueW
	width := max(l.valueX+pngMargin, minTextWidth+2*pngMargin)
	l.lines = wrapText(face, append([]string{chart.Title}, chart.Notes...), width-2*pngMargin)
	footer := chart.Axis
	if chart.ScaleNote != "" {
		footer += fmt.Sprintf(" (the axis spans at least %s, %s)", Number(chart.Scale), chart.ScaleNote)
	}
	l.footer = wrapText(face, []string{footer}, width-2*pngMargin)
	l.top = pngMargin + len(l.lines)*pngLine + 8
	l.rowsTop = l.top + pngLine
	l.axisY = l.rowsTop + n*dotRowH + 4
	l.size = image.Pt(width, l.axisY+tickLen+pngLine+6+len(l.footer)*pngLine+pngLine+6+pngMargin)
	return l, nil
}

// Dots writes the dot plot of chart as a PNG.
func Dots(w io.Writer, chart DotChart) error {
	face, err := newFace()
	if err != nil {
		return err
	}
	defer face.Close()
	l, err := layoutDots(face, chart)
	if err != nil {
		return err
	}
	c := newCanvas(l.size.X, l.size.Y, face)
	c.writeLines(l.lines)
	l.table.draw(c, nil, l.top+pngLine-6)
	c.text("attribution", l.valueX, l.top+pngLine-6, 1, colorInk)
	for i := range l.values {
		y := l.rowY(i)
		guide(c, l.ax, y)
		l.table.draw(c, l.cells[i], y+5)
		c.text(l.texts[i], l.valueX, y+5, 1, colorInk)
	}
	zero := l.ax.x(0)
	zx := int(math.Round(zero))
	c.fill(image.Rect(zx, l.rowsTop-4, zx+1, l.axisY), colorAxis)
	for i, v := range l.values {
		y, x := l.rowY(i), l.ax.x(v)
		stem := colorPositive
		if v < 0 {
			stem = colorNegative
		}
		a, b := int(math.Round(math.Min(zero, x))), int(math.Round(math.Max(zero, x)))
		for px := a; px <= b; px++ {
			if px == zx {
				continue // the zero line stays whole
			}
			for dy := 0; dy < stemW; dy++ {
				c.blend(px, y-stemW/2+dy, stem, stemOpacity)
			}
		}
		mark(c, x, float64(y), v)
	}
	l.ax.draw(c, l.axisY)
	y := l.axisY + tickLen + pngLine + 6
	c.footer(l.footer, y, signLegend)
	return c.encode(w)
}

// footer draws the lines of a chart's caption from y down, then the key of
// its marks.
func (c *canvas) footer(lines []string, y int, items []legendItem) {
	for _, line := range lines {
		y += pngLine
		c.text(line, pngMargin, y-5, 0, colorInk)
	}
	legend(c, pngMargin, y+pngLine, items)
}

// guide draws a dotted line across the axis at y, leading the eye from a
// row's label to its mark.
func guide(c *canvas, ax axis, y int) {
	for x := ax.x0; x <= ax.x0+ax.w; x += 3 {
		c.img.SetRGBA(x, y, colorGuide)
	}
}
