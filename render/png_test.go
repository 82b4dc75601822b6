package render

import (
	"bytes"
	"context"
	"encoding/json"
	"image"
	"image/color"
	"image/png"
	"math"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/debpython"
	"github.com/apportion/apportion/internal/onnxtestdata"
	"github.com/apportion/apportion/internal/testfiles"
	"github.com/apportion/apportion/samples"
)

// The colours below are checked against the colour map's definition as the
// doc comments of colormap.go state it, written out again here:
//
//	p = 4(1 − t), c(t) = (1 − f)·PuOr[⌊p⌋] + f·PuOr[⌊p⌋+1], f = p − ⌊p⌋
//	pixel = round(c(t) · l / 255),  l = round(0x99 + (255 − 0x99)·(v − lo)/(hi − lo))
//
// with t = clamp(a/s, −1, 1) and s the nearest-rank 99th percentile of |a|.

// puorWant is ColorBrewer's 9-class PuOr, orange end first (Harrower &
// Brewer 2003; the hex codes of colorbrewer2.org, checked against Debian
// python3-matplotlib's copy in TestPuOrIsColorBrewers).
var puorWant = []color.RGBA{
	{0xB3, 0x58, 0x06, 0xFF}, {0xE0, 0x82, 0x14, 0xFF}, {0xFD, 0xB8, 0x63, 0xFF},
	{0xFE, 0xE0, 0xB6, 0xFF}, {0xF7, 0xF7, 0xF7, 0xFF}, {0xD8, 0xDA, 0xEB, 0xFF},
	{0xB2, 0xAB, 0xD2, 0xFF}, {0x80, 0x73, 0xAC, 0xFF}, {0x54, 0x27, 0x88, 0xFF},
}

var (
	wantOrange = puorWant[0]
	wantPurple = puorWant[8]
	wantWhite  = color.RGBA{0xFF, 0xFF, 0xFF, 0xFF}
)

// mapWant is the documented colour map at t, computed independently of
// puor.
func mapWant(t float64) [3]float64 {
	p := 4 * (1 - math.Max(-1, math.Min(1, t)))
	i := math.Min(math.Floor(p), 7)
	f := p - i
	a, b := puorWant[int(i)], puorWant[int(i)+1]
	return [3]float64{(1-f)*float64(a.R) + f*float64(b.R), (1-f)*float64(a.G) + f*float64(b.G), (1-f)*float64(a.B) + f*float64(b.B)}
}

// overlayWant is the documented pixel of t over underlay grey l.
func overlayWant(l uint8, t float64) color.RGBA {
	c := mapWant(t)
	ch := func(v float64) uint8 {
		return uint8(math.Floor(math.Floor(v+0.5)*float64(l)/255 + 0.5))
	}
	return color.RGBA{ch(c[0]), ch(c[1]), ch(c[2]), 0xFF}
}

// underlayWant is the documented underlay of value v on [lo, hi].
func underlayWant(v, lo, hi float64) uint8 {
	return uint8(math.Floor(0x99 + (255-0x99)*(v-lo)/(hi-lo) + 0.5))
}

// greyWant is the documented grey level round(255·(v − lo)/(hi − lo)).
func greyWant(v, lo, hi float64) uint8 {
	return uint8(math.Floor(255*(v-lo)/(hi-lo) + 0.5))
}

func TestPuOrIsColorBrewers(t *testing.T) {
	// Debian's python3-matplotlib 3.6.3 carries ColorBrewer's schemes
	// (matplotlib/_cm.py, "_PuOr_data": the 11-class PuOr as RGB
	// fractions); the 9-class scheme is its classes 2 to 10.
	py := debpython.Require(t, "matplotlib")
	out, err := exec.Command(py, "-c", `import json, matplotlib._cm as cm
print(json.dumps([[round(v*255) for v in c] for c in cm._PuOr_data]))`).Output()
	require.NoError(t, err)
	var classes [][3]int
	require.NoError(t, json.Unmarshal(out, &classes))
	require.Len(t, classes, 11)
	for i, c := range PuOr {
		want := classes[i+1]
		assert.Equal(t, want, [3]int{int(c.R), int(c.G), int(c.B)}, "class %d", i+2)
		assert.Equal(t, puorWant[i], c)
	}
}

