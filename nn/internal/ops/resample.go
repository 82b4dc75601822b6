package ops

import (
	"fmt"
	"math"

	G "gorgonia.org/gorgonia"
)

// ResampleAxis is the geometry of one axis of a Resize: its input and
// output lengths, the scale of the coordinate transformation, the output
// length before rounding (Width) and the region of interest of
// tf_crop_and_resize.
type ResampleAxis struct {
	In, Out          int
	Scale, Width     float64
	RoiStart, RoiEnd float64
}

// ResampleSpec is an ONNX Resize (or Upsample) with its geometry resolved:
// the modes as the operator's attributes name them (see onnxlite's
// ResizeParams) and one ResampleAxis per axis of the input.
type ResampleSpec struct {
	Mode, Coord, Nearest string
	CubicA               float64
	ExcludeOutside       bool
	Extrapolation        float64
	Antialias            bool
	Axes                 []ResampleAxis
}

// tap is one input element of an output coordinate and its weight.
type tap struct {
	i int
	w float64
}

// Resample resizes x as ONNX Resize-19 (and its earlier revisions, and
// Upsample) does: every output element is a weighted sum of input elements,
// axis by axis (separable), with the coordinate transformation of
// spec.Coord mapping output coordinate x_r to x_o in the input:
//
//	half_pixel            x_o = (x_r + 0.5)/s − 0.5
//	half_pixel_symmetric  x_o = c(1 − a) + (x_r + 0.5)/s − 0.5,  c = in/2, a = out/w
//	pytorch_half_pixel    x_o = (x_r + 0.5)/s − 0.5, or 0 when out = 1
//	align_corners         x_o = x_r·(in − 1)/(w − 1), or 0 when w = 1
//	asymmetric            x_o = x_r/s
//	tf_half_pixel_for_nn  x_o = (x_r + 0.5)/s
//	tf_crop_and_resize    x_o = start·(in − 1) + x_r·(end − start)·(in − 1)/(w − 1)
//
// with w the output length before rounding (Width: in·s for scales, which
// may be fractional; the ONNX reference implementation reads it so), and
// the interpolation of spec.Mode: nearest (nearest_mode rounding,
// clamped to the input), linear (x_o clamped to [0, in − 1]), cubic (Keys
// 1981, eq. 4, with a = CubicA; taps outside the input read the edge, or
// with ExcludeOutside are dropped and the weights renormalised). With
// Antialias, linear and cubic filters are stretched by 1/s on downsampled
// axes and normalised over their support, outside taps reading the edge
// (what ONNX Runtime does; the specification does not say). A
// tf_crop_and_resize sample outside [0, in − 1] is spec.Extrapolation. The
// gradient is the transposed map.
func Resample(x *G.Node, spec ResampleSpec) (*G.Node, error) {
	in := []int(x.Shape())
	if len(spec.Axes) != len(in) {
		return nil, fmt.Errorf("nn: Resize: %w: expected %d axes, got %d", ErrShape, len(in), len(spec.Axes))
	}
	taps := make([][][]tap, len(in))
	out := make([]int, len(in))
	from := len(in)
	for a, ax := range spec.Axes {
		if ax.In != in[a] || ax.Out < 0 {
			return nil, fmt.Errorf("nn: Resize: %w: axis %d: input length %d, geometry for %d", ErrShape, a, in[a], ax.In)
		}
		out[a] = ax.Out
		t, err := spec.axisTaps(ax)
		if err != nil {
			return nil, err
		}
		taps[a] = t
		if from == len(in) && !identityTaps(t, ax.In) {
			from = a
		}
	}
	if shapeSize(out) > maxElems {
		return nil, fmt.Errorf("nn: Resize: %w", errTooLarge)
	}
	m := newIndexMap("Resize", in, out, from)
	ist := strides(in[from:])
	oshape := out[from:]
	n := shapeSize(oshape)
	idx := make([]int, len(oshape))
	weighted := spec.Mode != "nearest"
	for k := 0; k < n; k++ {
		m.rows = append(m.rows, int32(len(m.cols)))
		outside := false
		for a, c := range idx {
			outside = outside || len(taps[from+a][c]) == 0
		}
		if !outside {
			m.appendProduct(taps[from:], idx, ist, weighted)
		}
		for a := len(idx) - 1; a >= 0; a-- {
			if idx[a]++; idx[a] < oshape[a] {
				break
			}
			idx[a] = 0
		}
	}
	m.rows = append(m.rows, int32(len(m.cols)))
	m.fill = spec.Extrapolation
	if len(m.cols) > maxElems {
		return nil, fmt.Errorf("nn: Resize: %w", errTooLarge)
	}
	return applyIndexMap(x, m)
}

// appendProduct appends the taps of the output element at idx: the product
// over the axes of each axis's taps.
func (m *indexMap) appendProduct(taps [][][]tap, idx, ist []int, weighted bool) {
	var rec func(a, off int, w float64)
	rec = func(a, off int, w float64) {
		if a == len(idx) {
			m.cols = append(m.cols, int32(off))
			if weighted {
				m.w = append(m.w, w)
			}
			return
		}
		for _, t := range taps[a][idx[a]] {
			rec(a+1, off+t.i*ist[a], w*t.w)
		}
	}
	rec(0, 0, 1)
}

// identityTaps reports whether taps reads each of n inputs in order, alone
// and with weight 1.
func identityTaps(taps [][]tap, n int) bool {
	if len(taps) != n {
		return false
	}
	for i, t := range taps {
		if len(t) != 1 || t[0].i != i || t[0].w != 1 {
			return false
		}
	}
	return true
}

