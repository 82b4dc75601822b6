package render

import (
	"fmt"
	"image"
	"image/color"
	"image/draw"
	"image/png"
	"io"
	"math"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"unicode/utf8"

	"golang.org/x/image/font"
	"golang.org/x/image/font/gofont/goregular"
	"golang.org/x/image/font/opentype"
	"golang.org/x/image/math/fixed"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
)

// PNG output: heatmaps for image-shaped samples, signed bar charts for the
// rest. Both use the diverging colour map of colormap.go.

// Limits on what one PNG may show, so that a wrong shape cannot ask for a
// gigapixel image.
const (
	// maxHeatSide is the largest height or width of a heatmap's input.
	maxHeatSide = 2048
	// maxHeatPixels is the largest height·width of a heatmap's input.
	maxHeatPixels = 1 << 20
	// minHeatPanel is the smallest side, in PNG pixels, of the longer side
	// of a heatmap panel: inputs are upscaled by a whole factor to reach it.
	minHeatPanel = 256
	// maxBars is the largest number of bars of one chart.
	maxBars = 256
	// maxLabelRunes is the longest bar label drawn; longer ones are cut.
	maxLabelRunes = 48
)

// Layout constants, in PNG pixels.
const (
	pngMargin    = 14
	pngLine      = 18 // height of a line of text
	heatGap      = 18 // between the two panels
	colorBarGap  = 12 // between the attribution panel and the colour bar
	colorBarW    = 18
	barRowH      = 22
	barThickness = 14
	barHalfW     = 200 // length of a bar of |v| = scale
	whiskerCap   = 10
)

var (
	fontOnce sync.Once
	fontData *opentype.Font
	fontErr  error
)

// newFace returns a fresh Go Regular face (faces cache glyphs and are not
// safe for concurrent use, so each image gets its own).
func newFace() (font.Face, error) {
	fontOnce.Do(func() { fontData, fontErr = opentype.Parse(goregular.TTF) })
	if fontErr != nil {
		return nil, fmt.Errorf("png: parsing the Go Regular font: %w", fontErr)
	}
	return opentype.NewFace(fontData, &opentype.FaceOptions{Size: 13, DPI: 72, Hinting: font.HintingFull})
}

// canvas is an RGBA image with a face to write on it.
type canvas struct {
	img  *image.RGBA
	face font.Face
}

func newCanvas(w, h int, face font.Face) *canvas {
	img := image.NewRGBA(image.Rect(0, 0, w, h))
	draw.Draw(img, img.Bounds(), image.NewUniform(colorWhite), image.Point{}, draw.Src)
	return &canvas{img: img, face: face}
}

// text draws s with its baseline at y, starting at x (align 0), ending at x
// (align 1) or centred on x (align 0.5).
func (c *canvas) text(s string, x, y int, align float64, col color.Color) {
	d := &font.Drawer{Dst: c.img, Src: image.NewUniform(col), Face: c.face}
	w := d.MeasureString(s).Ceil()
	d.Dot = fixed.P(x-int(math.Round(align*float64(w))), y)
	d.DrawString(s)
}

func (c *canvas) fill(r image.Rectangle, col color.Color) {
	draw.Draw(c.img, r, image.NewUniform(col), image.Point{}, draw.Src)
}

// frame draws a one-pixel outline just outside r.
func (c *canvas) frame(r image.Rectangle, col color.Color) {
	r = r.Inset(-1)
	c.fill(image.Rect(r.Min.X, r.Min.Y, r.Max.X, r.Min.Y+1), col)
	c.fill(image.Rect(r.Min.X, r.Max.Y-1, r.Max.X, r.Max.Y), col)
	c.fill(image.Rect(r.Min.X, r.Min.Y, r.Min.X+1, r.Max.Y), col)
	c.fill(image.Rect(r.Max.X-1, r.Min.Y, r.Max.X, r.Max.Y), col)
}

func textWidth(face font.Face, s string) int {
	return font.MeasureString(face, s).Ceil()
}

func (c *canvas) encode(w io.Writer) error {
	if err := png.Encode(w, c.img); err != nil {
		return fmt.Errorf("png: encoding: %w", err)
	}
	return nil
}

// heatLayout is where a heatmap's parts lie in the PNG.
type heatLayout struct {
	scale    int             // upscaling factor of the input
	input    image.Rectangle // the grey input
	attr     image.Rectangle // the attribution over the grey input
	colorBar image.Rectangle // the colour bar, +s at the top, −s at the bottom
	size     image.Point     // the whole image
	labelW   int             // room for the colour bar's labels
}