func TestColorMapDefinition(t *testing.T) {
	// The ends and the middle of the map are the scheme's classes.
	assert.Equal(t, wantOrange, puor(1))
	assert.Equal(t, wantPurple, puor(-1))
	assert.Equal(t, puorWant[4], puor(0))
	assert.Equal(t, puorWant[2], puor(0.5))
	assert.Equal(t, wantOrange, puor(7), "clamped")
	for _, tv := range []float64{-0.9, -0.3, -0.01, 0.01, 0.2, 0.375, 0.8} {
		want := mapWant(tv)
		got := puor(tv)
		assert.InDelta(t, want[0], float64(got.R), 0.5, "t=%v", tv)
		assert.InDelta(t, want[1], float64(got.G), 0.5, "t=%v", tv)
		assert.InDelta(t, want[2], float64(got.B), 0.5, "t=%v", tv)
	}
	// Over white the overlay is the map; zero over any grey is the
	// scheme's middle times the grey.
	assert.Equal(t, wantOrange, overlay(255, 1))
	for _, l := range []uint8{0x99, 0xC0, 0xFF} {
		m := uint8(math.Round(float64(0xF7) * float64(l) / 255))
		assert.Equal(t, color.RGBA{m, m, m, 0xFF}, overlay(l, 0), "l=%d", l)
		assert.Equal(t, overlayWant(l, -0.6), overlay(l, -0.6), "l=%d", l)
	}
	// The underlay spans [0x99, 0xFF].
	assert.Equal(t, uint8(0x99), underlay(2, 2, 7))
	assert.Equal(t, uint8(0xFF), underlay(7, 2, 7))
	assert.Equal(t, underlayWant(3, 2, 7), underlay(3, 2, 7))
	// Negative attributions over the darkest pixels stay purple and far
	// from the grey of zero there (Euclidean distance in sRGB).
	dark := overlay(underlayDark, -1)
	assert.Greater(t, dark.B, dark.R)
	assert.Greater(t, dark.R, dark.G)
	zero := overlay(underlayDark, 0)
	d := math.Sqrt(sq(float64(dark.R)-float64(zero.R)) + sq(float64(dark.G)-float64(zero.G)) + sq(float64(dark.B)-float64(zero.B)))
	assert.Greater(t, d, 100.0)

	assert.Equal(t, 1.0, divergingT(5, 2))
	assert.Equal(t, -1.0, divergingT(-5, 2))
	assert.Equal(t, 0.25, divergingT(0.5, 2))

	// Nearest-rank percentile (Hyndman & Fan 1996, definition 1, from
	// memory): the ⌈p·n⌉-th smallest value.
	a := make([]float64, 200)
	for i := range a {
		a[i] = float64(i + 1)
		if i%2 == 1 {
			a[i] = -a[i] // the scale uses |a|
		}
	}
	assert.Equal(t, 198.0, heatScale(a)) // ⌈0.99·200⌉ = 198
	assert.Equal(t, 99.0, heatScale(a[:100]))
	assert.Equal(t, 3.0, heatScale([]float64{1, -2, 3})) // ⌈2.97⌉ = 3: the maximum
	assert.Equal(t, 1.0, heatScale(make([]float64, 10)), "all-zero attributions fall back to 1")
	// 99 zeros and one 4: the 99th smallest is 0, so the scale is max |a|.
	z := make([]float64, 100)
	z[7] = -4
	assert.Equal(t, 4.0, heatScale(z))
}

func sq(v float64) float64 { return v * v }

