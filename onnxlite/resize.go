package onnxlite

import (
	"math"
	"slices"
)

// ResizeParams is the resolved geometry of a Resize or Upsample node: what
// each output coordinate reads, axis by axis (ONNX Resize-19 and earlier,
// Upsample-7 and -9).
type ResizeParams struct {
	// Shape is the output shape.
	Shape []int
	// Scale is, per axis, the scale of the coordinate transformation: the
	// scales input, or output length / input length for sizes, or the one
	// scale keep_aspect_ratio_policy chose; 1 for axes not resized.
	Scale []float64
	// Width is, per axis, the output length before rounding down (input
	// length × scale), which half_pixel_symmetric reads.
	Width []float64
	// RoiStart and RoiEnd are, per axis, the region tf_crop_and_resize
	// samples, in normalised input coordinates (0 and 1 by default).
	RoiStart, RoiEnd []float64
	// Mode is nearest, linear or cubic.
	Mode string
	// Coord is the coordinate_transformation_mode: half_pixel,
	// half_pixel_symmetric, pytorch_half_pixel, align_corners, asymmetric,
	// tf_half_pixel_for_nn (Resize-11), tf_crop_and_resize; asymmetric for
	// Resize-10 and Upsample.
	Coord string
	// Nearest is the nearest_mode: round_prefer_floor, round_prefer_ceil,
	// floor, ceil, or simple (Resize-10, Upsample: floor when upsampling an
	// axis, ceil when downsampling it).
	Nearest string
	// CubicA is cubic_coeff_a.
	CubicA float64
	// ExcludeOutside drops the taps outside the input and renormalises.
	ExcludeOutside bool
	// Extrapolation is the value of tf_crop_and_resize samples outside the
	// input.
	Extrapolation float64
	// Antialias stretches the linear and cubic filters by 1/scale on the
	// axes that are downsampled (Resize-18).
	Antialias bool
}

// addResizeRules adds the rules of this file to shapeRules.
func addResizeRules() {
	shapeRules["Resize"] = shapeRule{1, ruleResize}
	shapeRules["Upsample"] = shapeRule{1, ruleResize}
}

func ruleResize(c *nodeCtx) ([]ValueShape, error) {
	p, err := resizeParams(c)
	if err != nil {
		return nil, err
	}
	return []ValueShape{{c.in[0].DType, p.Shape}}, nil
}

