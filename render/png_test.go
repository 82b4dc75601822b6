package render

import (
	"bytes"
	"context"
	"image"
	"image/color"
	"image/png"
	"math"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/onnxtestdata"
	"github.com/apportion/apportion/internal/testfiles"
	"github.com/apportion/apportion/samples"
)

// The colours below are checked against the colour map's definition as the
// doc comments of colormap.go state it, written out again here:
//
//	t = clamp(a/s, −1, 1),  c = round((1 − |t|)·base + |t|·end)
//
// with end the red (0xC0,0x1C,0x28) for t > 0 and the blue (0x1F,0x5F,0xB4)
// for t < 0, and s the nearest-rank 99th percentile of |a|.

var (
	wantRed  = color.RGBA{0xC0, 0x1C, 0x28, 0xFF}
	wantBlue = color.RGBA{0x1F, 0x5F, 0xB4, 0xFF}
)

// blendWant is the documented blend, computed independently of overlay.
func blendWant(base uint8, t float64) color.RGBA {
	end := wantRed
	if t < 0 {
		end = wantBlue
	}
	f := math.Min(1, math.Abs(t))
	ch := func(e uint8) uint8 { return uint8(math.Floor((1-f)*float64(base) + f*float64(e) + 0.5)) }
	return color.RGBA{ch(end.R), ch(end.G), ch(end.B), 0xFF}
}