func TestPNGHeatmapColors(t *testing.T) {
	const h, w = 10, 10
	img := make([]float64, h*w)
	attr := make([]float64, h*w)
	for i := range img {
		img[i] = float64(i) / 99
		attr[i] = 0.001 * float64(i%7)
	}
	attr[0] = 10  // far above the scale: clipped to t = 1
	attr[1] = -2  // the 99th smallest |a| of 100 values: s = 2, t = −1
	attr[2] = 1   // t = 0.5
	attr[3] = 0   // t = 0: the underlay
	attr[4] = -.5 // t = −0.25
	var buf bytes.Buffer
	require.NoError(t, Heatmap(&buf, "test", img, h, w, attr, "one note"))
	got := decodePNG(t, buf.Bytes())

	face, err := newFace()
	require.NoError(t, err)
	l, _ := planHeatmap(face, "test", []string{"one note"}, h, w, 2)
	assert.Equal(t, 26, l.scale, "⌈256/10⌉")
	assert.GreaterOrEqual(t, l.attr.Dx(), 256)
	require.True(t, l.colorBar.In(got.Bounds()), "colour bar %v inside %v", l.colorBar, got.Bounds())

	want := []float64{1, -1, 0.5, 0, -0.25}
	for i, tv := range want {
		r, c := i/w, i%w
		g := greyWant(img[i], 0, 1)
		// Every pixel of the upscaled cell, nearest neighbour.
		for _, d := range []image.Point{{0, 0}, {l.scale - 1, l.scale - 1}, {l.scale / 2, l.scale / 3}} {
			p := l.attr.Min.Add(image.Pt(c*l.scale, r*l.scale)).Add(d)
			assert.Equal(t, overlayWant(underlayWant(img[i], 0, 1), tv), got.RGBAAt(p.X, p.Y), "attribution pixel %d (t=%v) at %v", i, tv, p)
			q := l.input.Min.Add(image.Pt(c*l.scale, r*l.scale)).Add(d)
			assert.Equal(t, color.RGBA{g, g, g, 0xFF}, got.RGBAAt(q.X, q.Y), "input pixel %d at %v", i, q)
		}
	}
	// The colour bar: +s at the top row, −s at the bottom, over the lightest
	// grey on the left and the darkest on the right.
	cb := l.colorBar
	assert.Equal(t, wantOrange, got.RGBAAt(cb.Min.X, cb.Min.Y))
	assert.Equal(t, wantPurple, got.RGBAAt(cb.Min.X, cb.Max.Y-1))
	assert.Equal(t, overlayWant(0x99, 1), got.RGBAAt(cb.Max.X-1, cb.Min.Y))
	// Zero reads the same on the image and on the bar: pixel 3 (a = 0) of
	// the darkest input row lies over the underlay of its grey; the bar's
	// middle row at that grey's column is the same colour.
	mid := cb.Min.Y + (cb.Dy()-1)/2
	for x := cb.Min.X; x < cb.Max.X; x++ {
		lx := colorBarUnderlay(x-cb.Min.X, cb.Dx())
		assert.InDelta(t, float64(overlay(lx, 0).R), float64(got.RGBAAt(x, mid).R), 3, "bar column %d", x)
	}
	p3 := l.attr.Min.Add(image.Pt(3*l.scale+1, 1))
	zeroPixel := got.RGBAAt(p3.X, p3.Y)
	assert.Equal(t, overlayWant(underlayWant(img[3], 0, 1), 0), zeroPixel)
	found := false
	for x := cb.Min.X; x < cb.Max.X; x++ {
		if c := overlay(colorBarUnderlay(x-cb.Min.X, cb.Dx()), colorBarT((cb.Dy()-1)/2, cb.Dy())); maxChannelDiff(c, zeroPixel) <= 2 {
			found = true
		}
	}
	assert.True(t, found, "the bar's zero row shows %v", zeroPixel)
	// Scale labels are drawn beside the top, middle and bottom of the bar.
	for _, y := range []int{cb.Min.Y, cb.Min.Y + cb.Dy()/2 - 8, cb.Max.Y - 13} {
		assert.True(t, hasInk(got, image.Rect(cb.Max.X+2, y, got.Bounds().Max.X, y+14)), "label near y=%d", y)
	}
}

// dotsOf draws chart and returns the image and its layout.
func dotsOf(t *testing.T, chart DotChart) (*image.RGBA, dotLayout) {
	t.Helper()
	var buf bytes.Buffer
	require.NoError(t, Dots(&buf, chart))
	face, err := newFace()
	require.NoError(t, err)
	l, err := layoutDots(face, chart)
	require.NoError(t, err)
	img := decodePNG(t, buf.Bytes())
	require.Equal(t, l.size, img.Bounds().Size())
	return img, l
}

// forestOf draws chart and returns the image and its layout.
func forestOf(t *testing.T, chart ForestChart) (*image.RGBA, forestLayout) {
	t.Helper()
	var buf bytes.Buffer
	require.NoError(t, Forest(&buf, chart))
	face, err := newFace()
	require.NoError(t, err)
	l, err := layoutForest(face, chart)
	require.NoError(t, err)
	img := decodePNG(t, buf.Bytes())
	require.Equal(t, l.size, img.Bounds().Size())
	return img, l
}

// assertMark checks the mark of value v of row i: a filled orange disc for
// v > 0 (its centre and a point 3 pixels out are orange), an open purple
// ring for v < 0 (white centre, purple at 4 pixels out), on the axis at v.
func assertMark(t *testing.T, img *image.RGBA, x float64, y int, v float64, msg string) {
	t.Helper()
	cx := int(math.Round(x - 0.5))
	switch {
	case v > 0:
		assert.Equal(t, wantOrange, img.RGBAAt(cx, y), "%s: centre", msg)
		assert.Equal(t, wantOrange, img.RGBAAt(cx, y-3), "%s: filled", msg)
	case v < 0:
		assert.Equal(t, wantWhite, img.RGBAAt(cx, y), "%s: open", msg)
		assert.Equal(t, wantPurple, img.RGBAAt(cx, y-4), "%s: ring", msg)
	}
}