// layoutHeatmap places a heatmap of an height×width input under lines of
// title text; labelW is the width of the widest colour bar label.
func layoutHeatmap(height, width, lines, labelW int) heatLayout {
	k := max(1, (minHeatPanel+max(height, width)-1)/max(height, width))
	pw, ph := width*k, height*k
	top := pngMargin + lines*pngLine + pngLine // the title lines, then the panel captions
	l := heatLayout{scale: k, labelW: labelW}
	l.input = image.Rect(pngMargin, top, pngMargin+pw, top+ph)
	l.attr = l.input.Add(image.Pt(pw+heatGap, 0))
	barH := max(ph, 128)
	l.colorBar = image.Rect(l.attr.Max.X+colorBarGap, top, l.attr.Max.X+colorBarGap+colorBarW, top+barH)
	l.size = image.Pt(l.colorBar.Max.X+6+labelW+pngMargin, top+max(ph, barH)+pngLine+pngMargin)
	return l
}

// colorBarT is the colour map coordinate of row y (0 at the top) of a
// colour bar of h rows: t = 1 − 2y/(h − 1), so the top row is +1 and the
// bottom row −1.
func colorBarT(y, h int) float64 {
	if h < 2 {
		return 0
	}
	return 1 - 2*float64(y)/float64(h-1)
}

// Heatmap writes a PNG of an image-shaped sample and its attributions:
// on the left the input img (height×width values, row-major) in grey, on the
// right the attributions attr (same layout) blended over the same grey with
// the diverging colour map (see overlay, divergingT and heatScale: t =
// clamp(a/s, −1, 1), s the 99th percentile of |a|), and a colour bar from −s
// (blue, bottom) through 0 (white) to +s (red, top) labelled with its scale.
// Both panels are upscaled by the same whole factor, nearest neighbour, so
// that the longer side is at least 256 pixels. The title and each note are
// drawn as lines of text above the panels.
func Heatmap(w io.Writer, title string, img []float64, height, width int, attr []float64, notes ...string) error {
	if height < 1 || width < 1 || height > maxHeatSide || width > maxHeatSide || height*width > maxHeatPixels {
		return fmt.Errorf("png: heatmap of %d×%d pixels: expected 1 to %d pixels a side and at most %d in all", height, width, maxHeatSide, maxHeatPixels)
	}
	n := height * width
	if len(img) != n || len(attr) != n {
		return fmt.Errorf("png: heatmap of %d×%d pixels: expected %d image values and %d attributions, got %d and %d", height, width, n, n, len(img), len(attr))
	}
	if err := checkFiniteValues("png: image", img); err != nil {
		return err
	}
	if err := checkFiniteValues("png: attribution", attr); err != nil {
		return err
	}
	face, err := newFace()
	if err != nil {
		return err
	}
	defer face.Close()

	s := heatScale(attr)
	top, mid, bottom := "+"+Number(s), "0", "−"+Number(s)
	labelW := max(textWidth(face, top), textWidth(face, bottom))
	lines := append([]string{title}, notes...)
	l := layoutHeatmap(height, width, len(lines), labelW)
	caption := "scale s = 99th percentile of |attribution|"
	l.size.X = max(l.size.X, pngMargin+textWidth(face, caption)+pngMargin)
	for _, line := range lines {
		l.size.X = max(l.size.X, pngMargin+textWidth(face, line)+pngMargin)
	}
	c := newCanvas(l.size.X, l.size.Y, face)
	for i, line := range lines {
		c.text(line, pngMargin, pngMargin+(i+1)*pngLine-5, 0, colorInk)
	}
	c.text("input", l.input.Min.X, l.input.Min.Y-5, 0, colorInk)
	c.text("attribution (red +, blue −)", l.attr.Min.X, l.attr.Min.Y-5, 0, colorInk)

	lo, hi := math.Inf(1), math.Inf(-1)
	for _, v := range img {
		lo, hi = math.Min(lo, v), math.Max(hi, v)
	}
	k := l.scale
	for i := 0; i < height; i++ {
		for j := 0; j < width; j++ {
			g := grey(img[i*width+j], lo, hi)
			cell := image.Rect(j*k, i*k, (j+1)*k, (i+1)*k)
			c.fill(cell.Add(l.input.Min), g)
			c.fill(cell.Add(l.attr.Min), overlay(g, divergingT(attr[i*width+j], s)))
		}
	}
	c.frame(l.input, colorFrame)
	c.frame(l.attr, colorFrame)

	bh := l.colorBar.Dy()
	for y := 0; y < bh; y++ {
		row := image.Rect(l.colorBar.Min.X, l.colorBar.Min.Y+y, l.colorBar.Max.X, l.colorBar.Min.Y+y+1)
		c.fill(row, overlay(colorWhite, colorBarT(y, bh)))
	}
	c.frame(l.colorBar, colorFrame)
	lx := l.colorBar.Max.X + 6
	c.text(top, lx, l.colorBar.Min.Y+10, 0, colorInk)
	c.text(mid, lx, l.colorBar.Min.Y+bh/2+5, 0, colorInk)
	c.text(bottom, lx, l.colorBar.Max.Y, 0, colorInk)
	c.text(caption, pngMargin, l.size.Y-pngMargin, 0, colorInk)
	return c.encode(w)
}