// resizeParams reads the attributes and the roi, scales and sizes inputs of
// a Resize node (or the scales of an Upsample node) and computes the output
// shape: ⌊length × scale⌋ for scales (× (roi end − roi start) with
// tf_crop_and_resize), the sizes themselves, or with a
// keep_aspect_ratio_policy other than stretch round(length × s) with the one
// scale s = min or max of sizes/length over the resized axes (rounding
// halves up).
func resizeParams(c *nodeCtx) (ResizeParams, error) {
	xs := c.in[0].Shape
	r := len(xs)
	p := ResizeParams{
		Shape: slices.Clone(xs), Scale: slices.Repeat([]float64{1}, r), Width: make([]float64, r),
		RoiStart: make([]float64, r), RoiEnd: slices.Repeat([]float64{1}, r),
		Mode:           c.n.AttrString("mode", "nearest"),
		Coord:          c.n.AttrString("coordinate_transformation_mode", "half_pixel"),
		Nearest:        c.n.AttrString("nearest_mode", "round_prefer_floor"),
		CubicA:         float64(c.n.AttrFloat("cubic_coeff_a", -0.75)),
		ExcludeOutside: c.n.AttrInt("exclude_outside", 0) != 0,
		Extrapolation:  float64(c.n.AttrFloat("extrapolation_value", 0)),
		Antialias:      c.n.AttrInt("antialias", 0) != 0,
	}
	for i, d := range xs {
		p.Width[i] = float64(d)
	}
	legacy := c.n.OpType == "Upsample" || c.opset < 11
	if legacy {
		p.Coord, p.Nearest = "asymmetric", "simple"
	}
	switch p.Mode {
	case "nearest", "linear":
	case "bilinear":
		if c.n.OpType != "Upsample" {
			return p, c.errorf("mode %q: expected nearest, linear or cubic", p.Mode)
		}
		p.Mode = "linear" // Upsample-7's name for it
	case "cubic":
		if legacy {
			return p, c.errorf("mode %q: expected nearest or linear at opset %d", p.Mode, c.opset)
		}
	default:
		return p, c.errorf("mode %q: expected nearest, linear or cubic", p.Mode)
	}
	switch p.Coord {
	case "half_pixel", "pytorch_half_pixel", "align_corners", "asymmetric", "tf_crop_and_resize":
	case "tf_half_pixel_for_nn":
		if c.opset >= 13 {
			return p, c.errorf("coordinate_transformation_mode %q: removed in opset 13, the model's is %d", p.Coord, c.opset)
		}
	case "half_pixel_symmetric":
		if c.opset < 19 {
			return p, c.errorf("coordinate_transformation_mode %q: new in opset 19, the model's is %d", p.Coord, c.opset)
		}
	default:
		return p, c.errorf("coordinate_transformation_mode %q: expected half_pixel, half_pixel_symmetric, pytorch_half_pixel, align_corners, asymmetric or tf_crop_and_resize", p.Coord)
	}
	switch p.Nearest {
	case "round_prefer_floor", "round_prefer_ceil", "floor", "ceil", "simple":
	default:
		return p, c.errorf("nearest_mode %q: expected round_prefer_floor, round_prefer_ceil, floor or ceil", p.Nearest)
	}
	axes := make([]int, r)
	for i := range axes {
		axes[i] = i
	}
	if a := c.n.Attr("axes"); a != nil && c.opset >= 18 {
		axes = axes[:0]
		seen := make([]bool, r)
		for _, v := range a.Ints {
			ax, err := normAxis(v, r)
			if err != nil {
				return p, c.errorf("axes %v: %v", a.Ints, err)
			}
			if seen[ax] {
				return p, c.errorf("axes %v: axis %d repeats", a.Ints, v)
			}
			seen[ax] = true
			axes = append(axes, ax)
		}
	}
	scales, sizes, err := resizeInputs(c)
	if err != nil {
		return p, err
	}
	if p.Coord == "tf_crop_and_resize" {
		roi, ok, err := c.constFloats(1, "roi")
		if err != nil {
			return p, err
		}
		if !ok || len(roi) != 2*len(axes) {
			return p, c.errorf("roi %v: tf_crop_and_resize expects %d values (starts then ends)", roi, 2*len(axes))
		}
		for i, ax := range axes {
			p.RoiStart[ax], p.RoiEnd[ax] = roi[i], roi[len(axes)+i]
		}
	}
	switch {
	case len(scales) > 0 && len(sizes) > 0:
		return p, c.errorf("expected scales or sizes, got both")
	case len(scales) > 0:
		if len(scales) != len(axes) {
			return p, c.errorf("scales %v: expected %d values, one per resized axis", scales, len(axes))
		}
		for i, ax := range axes {
			s := scales[i]
			if !(s > 0) || math.IsInf(s, 0) {
				return p, c.errorf("scales %v: expected positive finite scales", scales)
			}
			w := float64(xs[ax]) * s
			if p.Coord == "tf_crop_and_resize" {
				w *= p.RoiEnd[ax] - p.RoiStart[ax]
			}
			if w > float64(DefaultLimits.MaxTensorElements) {
				return p, c.wrap(&LimitError{Limit: "MaxTensorElements", Value: int64(min(w, math.MaxInt64/2)), Max: DefaultLimits.MaxTensorElements})
			}
			p.Scale[ax], p.Width[ax], p.Shape[ax] = s, w, int(math.Floor(w))
		}
	case len(sizes) > 0:
		if len(sizes) != len(axes) {
			return p, c.errorf("sizes %v: expected %d values, one per resized axis", sizes, len(axes))
		}
		for _, v := range sizes {
			if v < 0 || v > DefaultLimits.MaxTensorElements {
				return p, c.errorf("sizes %v: expected non-negative sizes", sizes)
			}
		}
		policy := "stretch"
		if c.opset >= 18 {
			policy = c.n.AttrString("keep_aspect_ratio_policy", "stretch")
		}
		switch policy {
		case "stretch":
			for i, ax := range axes {
				p.Shape[ax] = int(sizes[i])
				p.Width[ax] = float64(sizes[i])
				if xs[ax] > 0 {
					p.Scale[ax] = float64(sizes[i]) / float64(xs[ax])
				}
			}
		case "not_larger", "not_smaller":
			k := math.NaN()
			for i, ax := range axes {
				s := float64(sizes[i]) / float64(xs[ax])
				if math.IsNaN(k) || (policy == "not_larger") == (s < k) {
					k = s
				}
			}
			for _, ax := range axes {
				w := k * float64(xs[ax])
				p.Scale[ax], p.Width[ax], p.Shape[ax] = k, w, int(math.Floor(w+0.5))
			}
		default:
			return p, c.errorf("keep_aspect_ratio_policy %q: expected stretch, not_larger or not_smaller", policy)
		}
	default:
		return p, c.errorf("expected scales or sizes, got neither")
	}
	return p, nil
}

// resizeInputs reads the scales (Upsample's attribute at opset 7, input 1
// of Upsample-9 and Resize-10, input 2 from Resize-11) and the sizes
// (input 3 from Resize-11); an absent or empty one is nil.
func resizeInputs(c *nodeCtx) (scales []float64, sizes []int64, err error) {
	switch {
	case c.n.OpType == "Upsample" && c.opset < 9:
		for _, v := range c.n.AttrFloats("scales", nil) {
			scales = append(scales, float64(v))
		}
		return scales, nil, nil
	case c.n.OpType == "Upsample" || c.opset < 11:
		scales, _, err = c.constFloats(1, "scales")
		return scales, nil, err
	}
	if scales, _, err = c.constFloats(2, "scales"); err != nil {
		return nil, nil, err
	}
	sizes, _, err = c.constInts(3, "sizes")
	return scales, sizes, err
}

// constFloats returns the elements of constant input i as float64; ok is
// false when the input is omitted.
func (c *nodeCtx) constFloats(i int, what string) (vals []float64, ok bool, err error) {
	t, ok, err := c.constInput(i, what)
	if t == nil {
		return nil, ok, err
	}
	v, err := t.Float64s()
	if err != nil {
		return nil, true, c.errorf("%s (input %d): %v", what, i, err)
	}
	return v, true, nil
}
