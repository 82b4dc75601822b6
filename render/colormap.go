package render

import (
	"fmt"
	"image/color"
	"math"
	"sort"
)

// PuOr is ColorBrewer's diverging PuOr scheme in its 9-class form (Harrower
// & Brewer 2003, "ColorBrewer.org: an online tool for selecting colour
// schemes for maps"; colour-blind safe and printable), from the orange end
// to the purple end:
//
//	#B35806 #E08214 #FDB863 #FEE0B6 #F7F7F7 #D8DAEB #B2ABD2 #8073AC #542788
//
// Positive attributions are orange, negative ones purple, in every chart,
// heatmap and terminal table.
var PuOr = [9]color.RGBA{
	{0xB3, 0x58, 0x06, 0xFF}, {0xE0, 0x82, 0x14, 0xFF}, {0xFD, 0xB8, 0x63, 0xFF},
	{0xFE, 0xE0, 0xB6, 0xFF}, {0xF7, 0xF7, 0xF7, 0xFF}, {0xD8, 0xDA, 0xEB, 0xFF},
	{0xB2, 0xAB, 0xD2, 0xFF}, {0x80, 0x73, 0xAC, 0xFF}, {0x54, 0x27, 0x88, 0xFF},
}

// The colours of the PNG output.
var (
	// colorPositive marks a positive attribution: PuOr's orange end.
	colorPositive = PuOr[0]
	// colorNegative marks a negative attribution: PuOr's purple end.
	colorNegative = PuOr[8]
	colorWhite    = color.RGBA{R: 0xFF, G: 0xFF, B: 0xFF, A: 0xFF}
	colorInk      = color.RGBA{R: 0x20, G: 0x20, B: 0x20, A: 0xFF}
	colorAxis     = color.RGBA{R: 0x60, G: 0x60, B: 0x60, A: 0xFF}
	colorGuide    = color.RGBA{R: 0xD8, G: 0xD8, B: 0xD8, A: 0xFF}
	colorFrame    = color.RGBA{R: 0xB0, G: 0xB0, B: 0xB0, A: 0xFF}
	colorMixed    = color.RGBA{R: 0x80, G: 0x80, B: 0x80, A: 0xFF}
)

// The terminal's colours for positive and negative bars: the ANSI
// 256-colour palette's nearest entries to PuOr's #E08214 (172, #D78700) and
// #8073AC (97, #875FAF), the scheme's second orange and second purple,
// legible on dark and light backgrounds alike.
const (
	termPositive = 172
	termNegative = 97
)

// heatScalePercentile is the percentile of |a| that maps to the ends of the
// colour map.
const heatScalePercentile = 99

// divergingT maps attribution a to the colour map's coordinate
//
//	t = clamp(a / s, −1, 1)
//
// where s > 0 is the scale (see heatScale).
func divergingT(a, s float64) float64 {
	return math.Max(-1, math.Min(1, a/s))
}

// puor is the continuous colour map: t = +1 is PuOr's orange end, t = 0
// its middle (#F7F7F7), t = −1 its purple end, and between classes it is
// linear in each sRGB channel: at position p = 4(1 − t) ∈ [0, 8] it mixes
// classes ⌊p⌋ and ⌈p⌉,
//
//	c = round((1 − f)·PuOr[⌊p⌋] + f·PuOr[⌊p⌋+1]),  f = p − ⌊p⌋.
func puor(t float64) color.RGBA {
	p := 4 * (1 - math.Max(-1, math.Min(1, t)))
	i := min(int(p), len(PuOr)-2)
	f := p - float64(i)
	a, b := PuOr[i], PuOr[i+1]
	mix := func(x, y uint8) uint8 { return uint8(math.Round((1-f)*float64(x) + f*float64(y))) }
	return color.RGBA{R: mix(a.R, b.R), G: mix(a.G, b.G), B: mix(a.B, b.B), A: 0xFF}
}

// The underlay of a heatmap is the input's grey lightened into
// [underlayDark, 255], so that the colours over its darkest pixels stay
// visible (the purple end over the darkest underlay is #321751).
const underlayDark = 0x99

// underlay is the lightened grey level of value v on an image whose values
// span [lo, hi]: round(underlayDark + (255 − underlayDark)·(v − lo)/(hi −
// lo)), the middle of the range when hi = lo.
func underlay(v, lo, hi float64) uint8 {
	f := 0.5
	if hi > lo {
		f = math.Max(0, math.Min(1, (v-lo)/(hi-lo)))
	}
	return uint8(math.Round(underlayDark + (255-underlayDark)*f))
}

// overlay draws colour map coordinate t over an underlay of grey level l:
// the colour of t multiplied by the grey, channel by channel,
//
//	c = round(puor(t) · l / 255)
//
// so that an attribution of zero shows the underlay as the map's middle
// (#F7F7F7) shows it, the same on the heatmap and on its colour bar, which
// is drawn over the same greys.
func overlay(l uint8, t float64) color.RGBA {
	c := puor(t)
	mul := func(x uint8) uint8 { return uint8(math.Round(float64(x) * float64(l) / 255)) }
	return color.RGBA{R: mul(c.R), G: mul(c.G), B: mul(c.B), A: 0xFF}
}

// grey returns the grey level of value v on an image whose values span
// [lo, hi]: round(255·(v − lo)/(hi − lo)), mid-grey 128 when hi = lo.
func grey(v, lo, hi float64) color.RGBA {
	g := uint8(128)
	if hi > lo {
		g = uint8(math.Round(255 * math.Max(0, math.Min(1, (v-lo)/(hi-lo)))))
	}
	return color.RGBA{R: g, G: g, B: g, A: 0xFF}
}

// heatScale is the scale s of the colour map: the 99th percentile of |a|
// by the nearest-rank method (the smallest |a_i| with at least 99% of the
// values at or below it: the ⌈0.99·n⌉-th smallest; Hyndman & Fan 1996,
// definition 1, from memory). Using a high percentile rather than the
// maximum keeps one extreme pixel from washing out the rest of the map; the
// 1% above s are drawn at full colour. When that percentile is 0 it falls
// back to max |a|, and to 1 when every attribution is 0.
func heatScale(a []float64) float64 {
	abs := make([]float64, len(a))
	top := 0.0
	for i, v := range a {
		abs[i] = math.Abs(v)
		top = math.Max(top, abs[i])
	}
	if len(abs) == 0 {
		return 1
	}
	sort.Float64s(abs)
	k := int(math.Ceil(heatScalePercentile / 100.0 * float64(len(abs))))
	s := abs[max(k, 1)-1]
	if s == 0 {
		s = top
	}
	if s == 0 {
		s = 1
	}
	return s
}

// checkFiniteValues reports the first NaN or infinity of v, naming it what.
func checkFiniteValues(what string, v []float64) error {
	for i, x := range v {
		if math.IsNaN(x) || math.IsInf(x, 0) {
			return fmt.Errorf("%s[%d] is %v, expected a finite number", what, i, x)
		}
	}
	return nil
}
