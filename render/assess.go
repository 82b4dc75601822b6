package render

import (
	"bytes"
	"fmt"
	"image"
	"image/color"
	"io"
	"math"
	"slices"
	"strconv"
	"strings"
	"text/tabwriter"

	"github.com/apportion/apportion/fidelity"
)

// AssessTable writes the scores of rep as one table, methods × metrics,
// each a mean across samples with the half-width of its 95% interval,
// then the randomization test layer by layer and what each column means.
// title heads the table (the model and the samples).
func AssessTable(w io.Writer, rep *fidelity.Report, title string) error {
	var b bytes.Buffer
	if err := assessTable(&b, rep, title); err != nil {
		return err
	}
	// tabwriter pads the last cells; the lines end at their text.
	lines := strings.Split(b.String(), "\n")
	for i, l := range lines {
		lines[i] = strings.TrimRight(l, " ")
	}
	_, err := io.WriteString(w, strings.Join(lines, "\n"))
	return err
}

func assessTable(w io.Writer, rep *fidelity.Report, title string) error {
	has := map[fidelity.Metric]bool{}
	for _, m := range rep.Metrics {
		has[m] = true
	}
	st := rep.Settings
	fmt.Fprintln(w, title)
	fmt.Fprintf(w, "%s scored", Count(rep.Samples, "sample", "samples"))
	if n := len(rep.Skipped); n > 0 {
		fmt.Fprintf(w, ", %s skipped", Count(n, "sample", "samples"))
	}
	fmt.Fprintf(w, "; mean ± half-width of the 95%% interval across samples; seed %d\n\n", st.Seed)

	type column struct {
		head string
		cell func(s *fidelity.MethodScores) string
		rand func(r *fidelity.Random) string
	}
	var cols []column
	if has[fidelity.MetricDeletion] {
		cols = append(cols, column{"deletion ↓",
			func(s *fidelity.MethodScores) string {
				return meanPM(s.Deletion) + beyond(s.DeletionBeyondRandom, s.Deletion)
			},
			func(r *fidelity.Random) string { return meanPM(r.Deletion) }})
	}
	if has[fidelity.MetricInsertion] {
		cols = append(cols, column{"insertion ↑",
			func(s *fidelity.MethodScores) string {
				return meanPM(s.Insertion) + beyond(s.InsertionBeyondRandom, s.Insertion)
			},
			func(r *fidelity.Random) string { return meanPM(r.Insertion) }})
	}
	if has[fidelity.MetricInfidelity] {
		cols = append(cols,
			column{"infidelity, gaussian ↓", func(s *fidelity.MethodScores) string { return meanPM(s.InfidelityGaussian) }, nil},
			column{"infidelity, baseline ↓", func(s *fidelity.MethodScores) string { return meanPM(s.InfidelityBaseline) }, nil})
	}
	if has[fidelity.MetricSensitivity] {
		cols = append(cols, column{"max-sensitivity ↓", func(s *fidelity.MethodScores) string { return meanPM(s.Sensitivity) }, nil})
	}
	if len(rep.Layers) > 0 {
		cols = append(cols, column{"randomized ρ ↓", func(s *fidelity.MethodScores) string {
			if l := s.Last(); l != nil {
				return meanPM(l.Spearman)
			}
			return "—"
		}, nil})
	}
	if has[fidelity.MetricCompleteness] {
		cols = append(cols, column{"complete", func(s *fidelity.MethodScores) string {
			if s.Completeness == nil {
				return "—"
			}
			return fmt.Sprintf("%d of %d", s.Completeness.Passed, s.Completeness.Judged)
		}, nil})
	}
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	heads := []string{"method"}
	for _, c := range cols {
		heads = append(heads, c.head)
	}
	row := func(cells []string) {
		// The first column is left-aligned: pad it by hand.
		fmt.Fprintln(tw, strings.Join(cells, "\t")+"\t")
	}
	width := len([]rune("random order"))
	for _, s := range rep.Methods {
		width = max(width, len([]rune(s.Title)))
	}
	pad := func(s string) string { return s + strings.Repeat(" ", width-len([]rune(s))) }
	heads[0] = pad(heads[0])
	row(heads)
	for i := range rep.Methods {
		s := &rep.Methods[i]
		cells := []string{pad(s.Title)}
		for _, c := range cols {
			cells = append(cells, c.cell(s))
		}
		row(cells)
	}
	if rep.Random != nil {
		cells := []string{pad("random order")}
		for _, c := range cols {
			v := ""
			if c.rand != nil {
				v = c.rand(rep.Random)
			}
			cells = append(cells, v)
		}
		row(cells)
	}
	if err := tw.Flush(); err != nil {
		return err
	}

	if len(rep.Layers) > 0 {
		fmt.Fprintln(w)
		fmt.Fprintln(w, "Randomization: Spearman's ρ with the trained model's attributions, layers randomized from the output down")
		tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
		heads := []string{pad("method")}
		for d := 1; d <= len(rep.Layers); d++ {
			heads = append(heads, "to "+rep.Layers[len(rep.Layers)-d])
		}
		row(heads)
		for i := range rep.Methods {
			s := &rep.Methods[i]
			cells := []string{pad(s.Title)}
			for d := range rep.Layers {
				v := "—"
				if d < len(s.Randomization) {
					v = meanPM(s.Randomization[d].Spearman)
					if ss := s.Randomization[d].SSIM; ss != nil {
						v += fmt.Sprintf(" (SSIM %.2f)", ss.Mean)
					}
				}
				cells = append(cells, v)
			}
			row(cells)
		}
		if err := tw.Flush(); err != nil {
			return err
		}
	}

	fmt.Fprintln(w)
	var notes []string
	unit := "feature"
	if st.Grouped {
		unit = "group"
	}
	if has[fidelity.MetricDeletion] || has[fidelity.MetricInsertion] {
		notes = append(notes, fmt.Sprintf("deletion, insertion: area under the target output as %s are replaced by the baseline (deletion: lower is better) or put back into it (insertion: higher is better), most positive first, in %s; random order: %d random orders per sample; [k/n]: the samples whose area is below (deletion) or above (insertion) the central 95%% of their random orders'.",
			Count(st.Units, unit, unit+"s"), Count(st.Steps, "step", "steps"), st.RandomOrders))
	}
	if has[fidelity.MetricInfidelity] {
		notes = append(notes, fmt.Sprintf("infidelity: mean of (β·Iᵀa − (f(x) − f(x − I)))² over %d perturbations I, with the best factor β, divided by the mean of (f(x) − f(x − I))²: 0 when the attributions predict every change, 1 when no better than none; I Gaussian with σ = %g standard deviations of each feature, or a random half of the %ss replaced by the baseline.", st.Draws, st.Noise, unit))
	}
	if has[fidelity.MetricSensitivity] {
		notes = append(notes, fmt.Sprintf("max-sensitivity: the largest ‖a(y) − a(x)‖ / ‖a(x)‖ over %d points y within %g standard deviations of x (lower is steadier).", st.SensitivityDraws, st.Radius))
	}
	if len(rep.Layers) > 0 {
		notes = append(notes, "randomized ρ: rank correlation with the trained model's attributions once every layer is randomized; an explanation of the model should lose it (below 0.5; lower is better).")
	}
	if has[fidelity.MetricCompleteness] {
		notes = append(notes, "complete: samples whose completeness check passed, of those the method judges.")
	}
	for _, n := range notes {
		fmt.Fprintln(w, wrap(n, "  ", 100))
	}
	for _, s := range rep.Methods {
		if s.NotScored != "" {
			fmt.Fprintf(w, "%s not scored: %s.\n", s.Title, s.NotScored)
		}
		if s.Unrepeated != "" {
			fmt.Fprintf(w, "%s: no max-sensitivity or randomization: %s (-budget).\n", s.Title, s.Unrepeated)
		}
		if n := len(s.Failed); n > 0 {
			fmt.Fprintf(w, "%s failed on %s: sample %d: %s\n", s.Title, Count(n, "sample", "samples"), s.Failed[0].Index, s.Failed[0].Error)
		}
	}
	return nil
}

