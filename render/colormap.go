package render

import (
	"fmt"
	"image/color"
	"math"
	"sort"
)

// The colours of the PNG output. Attributions use one diverging colour map,
// symmetric around zero, in the heatmaps and in the bar charts alike:
// positive attributions are red, negative ones blue.
var (
	// colorPositive is the colour of t = +1 (and of positive bars).
	colorPositive = color.RGBA{R: 0xC0, G: 0x1C, B: 0x28, A: 0xFF}
	// colorNegative is the colour of t = −1 (and of negative bars).
	colorNegative = color.RGBA{R: 0x1F, G: 0x5F, B: 0xB4, A: 0xFF}
	colorWhite    = color.RGBA{R: 0xFF, G: 0xFF, B: 0xFF, A: 0xFF}
	colorInk      = color.RGBA{R: 0x20, G: 0x20, B: 0x20, A: 0xFF}
	colorAxis     = color.RGBA{R: 0x80, G: 0x80, B: 0x80, A: 0xFF}
	colorFrame    = color.RGBA{R: 0xB0, G: 0xB0, B: 0xB0, A: 0xFF}
)

// The terminal's colours for positive and negative bars: the ANSI
// 256-colour palette's nearest entries to PuOr's #E08214 (172, #D78700) and
// #8073AC (97, #875FAF), the scheme's middle orange and purple, legible on
// dark and light backgrounds alike.
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

// overlay blends the colour map's end for the sign of t over base with
// opacity |t|, channel by channel:
//
//	c = round((1 − |t|)·base + |t|·end),  end = colorPositive if t > 0, colorNegative if t < 0
//
// so t = 0 leaves base unchanged (transparent), t = ±1 gives the pure end
// colour, and the map is symmetric around zero. Over white it is the colour
// bar; over the grey input it is the heatmap.
func overlay(base color.RGBA, t float64) color.RGBA {
	end := colorPositive
	if t < 0 {
		end = colorNegative
	}
	f := math.Min(math.Abs(t), 1)
	mix := func(b, e uint8) uint8 {
		return uint8(math.Round((1-f)*float64(b) + f*float64(e)))
	}
	return color.RGBA{R: mix(base.R, end.R), G: mix(base.G, end.G), B: mix(base.B, end.B), A: 0xFF}
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
