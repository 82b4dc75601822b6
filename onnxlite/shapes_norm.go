package onnxlite

import "slices"

// The shape rules of the normalization operators.

// addNormRules adds the rules of this file to shapeRules.
func addNormRules() {
	shapeRules["LayerNormalization"] = shapeRule{2, ruleLayerNorm}
	shapeRules["GroupNormalization"] = shapeRule{3, ruleGroupNorm}
	shapeRules["InstanceNormalization"] = shapeRule{3, ruleInstanceNorm}
}

// ruleLayerNorm: Y has X's shape; X is normalised over the axes from axis
// (default −1) to the last, Scale and B broadcast to those axes, and the
// optional Mean and InvStdDev outputs have X's shape with ones from axis
// on, of the stash_type's element type (FLOAT by default).
func ruleLayerNorm(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	r := len(x.Shape)
	ax, err := normAxis(c.n.AttrInt("axis", -1), r)
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	norm := x.Shape[ax:]
	for i, what := range []string{"scale", "B"} {
		if v := c.input(i + 1); v != nil {
			if v.DType != x.DType {
				return nil, c.errorf("%s is %v: expected %v like X", what, v.DType, x.DType)
			}
			if err := unidirectional(norm, v.Shape); err != nil {
				return nil, c.errorf("%s: %v (the normalized axes of X %v from axis %d)", what, err, x.Shape, ax)
			}
		}
	}
	stash := DataType(c.n.AttrInt("stash_type", int64(Float)))
	if stash != Float && stash != Double && stash != Float16 && stash != BFloat16 {
		return nil, c.errorf("stash_type %d: expected a floating-point element type", stash)
	}
	stats := slices.Clone(x.Shape)
	for i := ax; i < r; i++ {
		stats[i] = 1
	}
	return []ValueShape{{x.DType, slices.Clone(x.Shape)}, {stash, stats}, {stash, slices.Clone(stats)}}, nil
}

// ruleGroupNorm: Y has X's shape (N, C, …); C splits into num_groups groups.
// Scale and bias have one value per group before opset 21 and one per
// channel from it.
func ruleGroupNorm(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	if len(x.Shape) < 2 {
		return nil, c.errorf("expected X of rank ≥ 2 (N, C, …), got %v", x.Shape)
	}
	g := c.n.AttrInt("num_groups", 0)
	ch := x.Shape[1]
	if g < 1 || int64(ch)%g != 0 {
		return nil, c.errorf("num_groups %d: expected a divisor of the %d channels", g, ch)
	}
	per := int(g)
	if c.opset >= 21 {
		per = ch
	}
	for i, what := range []string{"scale", "bias"} {
		v := c.in[i+1]
		if !slices.Equal(v.Shape, []int{per}) {
			return nil, c.errorf("%s: expected shape [%d] at opset %d, got %v", what, per, c.opset, v.Shape)
		}
	}
	return []ValueShape{{x.DType, slices.Clone(x.Shape)}}, nil
}

// ruleInstanceNorm: Y has X's shape (N, C, …); scale and B have one value
// per channel.
func ruleInstanceNorm(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	if len(x.Shape) < 3 {
		return nil, c.errorf("expected X of rank ≥ 3 (N, C, spatial…), got %v", x.Shape)
	}
	for i, what := range []string{"scale", "B"} {
		if v := c.in[i+1]; !slices.Equal(v.Shape, []int{x.Shape[1]}) {
			return nil, c.errorf("%s: expected shape [%d], got %v", what, x.Shape[1], v.Shape)
		}
	}
	return []ValueShape{{x.DType, slices.Clone(x.Shape)}}, nil
}