func TestDotPlot(t *testing.T) {
	// Values of both signs on one axis: from min(0, min v) = −1 to 2, ticks
	// of 1 within it (Heckbert's 1, 2, 5 steps); each mark sits at its value, a
	// stem lighter than the mark joins it to zero, and the zero line runs
	// through every row.
	values := []float64{2, -1, 0, 0.5}
	chart := DotChart{Title: "dots", Columns: []Column{{Header: "feature"}, {Header: "value", Right: true}}}
	for i, v := range values {
		chart.Rows = append(chart.Rows, DotRow{Cells: []string{"row " + string(rune('a'+i)), "7"}, Value: v})
	}
	img, l := dotsOf(t, chart)
	assert.Equal(t, []float64{-1, 0, 1, 2}, l.ax.ticks)
	// The axis spans [−1, 2] padded by 4% of 3 at both ends.
	assert.InDelta(t, float64(l.ax.x0), l.ax.x(-1.12), 1e-9)
	assert.InDelta(t, float64(l.ax.x0+l.ax.w), l.ax.x(2.12), 1e-9)
	zx := int(math.Round(l.ax.x(0)))
	for i, v := range values {
		y := l.rowY(i)
		assertMark(t, img, l.ax.x(v), y, v, "row "+string(rune('a'+i)))
		if v != 0 {
			// Half-way along the stem: the mark's colour at 55% over white.
			sx := int(math.Round((l.ax.x(0) + l.ax.x(v)) / 2))
			want := wantOrange
			if v < 0 {
				want = wantPurple
			}
			c := img.RGBAAt(sx, y-1) // the stem's upper line, clear of the dotted guide
			assert.InDelta(t, 0.45*255+0.55*float64(want.G), float64(c.G), 1, "stem of row %d", i)
		}
		if v == 0 || math.Abs(l.ax.x(v)-l.ax.x(0)) > 10 {
			assert.Equal(t, colorAxis, img.RGBAAt(zx, y+dotRowH/2-1), "zero line at row %d", i)
		}
		// The labels on the left, the values on the right.
		assert.True(t, hasInk(img, image.Rect(pngMargin, y-8, pngMargin+l.table.width, y+6)), "label of row %d", i)
		assert.True(t, hasInk(img, image.Rect(l.ax.x0+l.ax.w+8, y-8, l.valueX+1, y+6)), "value of row %d", i)
	}
	// Sign survives greyscale: the positive mark is dark at its centre, the
	// negative one light (ITU-R BT.601 luma, common practice).
	luma := func(c color.RGBA) float64 { return 0.299*float64(c.R) + 0.587*float64(c.G) + 0.114*float64(c.B) }
	pos := img.RGBAAt(int(math.Round(l.ax.x(2)-0.5)), l.rowY(0))
	neg := img.RGBAAt(int(math.Round(l.ax.x(-1)-0.5)), l.rowY(1))
	assert.Less(t, luma(pos), 130.0)
	assert.Greater(t, luma(neg), 250.0)
}

func TestDotPlotScaleFloor(t *testing.T) {
	// Attributions of 1e-13 on an axis that must span at least 1 (the
	// output's change) sit on the zero line: the axis spans 1, split
	// between the signs as the values are (2 : 7), and every mark is
	// within a pixel of zero.
	chart := DotChart{Title: "tiny", Columns: []Column{{Header: "feature"}}, Scale: 1, ScaleNote: "|output|"}
	for _, v := range []float64{1e-13, -2e-13, 7e-13} {
		chart.Rows = append(chart.Rows, DotRow{Cells: []string{"f"}, Value: v})
	}
	_, l := dotsOf(t, chart)
	lo, hi := axisRange([]float64{1e-13, -2e-13, 7e-13}, 1)
	assert.InDelta(t, -2.0/9, lo, 1e-12)
	assert.InDelta(t, 7.0/9, hi, 1e-12)
	assert.GreaterOrEqual(t, l.ax.hi-l.ax.lo, 1.0)
	for _, r := range chart.Rows {
		assert.InDelta(t, l.ax.x(0), l.ax.x(r.Value), 1)
	}
	// Without the floor the largest value spans the axis.
	chart.Scale = 0
	_, l = dotsOf(t, chart)
	assert.Less(t, l.ax.hi, 1e-11)
}

func TestNiceTicks(t *testing.T) {
	// Steps of 1, 2 or 5 times a power of ten, about five of them, within
	// the span (Heckbert 1990, from memory).
	assert.Equal(t, []float64{0, 0.2, 0.4, 0.6, 0.8}, niceTicks(0, 0.97))
	assert.Equal(t, []float64{0, 0.05, 0.1, 0.15, 0.2}, niceTicks(-0.03, 0.22))
	assert.Equal(t, []float64{0, 2e-13, 4e-13, 6e-13, 8e-13}, niceTicks(0, 9e-13))
}