// barLayout is where a bar chart's parts lie in the PNG.
type barLayout struct {
	labelW int  // width of the label column
	left   bool // whether the axis has a negative half
	zeroX  int  // x of the zero axis
	top    int  // y of the top of the first row
	scale  float64
	size   image.Point
}

// layoutBars places a bar chart under the given lines of text; it returns
// the labels as drawn and the value texts.
func layoutBars(face font.Face, lines, labels []string, values, lo, hi []float64) (l barLayout, cut, texts []string) {
	n := len(values)
	cut = make([]string, n)
	texts = make([]string, n)
	l.scale = barScale(values, lo, hi)
	valueW := 0
	for i := range values {
		cut[i] = cutLabel(labels[i])
		l.labelW = max(l.labelW, textWidth(face, cut[i]))
		texts[i] = signed(values[i])
		if lo != nil && !math.IsNaN(lo[i]) && !math.IsNaN(hi[i]) {
			texts[i] += "  [" + Number(lo[i]) + ", " + Number(hi[i]) + "]"
		}
		valueW = max(valueW, textWidth(face, texts[i]))
	}
	// A chart with no negative value or interval end draws the positive
	// half of the axis only.
	for _, set := range [][]float64{values, lo} {
		for _, v := range set {
			l.left = l.left || v < 0
		}
	}
	l.zeroX = pngMargin + l.labelW + 10
	if l.left {
		l.zeroX += barHalfW
	}
	l.top = pngMargin + len(lines)*pngLine + 6
	valueX := l.zeroX + barHalfW + 10
	l.size = image.Pt(valueX+valueW+pngMargin, l.top+n*barRowH+pngLine+8+pngMargin)
	for _, line := range lines {
		l.size.X = max(l.size.X, pngMargin+textWidth(face, line)+pngMargin)
	}
	return l, cut, texts
}

// rowCenter is the y of the middle of row i.
func (l barLayout) rowCenter(i int) int { return l.top + i*barRowH + barRowH/2 }

// xOf is the x of value v on the bar axis.
func (l barLayout) xOf(v float64) int {
	return l.zeroX + int(math.Round(math.Max(-1, math.Min(1, v/l.scale))*barHalfW))
}

func cutLabel(s string) string {
	if utf8.RuneCountInString(s) <= maxLabelRunes {
		return s
	}
	r := []rune(s)
	return string(r[:maxLabelRunes-1]) + "…"
}

// barScale is the half-length of the bar axis: the largest |value| or
// interval end (NaN ends are skipped), 1 when all are zero.
func barScale(values, lo, hi []float64) float64 {
	m := 0.0
	for _, set := range [][]float64{values, lo, hi} {
		for _, v := range set {
			if !math.IsNaN(v) && !math.IsInf(v, 0) {
				m = math.Max(m, math.Abs(v))
			}
		}
	}
	if m == 0 {
		return 1
	}
	return m
}