// greyWant is the documented grey level round(255·(v − lo)/(hi − lo)).
func greyWant(v, lo, hi float64) uint8 {
	return uint8(math.Floor(255*(v-lo)/(hi-lo) + 0.5))
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

func TestColorMapDefinition(t *testing.T) {
	g := color.RGBA{100, 100, 100, 0xFF}
	// t = 0 is transparent: the base shows unchanged.
	assert.Equal(t, g, overlay(g, 0))
	// t = ±1 is the pure end colour, whatever the base.
	assert.Equal(t, wantRed, overlay(g, 1))
	assert.Equal(t, wantBlue, overlay(g, -1))
	assert.Equal(t, wantRed, overlay(colorWhite, 1))
	for _, tv := range []float64{0.1, 0.25, 0.5, 0.9} {
		assert.Equal(t, blendWant(100, tv), overlay(g, tv), "t=%v", tv)
		assert.Equal(t, blendWant(100, -tv), overlay(g, -tv), "t=%v", -tv)
	}
	// Symmetric: |t| alone sets the opacity.
	for _, tv := range []float64{0.3, 0.7} {
		p, n := overlay(colorWhite, tv), overlay(colorWhite, -tv)
		fp := (255 - float64(p.G)) / (255 - float64(wantRed.G))
		fn := (255 - float64(n.R)) / (255 - float64(wantBlue.R))
		assert.InDelta(t, tv, fp, 0.01)
		assert.InDelta(t, tv, fn, 0.01)
	}
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
	attr[3] = 0   // t = 0: the grey input
	attr[4] = -.5 // t = −0.25
	var buf bytes.Buffer
	require.NoError(t, Heatmap(&buf, "test", img, h, w, attr, "one note"))
	got := decodePNG(t, buf.Bytes())

	l := layoutHeatmap(h, w, 2, 0)
	assert.Equal(t, 26, l.scale, "⌈256/10⌉")
	assert.GreaterOrEqual(t, l.attr.Dx(), 256)
	assert.GreaterOrEqual(t, got.Bounds().Dx(), 256)
	assert.GreaterOrEqual(t, got.Bounds().Dy(), 256)
	require.True(t, l.colorBar.In(got.Bounds()), "colour bar %v inside %v", l.colorBar, got.Bounds())

	want := []float64{1, -1, 0.5, 0, -0.25}
	for i, tv := range want {
		r, c := i/w, i%w
		g := greyWant(img[i], 0, 1)
		// Every pixel of the upscaled cell, nearest neighbour.
		for _, d := range []image.Point{{0, 0}, {l.scale - 1, l.scale - 1}, {l.scale / 2, l.scale / 3}} {
			p := l.attr.Min.Add(image.Pt(c*l.scale, r*l.scale)).Add(d)
			assert.Equal(t, blendWant(g, tv), got.RGBAAt(p.X, p.Y), "attribution pixel %d (t=%v) at %v", i, tv, p)
			q := l.input.Min.Add(image.Pt(c*l.scale, r*l.scale)).Add(d)
			assert.Equal(t, color.RGBA{g, g, g, 0xFF}, got.RGBAAt(q.X, q.Y), "input pixel %d at %v", i, q)
		}
	}
	// The last pixel: grey 255, a = 0.001·(99 mod 7) = 0.001, t = 0.0005.
	p := l.attr.Min.Add(image.Pt(9*l.scale+3, 9*l.scale+3))
	assert.Equal(t, blendWant(255, 0.001/2), got.RGBAAt(p.X, p.Y))

	// The colour bar: +s (pure red) at the top row, −s (pure blue) at the
	// bottom row, near white in the middle.
	cb := l.colorBar
	mid := cb.Min.X + cb.Dx()/2
	assert.Equal(t, wantRed, got.RGBAAt(mid, cb.Min.Y))
	assert.Equal(t, wantBlue, got.RGBAAt(mid, cb.Max.Y-1))
	centre := got.RGBAAt(mid, cb.Min.Y+cb.Dy()/2)
	for _, v := range []uint8{centre.R, centre.G, centre.B} {
		assert.GreaterOrEqual(t, v, uint8(250), "middle of the colour bar is white, got %v", centre)
	}
	// Redder towards the top: G falls monotonically over the upper half.
	for y := cb.Min.Y + 1; y < cb.Min.Y+cb.Dy()/2; y++ {
		assert.GreaterOrEqual(t, got.RGBAAt(mid, y).G, got.RGBAAt(mid, y-1).G, "row %d", y)
	}
	// Scale labels are drawn beside the top, middle and bottom of the bar.
	for _, y := range []int{cb.Min.Y, cb.Min.Y + cb.Dy()/2 - 8, cb.Max.Y - 13} {
		assert.True(t, hasInk(got, image.Rect(cb.Max.X+2, y, got.Bounds().Max.X, y+14)), "label near y=%d", y)
	}
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

func TestPNGBarsDirections(t *testing.T) {
	labels := []string{"up", "down", "none", "small up"}
	values := []float64{2, -1, 0, 0.5}
	lo := []float64{math.NaN(), -1.5, math.NaN(), 0.25}
	hi := []float64{math.NaN(), -0.5, math.NaN(), 1.5}
	var buf bytes.Buffer
	require.NoError(t, Bars(&buf, "bars", nil, labels, values, lo, hi))
	got := decodePNG(t, buf.Bytes())
	face, err := newFace()
	require.NoError(t, err)
	l, _, _ := layoutBars(face, []string{"bars"}, labels, values, lo, hi)
	assert.Equal(t, l.size, got.Bounds().Size())
	assert.GreaterOrEqual(t, got.Bounds().Dx(), 256)
	assert.Equal(t, 2.0, l.scale, "largest |value| or interval end")

	white := color.RGBA{0xFF, 0xFF, 0xFF, 0xFF}
	at := func(i, dx, dy int) color.RGBA { return got.RGBAAt(l.zeroX+dx, l.rowCenter(i)+dy) }
	// A bar's length is |v|/scale of the half-width barHalfW (linear scale).
	assert.Equal(t, wantRed, at(0, 5, 0), "positive bar goes right")
	assert.Equal(t, wantRed, at(0, barHalfW-1, -3))
	assert.Equal(t, white, at(0, -5, -3), "positive bar: nothing left of the axis")
	assert.Equal(t, wantBlue, at(1, -5, -3), "negative bar goes left")
	assert.Equal(t, wantBlue, at(1, -barHalfW/2+1, -3))
	assert.Equal(t, white, at(1, -barHalfW/2-2, -3), "−1 of scale 2 ends half-way")
	assert.Equal(t, white, at(1, 5, -3), "negative bar: nothing right of the axis")
	assert.Equal(t, white, at(2, 5, -3), "zero: no bar")
	assert.Equal(t, white, at(2, -5, -3), "zero: no bar")
	assert.Equal(t, wantRed, at(3, barHalfW/4-2, -3), "0.5 of scale 2: a quarter")
	assert.Equal(t, white, at(3, barHalfW/4+2, -3))
	// The whisker of row 3 spans [0.25, 1.5], with caps at both ends.
	ink := color.RGBA{0x20, 0x20, 0x20, 0xFF}
	assert.Equal(t, ink, at(3, barHalfW/2, 0), "whisker line inside the interval")
	assert.Equal(t, white, at(3, barHalfW/2, -3), "whisker line is one pixel thick")
	assert.Equal(t, ink, at(3, l.xOf(1.5)-l.zeroX, -4), "upper cap")
	assert.Equal(t, white, at(3, l.xOf(1.5)-l.zeroX+3, 0), "nothing beyond the interval")
	assert.True(t, l.left, "negative values: both halves of the axis")
	// Row 0's NaN interval draws no whisker.
	assert.Equal(t, white, at(0, -barHalfW/2, 0))
	// The zero axis.
	assert.Equal(t, color.RGBA{0x80, 0x80, 0x80, 0xFF}, at(2, 0, 0))
	// Labels on the left of each row.
	for i := range labels {
		r := image.Rect(pngMargin, l.rowCenter(i)-8, pngMargin+l.labelW, l.rowCenter(i)+6)
		assert.True(t, hasInk(got, r), "label of row %d", i)
	}
}

func TestPNGBarsPositiveOnly(t *testing.T) {
	// Values and intervals ≥ 0: the axis starts at the labels' edge and
	// the bars still grow to the right, |v|/scale of barHalfW.
	labels := []string{"a", "b"}
	values, lo, hi := []float64{4, 1}, []float64{3, 0.5}, []float64{5, 2}
	var buf bytes.Buffer
	require.NoError(t, Bars(&buf, "positive", nil, labels, values, lo, hi))
	got := decodePNG(t, buf.Bytes())
	face, err := newFace()
	require.NoError(t, err)
	l, _, _ := layoutBars(face, []string{"positive"}, labels, values, lo, hi)
	assert.False(t, l.left)
	assert.Equal(t, 5.0, l.scale)
	assert.Equal(t, pngMargin+l.labelW+10, l.zeroX)
	red, blue := colourRuns(got)
	require.Len(t, red, 2)
	assert.Equal(t, []int{0, 0}, blue)
	// ±2.5: the bar starts one pixel right of the axis, and the whisker's
	// lower cap covers one more.
	assert.InDelta(t, 0.8*barHalfW, red[0], 2.5, "4 of scale 5")
	assert.InDelta(t, 0.2*barHalfW, red[1], 2.5, "1 of scale 5")
}

func TestPNGBadInput(t *testing.T) {
	var buf bytes.Buffer
	for name, err := range map[string]error{
		"no values":       Bars(&buf, "", nil, nil, nil, nil, nil),
		"labels":          Bars(&buf, "", nil, []string{"a"}, []float64{1, 2}, nil, nil),
		"NaN":             Bars(&buf, "", nil, []string{"a"}, []float64{math.NaN()}, nil, nil),
		"lo without hi":   Bars(&buf, "", nil, []string{"a"}, []float64{1}, []float64{0}, nil),
		"lo > hi":         Bars(&buf, "", nil, []string{"a"}, []float64{1}, []float64{2}, []float64{0}),
		"too many bars":   Bars(&buf, "", nil, make([]string, maxBars+1), make([]float64, maxBars+1), nil, nil),
		"heat lengths":    Heatmap(&buf, "", make([]float64, 4), 2, 3, make([]float64, 6)),
		"heat NaN":        Heatmap(&buf, "", make([]float64, 4), 2, 2, []float64{0, math.Inf(1), 0, 0}),
		"heat zero size":  Heatmap(&buf, "", nil, 0, 3, nil),
		"heat oversized":  Heatmap(&buf, "", nil, 4096, 4096, nil),
		"heat side large": Heatmap(&buf, "", nil, 1, maxHeatSide+1, nil),
	} {
		assert.Error(t, err, name)
	}
	err := Heatmap(&buf, "", make([]float64, 4), 2, 3, make([]float64, 6))
	assert.ErrorContains(t, err, "expected 6 image values and 6 attributions, got 4 and 6")
	err = Bars(&buf, "", nil, []string{"a", "b"}, []float64{1, math.NaN()}, nil, nil)
	assert.ErrorContains(t, err, "png: bar value[1] is NaN, expected a finite number")
	assert.Zero(t, buf.Len(), "nothing is written on bad input")
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

// colourRuns finds the bars of a chart: runs of rows holding pure red or
// blue pixels, and for each its middle row's count of red and blue pixels,
// top to bottom.
func colourRuns(img *image.RGBA) (red, blue []int) {
	b := img.Bounds()
	count := func(y int) (r, bl int) {
		for x := b.Min.X; x < b.Max.X; x++ {
			switch img.RGBAAt(x, y) {
			case wantRed:
				r++
			case wantBlue:
				bl++
			}
		}
		return r, bl
	}
	for y := b.Min.Y; y < b.Max.Y; y++ {
		r, bl := count(y)
		if r+bl == 0 {
			continue
		}
		end := y
		for end+1 < b.Max.Y {
			if r2, b2 := count(end + 1); r2+b2 == 0 {
				break
			}
			end++
		}
		r, bl = count((y + end) / 2)
		red, blue = append(red, r), append(blue, bl)
		y = end
	}
	return red, blue
}

func TestExplainPNGBars(t *testing.T) {
	// node/test_softmax_example (ONNX backend test data 1.12.0): y =
	// softmax(x) over 3 values. Gradient × input of the top class k has the
	// closed form a_i = x_i·p_k·(δ_ik − p_i) (the softmax derivative,
	// ∂p_k/∂x_i = p_k(δ_ik − p_i)), with p = output_0.pb.
	rep, x, y := explainCase(t, "node/test_softmax_example", gradattr.MethodGradientTimesInput, nil)
	k := gradattr.Top(y)
	want := make([]float64, 3)
	scale := 0.0
	for i := range want {
		d := 0.0
		if i == k {
			d = 1
		}
		want[i] = x[i] * y[k] * (d - y[i])
		scale = math.Max(scale, math.Abs(want[i]))
	}
	img := drawPNG(t, rep)
	assert.GreaterOrEqual(t, img.Bounds().Dx(), 256)

	red, blue := colourRuns(img)
	var nonzero []float64
	for _, a := range want {
		if a != 0 {
			nonzero = append(nonzero, a)
		}
	}
	require.Len(t, red, len(nonzero), "one coloured bar per non-zero attribution (closed form %v)", want)
	for n, a := range nonzero {
		length := math.Round(math.Abs(a) / scale * barHalfW)
		if a > 0 {
			assert.Zero(t, blue[n], "bar %d (%v) is red only", n, a)
			assert.InDelta(t, length, red[n], 1.5, "bar %d length", n)
		} else {
			assert.Zero(t, red[n], "bar %d (%v) is blue only", n, a)
			assert.InDelta(t, length, blue[n], 1.5, "bar %d length", n)
		}
	}
}

func TestExplainPNGGroups(t *testing.T) {
	// With -groups the chart shows the group sums: for the softmax model's
	// gradient × input (closed form as in TestExplainPNGBars), group
	// "first two" = a_0 + a_1 and "last" = a_2.
	groups := []gradattr.Group{{Name: "first two", Indices: []int{0, 1}}, {Name: "last", Indices: []int{2}}}
	rep, x, y := explainCase(t, "node/test_softmax_example", gradattr.MethodGradientTimesInput, groups)
	_, a := testfiles.SoftmaxGradientTimesInput(x, y)
	sums := []float64{a[0] + a[1], a[2]}
	red, blue := colourRuns(drawPNG(t, rep))
	require.Len(t, red, 2)
	scale := math.Max(math.Abs(sums[0]), math.Abs(sums[1]))
	for n, s := range sums {
		got := float64(red[n])
		if s < 0 {
			got = float64(blue[n])
			assert.Zero(t, red[n])
		} else {
			assert.Zero(t, blue[n])
		}
		assert.InDelta(t, math.Round(math.Abs(s)/scale*barHalfW), got, 1.5, "group %d", n)
	}
}

func TestExplainPNGHeatmaps(t *testing.T) {
	// node/test_maxpool_2d_precomputed_pads (ONNX backend test data 1.12.0):
	// x = 1..25 as [1,1,5,5], 5×5 max pool with pads 2: every output is a
	// window maximum, so the gradient of the top output is 1 at the
	// largest input pixel (x = 25 at row 4, column 4) and 0 elsewhere. The
	// scale s is then 1 (the ⌈0.99·25⌉ = 25th smallest |a|): that pixel is
	// pure red, every other pixel shows the grey input unchanged.
	rep, x, _ := explainCase(t, "node/test_maxpool_2d_precomputed_pads", gradattr.MethodGradient, nil)
	require.Len(t, x, 25)
	img := drawPNG(t, rep)
	l := layoutHeatmap(5, 5, 2, 0) // title and the output line (gradient: no completeness)
	assert.GreaterOrEqual(t, l.attr.Dx(), 256)
	lo, hi := minMax(x)
	for i, v := range x {
		p := l.attr.Min.Add(image.Pt((i%5)*l.scale+l.scale/2, (i/5)*l.scale+l.scale/2))
		g := greyWant(v, lo, hi)
		want := color.RGBA{g, g, g, 0xFF}
		if v == hi {
			want = wantRed
		}
		assert.Equal(t, want, img.RGBAAt(p.X, p.Y), "pixel %d (x=%v)", i, v)
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
	// Title, output line, completeness line (gradient × input reports it,
	// unjudged) and the channels note.
	l = layoutHeatmap(5, 5, 4, 0)
	mismatch := 0
	for i := range mean {
		p := l.attr.Min.Add(image.Pt((i%5)*l.scale+l.scale/2, (i/5)*l.scale+l.scale/2))
		want := blendWant(greyWant(mean[i], lo, hi), attr[i]/s)
		got := img.RGBAAt(p.X, p.Y)
		// float32 arithmetic in the model: allow one level of rounding.
		if d := maxChannelDiff(want, got); d > 1 {
			mismatch++
			t.Errorf("pixel %d: want %v, got %v", i, want, got)
		}
	}
	assert.Zero(t, mismatch)
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