func TestForestPlot(t *testing.T) {
	// Two panels on one axis: each point at its value, each interval a
	// whisker from lo to hi with end caps; the marks say the sign.
	chart := ForestChart{Title: "forest", Labels: []string{"a", "b"}, Legend: summaryLegend, Panels: []ForestPanel{
		{Title: "all", Point: []float64{0.4, 0.1}, Lo: []float64{0.3, 0.05}, Hi: []float64{0.5, 0.2}, Sign: []int{1, -1}},
		{Title: "group", Point: []float64{0.2, math.NaN()}, Lo: []float64{0.1, math.NaN()}, Hi: []float64{0.35, math.NaN()}, Sign: []int{0, 0}},
	}}
	img, l := forestOf(t, chart)
	a0, a1 := l.axis(0), l.axis(1)
	assert.Equal(t, a0.ticks, a1.ticks, "one axis for every panel")
	assertMark(t, img, a0.x(0.4), l.rowY(0, 0), 1, "a, all")
	assertMark(t, img, a0.x(0.1), l.rowY(0, 1), -1, "b, all")
	// The whisker: ink between lo and the mark, a cap at hi.
	y := l.rowY(0, 0)
	assert.Equal(t, colorInk, img.RGBAAt(int(math.Round(a0.x(0.32))), y))
	assert.Equal(t, colorInk, img.RGBAAt(int(math.Round(a0.x(0.5))), y-forestCap/2))
	// The mixed mark is a grey diamond; a row a panel lacks has no mark.
	assert.Equal(t, colorMixed, img.RGBAAt(int(math.Round(a1.x(0.2)-0.5)), l.rowY(1, 0)))
	y1 := l.rowY(1, 1)
	for x := a1.x0 + 1; x < a1.x0+a1.w; x++ {
		c := img.RGBAAt(x, y1)
		assert.True(t, c == wantWhite || c == colorGuide || c == colorAxis, "x=%d: %v", x, c)
	}
}

func TestPNGBadInput(t *testing.T) {
	var buf bytes.Buffer
	row := func(v float64) []DotRow { return []DotRow{{Cells: []string{"a"}, Value: v}} }
	panel := ForestPanel{Point: []float64{1}, Lo: []float64{2}, Hi: []float64{0}, Sign: []int{0}}
	for name, err := range map[string]error{
		"no rows":          Dots(&buf, DotChart{}),
		"NaN":              Dots(&buf, DotChart{Rows: row(math.NaN())}),
		"negative scale":   Dots(&buf, DotChart{Rows: row(1), Scale: -1}),
		"too many rows":    Dots(&buf, DotChart{Rows: make([]DotRow, maxRows+1)}),
		"forest lengths":   Forest(&buf, ForestChart{Labels: []string{"a", "b"}, Panels: []ForestPanel{panel}}),
		"forest lo > hi":   Forest(&buf, ForestChart{Labels: []string{"a"}, Panels: []ForestPanel{panel}}),
		"forest no panels": Forest(&buf, ForestChart{Labels: []string{"a"}}),
		"heat lengths":     Heatmap(&buf, "", make([]float64, 4), 2, 3, make([]float64, 6)),
		"heat NaN":         Heatmap(&buf, "", make([]float64, 4), 2, 2, []float64{0, math.Inf(1), 0, 0}),
		"heat zero size":   Heatmap(&buf, "", nil, 0, 3, nil),
		"heat oversized":   Heatmap(&buf, "", nil, 4096, 4096, nil),
		"heat side large":  Heatmap(&buf, "", nil, 1, maxHeatSide+1, nil),
	} {
		assert.Error(t, err, name)
	}
	err := Heatmap(&buf, "", make([]float64, 4), 2, 3, make([]float64, 6))
	assert.ErrorContains(t, err, "expected 6 image values and 6 attributions, got 4 and 6")
	err = Dots(&buf, DotChart{Rows: []DotRow{{Value: 1}, {Value: math.NaN()}}})
	assert.ErrorContains(t, err, "png: dot value[1] is NaN, expected a finite number")
	assert.Zero(t, buf.Len(), "nothing is written on bad input")
}

func TestExplainPNGDots(t *testing.T) {
	// node/test_softmax_example (ONNX backend test data 1.12.0): y =
	// softmax(x) over 3 values. Gradient × input of the top class has a
	// closed form (testfiles.SoftmaxGradientTimesInput); each feature's mark
	// sits at it, on an axis that spans at least |f(x) − f(0)|.
	rep, x, y := explainCase(t, "node/test_softmax_example", gradattr.MethodGradientTimesInput, nil)
	_, want := testfiles.SoftmaxGradientTimesInput(x, y)
	var buf bytes.Buffer
	e := rep.Explanations[0]
	require.NoError(t, PNG(&buf, rep, e, Options{}))
	img := decodePNG(t, buf.Bytes())
	chart := explanationChart(t, rep, e)
	face, err := newFace()
	require.NoError(t, err)
	l, err := layoutDots(face, chart)
	require.NoError(t, err)
	require.Equal(t, l.size, img.Bounds().Size())
	for i, a := range want {
		assertMark(t, img, l.ax.x(a), l.rowY(i), a, "feature "+string(rune('0'+i)))
	}
	scale, _ := Scale(e)
	assert.GreaterOrEqual(t, l.ax.hi-l.ax.lo, scale)
	assert.InDelta(t, math.Abs(e.Result.Output-e.Result.BaselineOutput), scale, 1e-12, "f(x) − f(0) is larger than every |a_i| here")
}