// meanPM writes an interval as mean ± half-width, "—" for none.
func meanPM(iv *fidelity.Interval) string {
	if iv == nil {
		return "—"
	}
	if iv.N < 2 {
		return num3(iv.Mean)
	}
	return num3(iv.Mean) + " ± " + num2(math.Max(iv.Hi-iv.Mean, iv.Mean-iv.Lo))
}

// beyond writes how many samples beat their random orders: " [3/5]".
func beyond(n int, iv *fidelity.Interval) string {
	if iv == nil {
		return ""
	}
	return fmt.Sprintf(" [%d/%d]", n, iv.N)
}

// num3 and num2 write v with three and two significant digits.
func num3(v float64) string {
	return strings.Replace(strconv.FormatFloat(v, 'g', 3, 64), "-", "−", 1)
}
func num2(v float64) string {
	return strings.Replace(strconv.FormatFloat(v, 'g', 2, 64), "-", "−", 1)
}

// Dark2 is ColorBrewer's 8-class qualitative Dark2 scheme (Harrower &
// Brewer 2003), checked against matplotlib's copy in
// TestDark2IsColorBrewers: the methods' lines in AssessPNG, each with a
// mark of its own so that they part in greyscale too.
var Dark2 = [8]color.RGBA{
	{0x1B, 0x9E, 0x77, 0xFF}, {0xD9, 0x5F, 0x02, 0xFF}, {0x75, 0x70, 0xB3, 0xFF}, {0xE7, 0x29, 0x8A, 0xFF},
	{0x66, 0xA6, 0x1E, 0xFF}, {0xE6, 0xAB, 0x02, 0xFF}, {0xA6, 0x76, 0x1D, 0xFF}, {0x66, 0x66, 0x66, 0xFF},
}

