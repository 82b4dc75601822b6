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

// PNG output: heatmaps for image-shaped samples, dot plots for the rest and
// for group sums, forest plots for summaries, all in the PuOr colours of
// colormap.go.

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
	// maxRows is the largest number of rows of a dot or forest plot.
	maxRows = 256
	// maxLabelRunes is the longest row label drawn; longer ones are cut.
	maxLabelRunes = 48
	// minTextWidth is the width, in PNG pixels, that titles and notes wrap
	// to when the chart itself is narrower.
	minTextWidth = 560
)

// Layout constants, in PNG pixels.
const (
	pngMargin   = 14
	pngLine     = 18 // height of a line of text
	heatGap     = 18 // between the two panels
	colorBarGap = 12 // between the attribution panel and the colour bar
	colorBarW   = 32
	columnGap   = 14 // between the columns of a chart's label table
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

// blend mixes col over the pixel at (x, y) with opacity a ∈ [0, 1].
func (c *canvas) blend(x, y int, col color.RGBA, a float64) {
	if !(image.Point{x, y}).In(c.img.Bounds()) || a <= 0 {
		return
	}
	p := c.img.RGBAAt(x, y)
	mix := func(b, f uint8) uint8 { return uint8(math.Round((1-a)*float64(b) + a*float64(f))) }
	c.img.SetRGBA(x, y, color.RGBA{R: mix(p.R, col.R), G: mix(p.G, col.G), B: mix(p.B, col.B), A: 0xFF})
}

// disc draws a disc of radius r centred on (cx, cy), its edge smoothed by
// 4×4 supersampling.
func (c *canvas) disc(cx, cy, r float64, col color.RGBA) {
	c.shape(cx, cy, r, func(dx, dy float64) bool { return dx*dx+dy*dy <= r*r }, col)
}

// ring draws the outline, of width w, of a circle of radius r centred on
// (cx, cy), filled with white inside.
func (c *canvas) ring(cx, cy, r, w float64, col color.RGBA) {
	c.disc(cx, cy, r, col)
	c.disc(cx, cy, r-w, colorWhite)
}

// diamond draws a square standing on a corner, of half-diagonal r.
func (c *canvas) diamond(cx, cy, r float64, col color.RGBA) {
	c.shape(cx, cy, r, func(dx, dy float64) bool { return math.Abs(dx)+math.Abs(dy) <= r }, col)
}

// shape fills the pixels within r of (cx, cy) where inside holds, each
// with the share of its 4×4 subsamples that do.
func (c *canvas) shape(cx, cy, r float64, inside func(dx, dy float64) bool, col color.RGBA) {
	for y := int(math.Floor(cy - r - 1)); y <= int(math.Ceil(cy+r+1)); y++ {
		for x := int(math.Floor(cx - r - 1)); x <= int(math.Ceil(cx+r+1)); x++ {
			n := 0
			for sy := 0; sy < 4; sy++ {
				for sx := 0; sx < 4; sx++ {
					if inside(float64(x)+(float64(sx)+0.5)/4-cx, float64(y)+(float64(sy)+0.5)/4-cy) {
						n++
					}
				}
			}
			c.blend(x, y, col, float64(n)/16)
		}
	}
}

func textWidth(face font.Face, s string) int {
	return font.MeasureString(face, s).Ceil()
}

// wrapText breaks each line between words into lines no wider than width
// pixels (a word wider than that stands alone).
func wrapText(face font.Face, lines []string, width int) []string {
	var out []string
	for _, line := range lines {
		cur := ""
		for _, word := range strings.Fields(line) {
			next := word
			if cur != "" {
				next = cur + " " + word
			}
			if cur != "" && textWidth(face, next) > width {
				out = append(out, cur)
				next = "    " + word
			}
			cur = next
		}
		out = append(out, cur)
	}
	return out
}

// writeLines draws lines of text from the top margin down, and returns the
// y below them.
func (c *canvas) writeLines(lines []string) int {
	for i, line := range lines {
		c.text(line, pngMargin, pngMargin+(i+1)*pngLine-5, 0, colorInk)
	}
	return pngMargin + len(lines)*pngLine
}

func (c *canvas) encode(w io.Writer) error {
	if err := png.Encode(w, c.img); err != nil {
		return fmt.Errorf("png: encoding: %w", err)
	}
	return nil
}

// cutLabel cuts a label to maxLabelRunes.
func cutLabel(s string) string {
	if utf8.RuneCountInString(s) <= maxLabelRunes {
		return s
	}
	r := []rune(s)
	return string(r[:maxLabelRunes-1]) + "…"
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

// layoutHeatmap places a heatmap of an height×width input below top, the
// y under the lines of title text; labelW is the width of the widest
// colour bar label.
func layoutHeatmap(height, width, top, labelW int) heatLayout {
	k := max(1, (minHeatPanel+max(height, width)-1)/max(height, width))
	pw, ph := width*k, height*k
	top += pngLine + 6 // a gap, then the panel captions
	l := heatLayout{scale: k, labelW: labelW}
	l.input = image.Rect(pngMargin, top, pngMargin+pw, top+ph)
	l.attr = l.input.Add(image.Pt(pw+heatGap, 0))
	barH := max(ph, 128)
	l.colorBar = image.Rect(l.attr.Max.X+colorBarGap, top, l.attr.Max.X+colorBarGap+colorBarW, top+barH)
	l.size = image.Pt(l.colorBar.Max.X+6+labelW+pngMargin, top+max(ph, barH)+2*pngLine+pngMargin)
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

// colorBarUnderlay is the underlay grey of column x (0 at the left) of a
// colour bar w columns wide: from 255 on the left to underlayDark on the
// right, the range of the heatmap's underlay.
func colorBarUnderlay(x, w int) uint8 {
	if w < 2 {
		return 255
	}
	return uint8(math.Round(255 - float64(255-underlayDark)*float64(x)/float64(w-1)))
}

// Heatmap writes a PNG of an image-shaped sample and its attributions: on
// the left the input img (height×width values, row-major) in grey; on the
// right the attributions attr (same layout) over the input's grey lightened
// into [0x99, 0xFF] (see underlay), in the PuOr colour map multiplied by
// that grey (see overlay, puor, divergingT and heatScale: t = clamp(a/s,
// −1, 1), s the 99th percentile of |a|); and a colour bar from −s (purple,
// bottom) through 0 to +s (orange, top), drawn over the same greys from the
// lightest (left) to the darkest (right), so that each colour reads as it
// does on the image, zero included. Both panels are upscaled by the same
// whole factor, nearest neighbour, so that the longer side is at least 256
// pixels. The title and each note are drawn as lines of text above the
// panels, wrapped to the image's width.
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
	l, lines := planHeatmap(face, title, notes, height, width, s)
	c := newCanvas(l.size.X, l.size.Y, face)
	c.writeLines(lines)
	c.text("input", l.input.Min.X, l.input.Min.Y-5, 0, colorInk)
	c.text("attribution over the input", l.attr.Min.X, l.attr.Min.Y-5, 0, colorInk)

	lo, hi := math.Inf(1), math.Inf(-1)
	for _, v := range img {
		lo, hi = math.Min(lo, v), math.Max(hi, v)
	}
	k := l.scale
	for i := 0; i < height; i++ {
		for j := 0; j < width; j++ {
			v := img[i*width+j]
			cell := image.Rect(j*k, i*k, (j+1)*k, (i+1)*k)
			c.fill(cell.Add(l.input.Min), grey(v, lo, hi))
			c.fill(cell.Add(l.attr.Min), overlay(underlay(v, lo, hi), divergingT(attr[i*width+j], s)))
		}
	}
	c.frame(l.input, colorFrame)
	c.frame(l.attr, colorFrame)

	bh, bw := l.colorBar.Dy(), l.colorBar.Dx()
	for y := 0; y < bh; y++ {
		for x := 0; x < bw; x++ {
			c.img.SetRGBA(l.colorBar.Min.X+x, l.colorBar.Min.Y+y, overlay(colorBarUnderlay(x, bw), colorBarT(y, bh)))
		}
	}
	c.frame(l.colorBar, colorFrame)
	lx := l.colorBar.Max.X + 6
	c.text(top, lx, l.colorBar.Min.Y+10, 0, colorInk)
	c.text(mid, lx, l.colorBar.Min.Y+bh/2+5, 0, colorInk)
	c.text(bottom, lx, l.colorBar.Max.Y, 0, colorInk)
	c.text(heatCaptions[0], pngMargin, l.size.Y-pngMargin-pngLine, 0, colorInk)
	c.text(heatCaptions[1], pngMargin, l.size.Y-pngMargin, 0, colorInk)
	return c.encode(w)
}

// heatCaptions are drawn under a heatmap.
var heatCaptions = []string{
	"s = the 99th percentile of |attribution|; orange +, purple −",
	"colour bar: over the lightest grey (left) to the darkest (right)",
}

// planHeatmap lays out a heatmap of an height×width input at scale s
// under the title and notes, and returns the layout and the text lines.
func planHeatmap(face font.Face, title string, notes []string, height, width int, s float64) (heatLayout, []string) {
	labelW := max(textWidth(face, "+"+Number(s)), textWidth(face, "−"+Number(s)))
	probe := layoutHeatmap(height, width, 0, labelW)
	lines := wrapText(face, append([]string{title}, notes...), max(probe.size.X, minTextWidth)-2*pngMargin)
	l := layoutHeatmap(height, width, pngMargin+len(lines)*pngLine, labelW)
	for _, line := range append(lines, heatCaptions...) {
		l.size.X = max(l.size.X, pngMargin+textWidth(face, line)+pngMargin)
	}
	return l, lines
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

// Title is the title of the PNG of explanation e: the model, the sample,
// the method with its baseline, and the output explained, its logits when
// they were.
func Title(rep *explain.Report, e explain.Explanation) string {
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
	of := "output"
	if rep.Settings.Logits {
		of = "the logits of output"
	}
	return fmt.Sprintf("%s, sample %d: %s of %s %s[%s]", rep.Model.Name, e.Index, method, of, rep.Output, target)
}

// figure is what PNG draws for one explanation: a dot plot, or a heatmap.
type figure struct {
	dots *DotChart
	heat *heatmapFigure
}

// heatmapFigure holds Heatmap's arguments.
type heatmapFigure struct {
	title         string
	notes         []string
	img, attr     []float64
	height, width int
}

// PNG draws one explained sample: a heatmap for an image-shaped sample
// ((H,W), (1,H,W), or (C,H,W) with C ≤ 3, attributions summed over
// channels), a dot plot of the features otherwise (see Options for which,
// and in what order), and a dot plot of the group sums when the settings
// have groups. The header holds the outputs, the completeness check and the
// warnings.
func PNG(w io.Writer, rep *explain.Report, e explain.Explanation, opt Options) error {
	f := explanationFigure(rep, e, opt)
	if h := f.heat; h != nil {
		return Heatmap(w, h.title, h.img, h.height, h.width, h.attr, h.notes...)
	}
	return Dots(w, *f.dots)
}

// explanationFigure is the figure of explanation e.
func explanationFigure(rep *explain.Report, e explain.Explanation, opt Options) figure {
	r := e.Result
	notes := []string{"output " + Number(r.Output)}
	if e.BaselineOutputs != nil || r.Completeness != nil {
		notes[0] += ", baseline output " + Number(r.BaselineOutput)
	}
	if cp := r.Completeness; cp != nil {
		verdict := " (not judged: the method does not promise completeness)"
		if cp.Judged {
			verdict = " (ok)"
			if !cp.OK {
				verdict = " (NOT ok: above the tolerance " + Number(cp.Tolerance) + ")"
			}
		}
		notes = append(notes, fmt.Sprintf("completeness: the attributions sum to %s, f(x) − f(x′) is %s, relative gap %s%s",
			Number(cp.Sum), Number(cp.Expected), Number(cp.RelativeGap), verdict))
	}
	for _, wn := range e.Warnings {
		notes = append(notes, "warning: "+wn.Message+opt.suggestion(wn))
	}
	title := Title(rep, e)
	axis := "attribution"
	if r.Completeness != nil {
		axis = "attribution, a share of f(x) − f(x′)"
	}
	if g := e.Grouped; g != nil {
		rows := make([]DotRow, len(g.Names))
		for i, name := range g.Names {
			rows[i] = DotRow{Cells: []string{name}, Value: g.Attributions[i]}
		}
		ge, gr := e, *r
		gr.Attributions = g.Attributions
		ge.Result = &gr
		scale, what := Scale(ge)
		return figure{dots: &DotChart{Title: title, Notes: notes, Columns: []Column{{Header: "group"}}, Rows: rows,
			Scale: scale, ScaleNote: what, Axis: axis + ", summed per group"}}
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
		return figure{heat: &heatmapFigure{title: title, notes: notes, img: img, attr: attr, height: h, width: wd}}
	}
	names, units := featureColumns(rep)
	order, hidden := opt.selection(r.Attributions)
	if hidden > 0 {
		notes = append(notes, opt.hiddenNote(hidden, len(r.Attributions)))
	}
	columns := []Column{{Header: "feature"}}
	if units != nil {
		columns = append(columns, Column{Header: "unit"})
	}
	columns = append(columns, Column{Header: "value", Right: true})
	rows := make([]DotRow, len(order))
	for k, i := range order {
		label, value := strconv.Itoa(i), ""
		if i < len(names) {
			label = names[i]
		}
		if i < len(e.Values) {
			value = Number(e.Values[i])
		}
		rows[k] = DotRow{Cells: []string{label}, Value: r.Attributions[i]}
		if units != nil {
			rows[k].Cells = append(rows[k].Cells, units[i])
		}
		rows[k].Cells = append(rows[k].Cells, value)
	}
	scale, what := Scale(e)
	return figure{dots: &DotChart{Title: title, Notes: notes, Columns: columns, Rows: rows,
		Scale: scale, ScaleNote: what, Axis: axis}}
}

// featureColumns names the features of the report's samples, and gives
// their units when the model names them (nil otherwise).
func featureColumns(rep *explain.Report) (names, units []string) {
	meta := rep.Model.Meta
	n := rep.Batch.SampleSize()
	if len(meta.Features) == n {
		if len(meta.Units) == n {
			return meta.Features, meta.Units
		}
		return meta.Features, nil
	}
	return rep.Labels(), nil
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