// explanationChart is the dot plot PNG draws for e.
func explanationChart(t *testing.T, rep *explain.Report, e explain.Explanation) DotChart {
	t.Helper()
	f := explanationFigure(rep, e, Options{})
	require.NotNil(t, f.dots)
	return *f.dots
}

func TestExplainPNGGroups(t *testing.T) {
	// With groups the chart shows the group sums, in the groups' order: for
	// the softmax model's gradient × input (closed form as in
	// TestExplainPNGDots), "last" = a_2 before "first two" = a_0 + a_1.
	groups := []gradattr.Group{{Name: "last", Indices: []int{2}}, {Name: "first two", Indices: []int{0, 1}}}
	rep, x, y := explainCase(t, "node/test_softmax_example", gradattr.MethodGradientTimesInput, groups)
	_, a := testfiles.SoftmaxGradientTimesInput(x, y)
	sums := []float64{a[2], a[0] + a[1]}
	e := rep.Explanations[0]
	chart := explanationChart(t, rep, e)
	require.Len(t, chart.Rows, 2)
	img, l := dotsOf(t, chart)
	for n, s := range sums {
		assert.Equal(t, groups[n].Name, chart.Rows[n].Cells[0])
		assert.InDelta(t, s, chart.Rows[n].Value, 1e-6, "float32 engine")
		assertMark(t, img, l.ax.x(s), l.rowY(n), s, groups[n].Name)
	}
}

func TestExplainPNGHeatmaps(t *testing.T) {
	// node/test_maxpool_2d_precomputed_pads (ONNX backend test data 1.12.0):
	// x = 1..25 as [1,1,5,5], 5×5 max pool with pads 2: every output is a
	// window maximum, so the gradient of the top output is 1 at the
	// largest input pixel (x = 25 at row 4, column 4) and 0 elsewhere. The
	// scale s is then 1 (the ⌈0.99·25⌉ = 25th smallest |a|): that pixel is
	// the orange end over its underlay, every other pixel the underlay
	// under the map's middle.
	rep, x, _ := explainCase(t, "node/test_maxpool_2d_precomputed_pads", gradattr.MethodGradient, nil)
	require.Len(t, x, 25)
	img := drawPNG(t, rep)
	l := heatmapLayoutOf(t, rep)
	assert.GreaterOrEqual(t, l.attr.Dx(), 256)
	lo, hi := minMax(x)
	for i, v := range x {
		p := l.attr.Min.Add(image.Pt((i%5)*l.scale+l.scale/2, (i/5)*l.scale+l.scale/2))
		tv := 0.0
		if v == hi {
			tv = 1
		}
		assert.Equal(t, overlayWant(underlayWant(v, lo, hi), tv), img.RGBAAt(p.X, p.Y), "pixel %d (x=%v)", i, v)
	}

	// node/test_globalaveragepool (ONNX backend test data 1.12.0): x
	// [1,3,5,5], y_c = mean of channel c. Gradient × input of the top
	// channel k is a = x_k/25 on channel k and 0 on the others, so the
	// attributions summed over channels are x_k/25, and the grey shows the
	// mean of the three channels.
	rep, x, y := explainCase(t, "node/test_globalaveragepool", gradattr.MethodGradientTimesInput, nil)
	require.Len(t, x, 75)
	k := gradattr.Top(y)
	img = drawPNG(t, rep)
	mean := make([]float64, 25)
	attr := make([]float64, 25)
	s := 0.0
	for i := range mean {
		mean[i] = (x[i] + x[25+i] + x[50+i]) / 3
		attr[i] = x[25*k+i] / 25
		s = math.Max(s, math.Abs(attr[i])) // ⌈0.99·25⌉ = 25: the maximum
	}
	lo, hi = minMax(mean)
	l = heatmapLayoutOf(t, rep)
	mismatch := 0
	for i := range mean {
		p := l.attr.Min.Add(image.Pt((i%5)*l.scale+l.scale/2, (i/5)*l.scale+l.scale/2))
		want := overlayWant(underlayWant(mean[i], lo, hi), attr[i]/s)
		got := img.RGBAAt(p.X, p.Y)
		// float32 arithmetic in the model: allow one level of rounding.
		if d := maxChannelDiff(want, got); d > 1 {
			mismatch++
			t.Errorf("pixel %d: want %v, got %v", i, want, got)
		}
	}
	assert.Zero(t, mismatch)
}

// heatmapLayoutOf is the layout of the heatmap PNG draws for the report's
// one explanation.
func heatmapLayoutOf(t *testing.T, rep *explain.Report) heatLayout {
	t.Helper()
	f := explanationFigure(rep, rep.Explanations[0], Options{})
	require.NotNil(t, f.heat)
	face, err := newFace()
	require.NoError(t, err)
	l, _ := planHeatmap(face, f.heat.title, f.heat.notes, f.heat.height, f.heat.width, heatScale(f.heat.attr))
	return l
}