// Bars writes a horizontal signed bar chart: one row per label, a bar
// from the zero axis to values[i], to the right in red for a positive value
// and to the left in blue for a negative one (the ends of the heatmap's
// colour map), the label on the left and the value printed on the right.
// All bars share one linear scale whose half-width is the largest |value|
// (or interval end); without negative values or interval ends the axis
// shows its positive half only. lo and hi, when not nil, hold an interval
// per bar drawn as a whisker with end caps, and printed after the value; an
// interval with a NaN end is not drawn. The title and the notes are drawn
// above the chart.
func Bars(w io.Writer, title string, notes, labels []string, values, lo, hi []float64) error {
	n := len(values)
	if n == 0 || n > maxBars {
		return fmt.Errorf("png: bar chart of %d values: expected 1 to %d", n, maxBars)
	}
	if len(labels) != n {
		return fmt.Errorf("png: bar chart: expected %d labels, one per value, got %d", n, len(labels))
	}
	if (lo == nil) != (hi == nil) || (lo != nil && (len(lo) != n || len(hi) != n)) {
		return fmt.Errorf("png: bar chart of %d values: expected lo and hi both nil or both of length %d, got lengths %d and %d", n, n, len(lo), len(hi))
	}
	if err := checkFiniteValues("png: bar value", values); err != nil {
		return err
	}
	for i := range lo {
		if math.IsInf(lo[i], 0) || math.IsInf(hi[i], 0) {
			return fmt.Errorf("png: bar %d: interval [%v, %v] is not finite", i, lo[i], hi[i])
		}
		if lo[i] > hi[i] {
			return fmt.Errorf("png: bar %d: interval [%v, %v] has lo > hi", i, lo[i], hi[i])
		}
	}
	face, err := newFace()
	if err != nil {
		return err
	}
	defer face.Close()

	lines := append([]string{title}, notes...)
	l, cut, texts := layoutBars(face, lines, labels, values, lo, hi)
	valueX := l.zeroX + barHalfW + 10
	c := newCanvas(l.size.X, l.size.Y, face)
	for i, line := range lines {
		c.text(line, pngMargin, pngMargin+(i+1)*pngLine-5, 0, colorInk)
	}
	for i, v := range values {
		y := l.rowCenter(i)
		c.text(cut[i], pngMargin+l.labelW, y+5, 1, colorInk)
		x := l.xOf(v)
		switch {
		case v > 0:
			c.fill(image.Rect(l.zeroX+1, y-barThickness/2, max(x, l.zeroX+2), y+barThickness/2), colorPositive)
		case v < 0:
			c.fill(image.Rect(min(x, l.zeroX-1), y-barThickness/2, l.zeroX, y+barThickness/2), colorNegative)
		}
		c.text(texts[i], valueX, y+5, 0, colorInk)
	}
	bottom := l.top + n*barRowH
	c.fill(image.Rect(l.zeroX, l.top-4, l.zeroX+1, bottom+4), colorAxis)
	for i := range lo {
		if math.IsNaN(lo[i]) || math.IsNaN(hi[i]) {
			continue
		}
		y := l.rowCenter(i)
		x0, x1 := l.xOf(lo[i]), l.xOf(hi[i])
		c.fill(image.Rect(x0, y, x1+1, y+1), colorInk)
		c.fill(image.Rect(x0, y-whiskerCap/2, x0+1, y+whiskerCap/2+1), colorInk)
		c.fill(image.Rect(x1, y-whiskerCap/2, x1+1, y+whiskerCap/2+1), colorInk)
	}
	// The axis ticks: −scale (when the axis has a negative half), 0, +scale.
	ticks := []int{l.zeroX, l.zeroX + barHalfW}
	if l.left {
		ticks = append(ticks, l.zeroX-barHalfW)
	}
	c.fill(image.Rect(min(ticks[0], ticks[len(ticks)-1]), bottom+4, l.zeroX+barHalfW+1, bottom+5), colorAxis)
	for _, x := range ticks {
		c.fill(image.Rect(x, bottom+4, x+1, bottom+9), colorAxis)
	}
	ty := bottom + 9 + pngLine - 4
	if l.left {
		c.text("−"+Number(l.scale), l.zeroX-barHalfW, ty, 0.5, colorInk)
	}
	c.text("0", l.zeroX, ty, 0.5, colorInk)
	c.text("+"+Number(l.scale), l.zeroX+barHalfW, ty, 0.5, colorInk)
	return c.encode(w)
}

// imageShape tells whether a sample of the given shape is drawn as an
// image: (H, W), (1, H, W) or (C, H, W) with C ≤ 3, H and W at least 2.
func imageShape(shape []int) (channels, height, width int, ok bool) {
	switch len(shape) {
	case 2:
		channels, height, width = 1, shape[0], shape[1]
	case 3:
		channels, height, width = shape[0], shape[1], shape[2]
	default:
		return 0, 0, 0, false
	}
	return channels, height, width, channels >= 1 && channels <= 3 && height >= 2 && width >= 2
}

// PNGPath is the file the PNG of sample i of n goes to: out itself for one
// sample, otherwise out with _i before its extension (heat.png → heat_0.png).
func PNGPath(out string, i, n int) string {
	if n == 1 {
		return out
	}
	ext := filepath.Ext(out)
	return strings.TrimSuffix(out, ext) + "_" + strconv.Itoa(i) + ext
}