// coord maps output coordinate xr of axis ax to the input.
func (s *ResampleSpec) coord(ax ResampleAxis, xr int) float64 {
	x, sc := float64(xr), ax.Scale
	in, out := float64(ax.In), float64(ax.Out)
	switch s.Coord {
	case "half_pixel_symmetric":
		adj := out / ax.Width
		c := in / 2
		return c*(1-adj) + (x+0.5)/sc - 0.5
	case "pytorch_half_pixel":
		if ax.Out <= 1 {
			return 0
		}
		return (x+0.5)/sc - 0.5
	case "align_corners":
		// The output length as a real number: with scales it may be
		// fractional (Resize-19: output_width).
		if ax.Width == 1 {
			return 0
		}
		return x * (in - 1) / (ax.Width - 1)
	case "asymmetric":
		return x / sc
	case "tf_half_pixel_for_nn":
		return (x + 0.5) / sc
	case "tf_crop_and_resize":
		if ax.Width == 1 {
			return 0.5 * (ax.RoiStart + ax.RoiEnd) * (in - 1)
		}
		return ax.RoiStart*(in-1) + x*(ax.RoiEnd-ax.RoiStart)*(in-1)/(ax.Width-1)
	}
	return (x+0.5)/sc - 0.5 // half_pixel
}

// nearest rounds x to an input index by s.Nearest.
func (s *ResampleSpec) nearest(x, scale float64) int {
	switch s.Nearest {
	case "round_prefer_ceil":
		return int(math.Floor(x + 0.5))
	case "floor":
		return int(math.Floor(x))
	case "ceil":
		return int(math.Ceil(x))
	case "simple": // Resize-10 and Upsample
		if scale < 1 {
			return int(math.Ceil(x))
		}
		return int(math.Floor(x))
	}
	// round_prefer_floor: halves go down.
	return int(math.Ceil(x - 0.5))
}

// cubic is the cubic convolution kernel of Keys 1981, eq. 4, with
// coefficient a: (a+2)|t|³ − (a+3)|t|² + 1 on |t| ≤ 1, a|t|³ − 5a|t|² + 8a|t| − 4a
// on 1 < |t| < 2, 0 beyond.
func cubic(t, a float64) float64 {
	t = math.Abs(t)
	switch {
	case t <= 1:
		return ((a+2)*t-(a+3))*t*t + 1
	case t < 2:
		return ((a*t-5*a)*t+8*a)*t - 4*a
	}
	return 0
}

// axisTaps returns, for each output coordinate of ax, the input
// coordinates it reads with their weights (none: outside the input, the
// extrapolation value).
func (s *ResampleSpec) axisTaps(ax ResampleAxis) ([][]tap, error) {
	if ax.In < 1 && ax.Out > 0 {
		return nil, fmt.Errorf("nn: Resize: %w: an empty axis cannot be resized to %d", ErrShape, ax.Out)
	}
	last := ax.In - 1
	clampI := func(i int) int { return min(max(i, 0), last) }
	out := make([][]tap, ax.Out)
	for xr := range out {
		x := s.coord(ax, xr)
		if s.Coord == "tf_crop_and_resize" && (x < 0 || x > float64(last)) {
			continue
		}
		if ax.Out == ax.In && ax.Scale == 1 && s.Coord != "tf_crop_and_resize" {
			out[xr] = []tap{{xr, 1}} // not resized
			continue
		}
		switch {
		case s.Mode == "nearest":
			out[xr] = []tap{{clampI(s.nearest(x, ax.Scale)), 1}}
		case s.Antialias && ax.Scale < 1:
			out[xr] = s.stretched(x, ax, clampI)
		case s.Mode == "linear":
			x = min(max(x, 0), float64(last))
			i0 := int(math.Floor(x))
			w := x - float64(i0)
			i1 := min(i0+1, last)
			if i1 == i0 || w == 0 {
				out[xr] = []tap{{i0, 1}}
			} else {
				out[xr] = []tap{{i0, 1 - w}, {i1, w}}
			}
		default: // cubic
			i0 := int(math.Floor(x))
			t := x - float64(i0)
			var ts []tap
			sum := 0.0
			for k := -1; k <= 2; k++ {
				w := cubic(t-float64(k), s.CubicA)
				i := i0 + k
				if i < 0 || i > last {
					if s.ExcludeOutside {
						continue
					}
					i = clampI(i)
				}
				ts = append(ts, tap{i, w})
				sum += w
			}
			if s.ExcludeOutside && sum != 0 {
				for i := range ts {
					ts[i].w /= sum
				}
			}
			out[xr] = ts
		}
	}
	return out, nil
}

// stretched returns the taps of an antialiased linear or cubic filter at x
// on a downsampled axis: the kernel stretched by 1/scale, normalised over
// its support, taps outside the input reading the edge.
func (s *ResampleSpec) stretched(x float64, ax ResampleAxis, clampI func(int) int) []tap {
	support := 1 / ax.Scale
	kernel := func(d float64) float64 { return math.Max(0, 1-math.Abs(d)) }
	if s.Mode == "cubic" {
		support *= 2
		kernel = func(d float64) float64 { return cubic(d, s.CubicA) }
	}
	lo, hi := int(math.Floor(x-support)), int(math.Ceil(x+support))
	var ts []tap
	sum := 0.0
	for i := lo; i <= hi; i++ {
		w := kernel((float64(i) - x) * ax.Scale)
		if w == 0 || (s.ExcludeOutside && (i < 0 || i > ax.In-1)) {
			continue
		}
		ts = append(ts, tap{clampI(i), w})
		sum += w
	}
	for i := range ts {
		ts[i].w /= sum
	}
	return ts
}