func TestPNGTitle(t *testing.T) {
	// The title names the model, the sample, the method and its baseline,
	// and the output explained, or its logits.
	rep, _, _ := explainCase(t, "node/test_softmax_example", gradattr.MethodIntegratedGradients, nil)
	title := Title(rep, rep.Explanations[0])
	assert.True(t, strings.HasSuffix(title, ": integrated gradients (baseline zero) of output y[2]"), title)
	rep.Settings.Logits = true
	assert.Contains(t, Title(rep, rep.Explanations[0]), "of the logits of output y[2]")
}

func decodePNG(t *testing.T, raw []byte) *image.RGBA {
	t.Helper()
	img, err := png.Decode(bytes.NewReader(raw))
	require.NoError(t, err)
	b := img.Bounds()
	out := image.NewRGBA(b)
	for y := b.Min.Y; y < b.Max.Y; y++ {
		for x := b.Min.X; x < b.Max.X; x++ {
			out.Set(x, y, img.At(x, y))
		}
	}
	return out
}

// hasInk reports whether r holds a dark pixel (text).
func hasInk(img *image.RGBA, r image.Rectangle) bool {
	r = r.Intersect(img.Bounds())
	for y := r.Min.Y; y < r.Max.Y; y++ {
		for x := r.Min.X; x < r.Max.X; x++ {
			if c := img.RGBAAt(x, y); c.R < 120 && c.G < 120 && c.B < 120 {
				return true
			}
		}
	}
	return false
}

func TestImageShapeAndPaths(t *testing.T) {
	for _, c := range []struct {
		shape    []int
		ok       bool
		ch, h, w int
	}{
		{[]int{1, 32, 32}, true, 1, 32, 32},
		{[]int{3, 5, 7}, true, 3, 5, 7},
		{[]int{28, 28}, true, 1, 28, 28},
		{[]int{4, 5, 5}, false, 0, 0, 0}, // more than 3 channels
		{[]int{8}, false, 0, 0, 0},
		{[]int{1, 8}, false, 0, 0, 0}, // a row: bars
		{[]int{2, 1, 1, 5}, false, 0, 0, 0},
	} {
		ch, h, w, ok := imageShape(c.shape)
		assert.Equal(t, c.ok, ok, "%v", c.shape)
		if ok {
			assert.Equal(t, []int{c.ch, c.h, c.w}, []int{ch, h, w}, "%v", c.shape)
		}
	}
	assert.Equal(t, "a/b.png", PNGPath("a/b.png", 0, 1))
	assert.Equal(t, "a/b_0.png", PNGPath("a/b.png", 0, 3))
	assert.Equal(t, "a/b_2.png", PNGPath("a/b.png", 2, 3))
	assert.Equal(t, "out_1", PNGPath("out", 1, 2))
}

func minMax(v []float64) (lo, hi float64) {
	lo, hi = math.Inf(1), math.Inf(-1)
	for _, x := range v {
		lo, hi = math.Min(lo, x), math.Max(hi, x)
	}
	return lo, hi
}

func maxChannelDiff(a, b color.RGBA) int {
	d := 0
	for _, p := range [][2]uint8{{a.R, b.R}, {a.G, b.G}, {a.B, b.B}} {
		d = max(d, int(math.Abs(float64(p[0])-float64(p[1]))))
	}
	return d
}

// explainCase explains the input of a backend test case (ONNX backend test
// data 1.12.0) with method as the command line does by default, and
// returns the report with the case's input and output values.
func explainCase(t *testing.T, name string, method gradattr.Method, groups []gradattr.Group) (rep *explain.Report, x, y []float64) {
	t.Helper()
	dir := filepath.Join(onnxtestdata.Dir(t), name)
	m, err := explain.ReadModel(filepath.Join(dir, "model.onnx"))
	require.NoError(t, err)
	require.NoError(t, m.Compile(explain.CompileOptions{}))
	in, out := onnxtestdata.SetFiles(filepath.Join(dir, "test_data_set_0"))
	spec, err := m.Input()
	require.NoError(t, err)
	b, err := samples.ReadFile(in[0], spec, samples.Options{})
	require.NoError(t, err)
	_, y = testfiles.ReadPB(t, out[0])
	s := explain.Defaults()
	s.Method, s.Groups = method, groups
	head, err := m.Head("", false)
	require.NoError(t, err)
	ex, err := explain.New(m, head, s)
	require.NoError(t, err)
	rep, err = ex.Explain(context.Background(), b, nil)
	require.NoError(t, err)
	require.Len(t, rep.Explanations, 1)
	require.NoError(t, rep.Explanations[0].Err)
	return rep, b.Data, y
}