// PNG draws one explained sample: a heatmap for an image-shaped sample
// ((H,W), (1,H,W), or (C,H,W) with C ≤ 3, attributions summed over
// channels), a bar chart of the 64 largest |attribution| otherwise, and a
// bar chart of the group sums when the settings have groups.
func PNG(w io.Writer, rep *explain.Report, e explain.Explanation, opt Options) error {
	r := e.Result
	target := strconv.Itoa(r.Target)
	if classes := rep.Model.Meta.Classes; r.Target >= 0 && r.Target < len(classes) {
		target += " (" + classes[r.Target] + ")"
	}
	m := rep.Settings.Method
	method := m.Title()
	if m.Reads(gradattr.ParamBaseline) {
		method += " (baseline " + baselineTitle(rep) + ")"
	}
	title := fmt.Sprintf("%s, sample %d: %s of output %s[%s]", rep.Model.Name, e.Index, method, rep.Output, target)
	if rep.Settings.Logits {
		title = fmt.Sprintf("%s, sample %d: %s of the logits of output %s[%s]", rep.Model.Name, e.Index, method, rep.Output, target)
	}
	notes := []string{"output " + Number(r.Output)}
	if cp := r.Completeness; cp != nil {
		notes[0] += ", baseline output " + Number(r.BaselineOutput)
		verdict := ""
		if cp.Judged {
			verdict = " (ok)"
			if !cp.OK {
				verdict = " (NOT ok: above the tolerance " + Number(cp.Tolerance) + ")"
			}
		}
		notes = append(notes, fmt.Sprintf("completeness: sum %s, expected %s, relative gap %s%s",
			Number(cp.Sum), Number(cp.Expected), Number(cp.RelativeGap), verdict))
	}
	for _, wn := range e.Warnings {
		notes = append(notes, "warning: "+wn.Message+opt.suggestion(wn))
	}
	if g := e.Grouped; g != nil {
		return Bars(w, title, notes, g.Names, g.Attributions, nil, nil)
	}
	if ch, h, wd, ok := imageShape(rep.Batch.SampleShape()); ok && len(r.Attributions) == ch*h*wd {
		img := make([]float64, h*wd)
		attr := make([]float64, h*wd)
		for k := 0; k < ch; k++ {
			for i := range img {
				img[i] += e.Values[k*h*wd+i] / float64(ch)
				attr[i] += r.Attributions[k*h*wd+i]
			}
		}
		if ch > 1 {
			notes = append(notes, fmt.Sprintf("%d channels: the input's mean in grey, the attributions summed over channels", ch))
		}
		return Heatmap(w, title, img, h, wd, attr, notes...)
	}
	labels := rep.Labels()
	order, hidden := opt.selection(r.Attributions)
	if hidden > 0 {
		notes = append(notes, opt.hiddenNote(hidden, len(r.Attributions)))
	}
	names := make([]string, len(order))
	vals := make([]float64, len(order))
	for k, i := range order {
		names[k] = strconv.Itoa(i)
		if i < len(labels) {
			names[k] = labels[i]
		}
		if i < len(e.Values) {
			names[k] += " = " + Number(e.Values[i])
		}
		vals[k] = r.Attributions[i]
	}
	return Bars(w, title, notes, names, vals, nil, nil)
}

// baselineTitle names the baseline in a figure title: zero, blur (blur:S
// for another σ), the mean of the reference set or of the input, or the
// file of baseline samples.
func baselineTitle(rep *explain.Report) string {
	g := func(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }
	switch b := rep.Settings.Baseline; b.Kind {
	case gradattr.BaselineMean, gradattr.BaselineMedian:
		if ref := rep.Settings.Reference; ref != nil {
			name := ref.Name
			if ref.Batch != nil {
				name = ref.Batch.Name // the file's own name, without a "demo:" label
			}
			return string(b.Kind) + " of " + filepath.Base(name)
		}
		return string(b.Kind) + " of the input"
	case gradattr.BaselineConstant:
		return "constant " + g(b.Value)
	case gradattr.BaselineUniform:
		return "uniform noise in [" + g(b.Lo) + ", " + g(b.Hi) + ")"
	case gradattr.BaselineBlur:
		if b.Sigma != explain.DefaultBlurSigma {
			return "blur:" + g(b.Sigma)
		}
		return "blur"
	case gradattr.BaselineValues:
		return filepath.Base(b.Samples.Name)
	}
	return string(gradattr.BaselineZero)
}