// Layout of AssessPNG, in PNG pixels.
const (
	assessPanelW = 300
	assessPanelH = 220
	assessGap    = 64 // between panels, room for the next panel's tick labels
	assessLeft   = 48 // left of the first panel, for its tick labels
	lineWidth    = 2.0
	markRadius   = 4.0
)

// methodMark draws method k's mark at (x, y).
func methodMark(c *canvas, k int, x, y float64) {
	col := Dark2[k%len(Dark2)]
	switch k % 4 {
	case 0:
		c.disc(x, y, markRadius, col)
	case 1:
		c.diamond(x, y, markRadius+1, col)
	case 2:
		c.shape(x, y, markRadius, func(dx, dy float64) bool { return math.Abs(dx) <= markRadius-0.5 && math.Abs(dy) <= markRadius-0.5 }, col)
	default:
		c.ring(x, y, markRadius, 1.6, col)
	}
}

// line draws a segment of width w from (x0, y0) to (x1, y1), each pixel
// covered by its distance to the segment; dashed lines draw every other
// 6 pixels.
func (c *canvas) line(x0, y0, x1, y1, w float64, col color.RGBA, dashed bool) {
	dx, dy := x1-x0, y1-y0
	l2 := dx*dx + dy*dy
	for y := int(math.Floor(math.Min(y0, y1) - w)); y <= int(math.Ceil(math.Max(y0, y1)+w)); y++ {
		for x := int(math.Floor(math.Min(x0, x1) - w)); x <= int(math.Ceil(math.Max(x0, x1)+w)); x++ {
			px, py := float64(x)+0.5, float64(y)+0.5
			t := 0.0
			if l2 > 0 {
				t = math.Max(0, math.Min(1, ((px-x0)*dx+(py-y0)*dy)/l2))
			}
			if dashed && int(t*math.Sqrt(l2)/6)%2 == 1 {
				continue
			}
			qx, qy := x0+t*dx-px, y0+t*dy-py
			cover := w/2 + 0.5 - math.Sqrt(qx*qx+qy*qy)
			c.blend(x, y, col, math.Min(1, cover))
		}
	}
}

// plotPanel is one chart of AssessPNG: a frame, its axes and lines.
type plotPanel struct {
	x0, y0         int // top left of the plot area
	xlo, xhi       float64
	ylo, yhi       float64
	title, xlabel  string
	xticks, yticks []float64
	xtickText      []string // labels of xticks when not numbers
}

func (p plotPanel) px(v float64) float64 {
	return float64(p.x0) + (v-p.xlo)/(p.xhi-p.xlo)*assessPanelW
}

func (p plotPanel) py(v float64) float64 {
	return float64(p.y0) + (p.yhi-v)/(p.yhi-p.ylo)*assessPanelH
}