// drawPNG draws the report's one explanation and decodes the image.
func drawPNG(t *testing.T, rep *explain.Report) *image.RGBA {
	t.Helper()
	var buf bytes.Buffer
	require.NoError(t, PNG(&buf, rep, rep.Explanations[0], Options{}))
	// PNG signature, ISO/IEC 15948:2003 §5.2.
	require.True(t, bytes.HasPrefix(buf.Bytes(), []byte("\x89PNG\r\n\x1a\n")))
	return decodePNG(t, buf.Bytes())
}

func TestTableColours(t *testing.T) {
	// The gradient of y = softmax(x) (ONNX backend test data 1.12.0,
	// node/test_softmax_example) for the top class k: a_i = y_k(δ_ik − y_i),
	// positive for i = k and negative for the others. With Color, positive
	// bars are drawn in ANSI 256-colour 172 and negative ones in 97
	// (ECMA-48 SGR 38;5;n), the terminal's PuOr orange and purple; without
	// it, no escape at all.
	rep, x, y := explainCase(t, "node/test_softmax_example", gradattr.MethodGradient, nil)
	k := gradattr.Top(y)
	pos, neg := 0, 0
	for i := range x {
		d := 0.0
		if i == k {
			d = 1
		}
		if a := y[k] * (d - y[i]); a > 0 {
			pos++
		} else if a < 0 {
			neg++
		}
	}
	require.Positive(t, pos)
	require.Positive(t, neg)
	var plain, colour bytes.Buffer
	require.NoError(t, Table(&plain, rep, Options{}))
	require.NoError(t, Table(&colour, rep, Options{Color: true}))
	assert.NotContains(t, plain.String(), "\x1b[")
	assert.Equal(t, pos, strings.Count(colour.String(), "\x1b[38;5;172m█"))
	assert.Equal(t, neg, strings.Count(colour.String(), "\x1b[38;5;97m"))
}

func TestSummaryOneScale(t *testing.T) {
	// Two groups whose largest mean |a| differ fourfold, 0.1 and 0.4 (by
	// hand: each row's |a| is the group's value): the table draws both on
	// the scale of the larger, so group a's bar is a quarter of b's, 3 of
	// 12 cells; the forest plot puts both panels on one axis.
	s, err := gradattr.NewSummary(gradattr.SummaryOptions{Features: []string{"f"}, Model: "m", Method: gradattr.MethodGradient, GroupBy: "g", Bootstrap: 20})
	require.NoError(t, err)
	for k := 0; k < 4; k++ {
		require.NoError(t, s.Add(uint64(k), "a", []float64{0.1}))
		require.NoError(t, s.Add(uint64(4+k), "b", []float64{0.4}))
	}
	var buf bytes.Buffer
	SummaryTable(&buf, s, "")
	out := buf.String()
	assert.Contains(t, out, "(a full bar is a mean |a| of 0.4, the largest of any group)")
	block := func(group string) string {
		i := strings.Index(out, "g = "+group)
		require.GreaterOrEqual(t, i, 0)
		line := strings.Split(out[i:], "\n")[2]
		return line[strings.LastIndex(line, " ")+1:]
	}
	assert.Equal(t, strings.Repeat("█", 3), block("a"))
	assert.Equal(t, strings.Repeat("█", 12), block("b"))
	assert.Empty(t, SummaryWarnings(s))

	// The forest plot draws every group as a panel, all rows first, each
	// point at its mean |a| on the one axis.
	chart, err := summaryChart(s)
	require.NoError(t, err)
	require.Len(t, chart.Panels, 3)
	assert.Equal(t, []string{"all rows (8 rows)", "g = a (4 rows)", "g = b (4 rows)"}, []string{chart.Panels[0].Title, chart.Panels[1].Title, chart.Panels[2].Title})
	img, l := forestOf(t, chart)
	var drawn, summary bytes.Buffer
	require.NoError(t, Forest(&drawn, chart))
	require.NoError(t, SummaryPNG(&summary, s))
	assert.Equal(t, drawn.Bytes(), summary.Bytes(), "SummaryPNG draws that chart")
	for k, want := range []float64{0.25, 0.1, 0.4} {
		assertMark(t, img, l.axis(k).x(want), l.rowY(k, 0), 1, chart.Panels[k].Title)
	}

	// More than ManyGroups groups: a warning.
	many, err := gradattr.NewSummary(gradattr.SummaryOptions{Features: []string{"f"}, Model: "m", Method: gradattr.MethodGradient, GroupBy: "id", Bootstrap: 5})
	require.NoError(t, err)
	for k := 0; k <= ManyGroups; k++ {
		require.NoError(t, many.Add(uint64(k), "row "+string(rune('A'+k%26))+string(rune('a'+k/26)), []float64{1}))
	}
	w := SummaryWarnings(many)
	require.Len(t, w, 1)
	assert.Contains(t, w[0], "grouping by id makes 51 groups, more than 50")
}