// draw draws the frame, the grid, the ticks and the captions.
func (p plotPanel) draw(c *canvas) {
	r := image.Rect(p.x0, p.y0, p.x0+assessPanelW, p.y0+assessPanelH)
	for _, v := range p.yticks {
		y := int(math.Round(p.py(v)))
		for x := r.Min.X; x < r.Max.X; x += 3 {
			c.img.SetRGBA(x, y, colorGuide)
		}
		c.text(tickLabel(v), r.Min.X-6, y+5, 1, colorInk)
	}
	for i, v := range p.xticks {
		x := int(math.Round(p.px(v)))
		c.fill(image.Rect(x, r.Max.Y, x+1, r.Max.Y+tickLen), colorAxis)
		s := tickLabel(v)
		if p.xtickText != nil {
			s = p.xtickText[i]
		}
		c.text(s, x, r.Max.Y+tickLen+pngLine-4, 0.5, colorInk)
	}
	c.frame(r, colorFrame)
	c.text(p.title, r.Min.X, r.Min.Y-8, 0, colorInk)
	c.text(p.xlabel, (r.Min.X+r.Max.X)/2, r.Max.Y+tickLen+2*pngLine, 0.5, colorInk)
}

// curve draws ys over xs in panel p, with a mark every step points.
func (p plotPanel) curve(c *canvas, xs, ys []float64, k int, col color.RGBA, dashed bool, marks int) {
	for i := 1; i < len(xs); i++ {
		c.line(p.px(xs[i-1]), p.py(ys[i-1]), p.px(xs[i]), p.py(ys[i]), lineWidth, col, dashed)
	}
	if k < 0 {
		return
	}
	every := max(1, (len(xs)-1)/marks)
	for i := 0; i < len(xs); i += every {
		methodMark(c, k, p.px(xs[i]), p.py(ys[i]))
	}
}

// AssessPNG draws the mean deletion and insertion curves of each method
// beside the random orders', and the randomization test's rank
// correlation layer by layer with each step's 95% interval, as one PNG.
func AssessPNG(w io.Writer, rep *fidelity.Report, title string) error {
	face, err := newFace()
	if err != nil {
		return err
	}
	defer face.Close()
	var panels []plotPanel
	x := assessLeft + pngMargin
	lines := wrapText(face, []string{title, fmt.Sprintf("%s; seed %d", Count(rep.Samples, "sample", "samples"), rep.Settings.Seed)}, 3*assessPanelW)
	top := pngMargin + len(lines)*pngLine + pngLine + 10
	units := "features"
	if rep.Settings.Grouped {
		units = "groups"
	}
	var curveLo, curveHi float64 = 0, 0
	for _, s := range rep.Methods {
		for _, v := range append(slices.Clone(s.DeletionCurve), s.InsertionCurve...) {
			curveLo, curveHi = math.Min(curveLo, v), math.Max(curveHi, v)
		}
	}
	if rep.Random != nil {
		for _, v := range append(slices.Clone(rep.Random.DeletionCurve), rep.Random.InsertionCurve...) {
			curveLo, curveHi = math.Min(curveLo, v), math.Max(curveHi, v)
		}
	}
	if curveHi == curveLo {
		curveHi = curveLo + 1
	}
	pad := 0.04 * (curveHi - curveLo)
	yt := niceTicks(curveLo, curveHi)
	if rep.Fractions != nil {
		for _, kind := range []string{"deletion", "insertion"} {
			p := plotPanel{x0: x, y0: top, xlo: 0, xhi: 1, ylo: curveLo - pad, yhi: curveHi + pad,
				xticks: []float64{0, 0.25, 0.5, 0.75, 1}, yticks: yt}
			if kind == "deletion" {
				p.title, p.xlabel = "Deletion: target output (lower is better)", "share of "+units+" removed"
			} else {
				p.title, p.xlabel = "Insertion: target output (higher is better)", "share of "+units+" put back"
			}
			panels = append(panels, p)
			x += assessPanelW + assessGap
		}
	}
	var layers []string
	if len(rep.Layers) > 0 {
		layers = append(layers, "trained")
		for d := 1; d <= len(rep.Layers); d++ {
			layers = append(layers, rep.Layers[len(rep.Layers)-d])
		}
		ticks := make([]float64, len(layers))
		for i := range ticks {
			ticks[i] = float64(i)
		}
		panels = append(panels, plotPanel{x0: x, y0: top, xlo: -0.3, xhi: float64(len(layers)-1) + 0.3, ylo: -1.05, yhi: 1.05,
			title: "Randomization: Spearman's ρ (lower is better)", xlabel: "randomized from the output down to",
			xticks: ticks, xtickText: layers, yticks: []float64{-1, -0.5, 0, 0.5, 1}})
		x += assessPanelW + assessGap
	}
	if len(panels) == 0 {
		return fmt.Errorf("png: no curves to draw: the report has neither deletion, insertion nor randomization")
	}
	width := max(x-assessGap+pngMargin, minTextWidth)
	legendTop := top + assessPanelH + tickLen + 4*pngLine
	rows := (len(rep.Methods) + 3) / 4 // the random orders close the last row
	height := legendTop + rows*pngLine + pngLine + pngMargin
	c := newCanvas(width, height, face)
	c.writeLines(lines)
	for _, p := range panels {
		p.draw(c)
	}
	// Lighter than Dark2's own grey, the eighth method's colour.
	grey := colorFrame
	k := 0
	if rep.Fractions != nil {
		if rep.Random != nil {
			panels[0].curve(c, rep.Fractions, rep.Random.DeletionCurve, -1, grey, true, 8)
			panels[1].curve(c, rep.Fractions, rep.Random.InsertionCurve, -1, grey, true, 8)
		}
		for i, s := range rep.Methods {
			if s.DeletionCurve != nil {
				panels[0].curve(c, rep.Fractions, s.DeletionCurve, i, Dark2[i%len(Dark2)], false, 8)
			}
			if s.InsertionCurve != nil {
				panels[1].curve(c, rep.Fractions, s.InsertionCurve, i, Dark2[i%len(Dark2)], false, 8)
			}
		}
		k = 2
	}
	if layers != nil {
		p := panels[k]
		y := int(math.Round(p.py(0.5)))
		c.line(float64(p.x0), float64(y), float64(p.x0+assessPanelW), float64(y), 1, grey, true)
		c.text("0.5", p.x0+assessPanelW-4, y-4, 1, grey)
		n := len(rep.Methods)
		for i, s := range rep.Methods {
			if len(s.Randomization) == 0 {
				continue
			}
			// Methods side by side around each step, so that intervals do
			// not hide each other.
			off := (float64(i) - float64(n-1)/2) * 0.06
			xs, ys := []float64{off}, []float64{1}
			for d, st := range s.Randomization {
				if st.Spearman == nil {
					continue
				}
				xs, ys = append(xs, float64(d+1)+off), append(ys, st.Spearman.Mean)
				cx := p.px(float64(d+1) + off)
				c.line(cx, p.py(st.Spearman.Lo), cx, p.py(st.Spearman.Hi), 1.4, Dark2[i%len(Dark2)], false)
			}
			p.curve(c, xs, ys, i, Dark2[i%len(Dark2)], false, len(xs))
		}
	}
	// The key: each method's mark and colour, then the random orders.
	lx, ly := pngMargin, legendTop
	for i, s := range rep.Methods {
		if i > 0 && i%4 == 0 {
			lx, ly = pngMargin, ly+pngLine
		}
		c.line(float64(lx), float64(ly-5), float64(lx+22), float64(ly-5), lineWidth, Dark2[i%len(Dark2)], false)
		methodMark(c, i, float64(lx+11), float64(ly-5))
		c.text(s.Title, lx+28, ly, 0, colorInk)
		lx += 28 + textWidth(face, s.Title) + 24
	}
	if rep.Random != nil && rep.Fractions != nil {
		c.line(float64(lx), float64(ly-5), float64(lx+22), float64(ly-5), lineWidth, grey, true)
		c.text(fmt.Sprintf("mean of %d random orders", rep.Settings.RandomOrders), lx+28, ly, 0, colorInk)
	}
	if layers != nil {
		c.text("Randomization: bars are 95% intervals across samples; the trained model's attributions correlate 1 with themselves.", pngMargin, ly+pngLine, 0, colorInk)
	}
	return c.encode(w)
}
