package main

import (
	"fmt"

	"github.com/apportion/apportion/onnxlite"
)

// newOpCases covers the operators that small dense and convolutional nets
// use and apportion does not run yet, at their newest revision and at every
// revision from 18 on that changed them.
func newOpCases() []*kase {
	var cs []*kase
	add := func(c *kase) { cs = append(cs, c) }

	// LayerNormalization-17 (unrevised since).
	c := newCase("layer_norm_opset17", 17, newOp, "LayerNormalization-17", "axis -1 (default) over 8 features, scale and bias, epsilon 1e-5", "LayerNormalization")
	c.op("LayerNormalization", "y", []string{c.floatIn("x", 2, 3, 8), c.randInit("scale", 0.5, 1.5, 8), c.randInit("b", -0.5, 0.5, 8)})
	c.out(f32, "y")
	add(c)

	c = newCase("layer_norm_axis1_stats_opset17", 17, newOp, "LayerNormalization-17",
		"axis 1: normalised over the last two axes (3x4), scale without bias, and the optional Mean and InvStdDev outputs (shape 2x1x1)", "LayerNormalization")
	c.node("LayerNormalization", []string{c.floatIn("x", 2, 3, 4), c.randInit("scale", 0.5, 1.5, 3, 4)}, []string{"y", "mean", "inv_std_dev"}, attrInt("axis", 1))
	c.out(f32, "y", "mean", "inv_std_dev")
	add(c)

	c = newCase("layer_norm_opset26", 26, newOp, "LayerNormalization-17", "declared at 26: axis -2, epsilon 1e-3, scale and bias 4x3", "LayerNormalization")
	c.op("LayerNormalization", "y", []string{c.floatIn("x", 2, 4, 3), c.randInit("scale", 0.5, 1.5, 4, 3), c.randInit("b", -0.5, 0.5, 4, 3)},
		attrInt("axis", -2), attrFloat("epsilon", 1e-3))
	c.out(f32, "y")
	add(c)

	// Gelu-20.
	for _, approx := range []string{"none", "tanh"} {
		c = newCase("gelu_"+map[string]string{"none": "exact", "tanh": "tanh"}[approx]+"_opset20", 20, newOp, "Gelu-20",
			"approximate \""+approx+"\" on inputs in [-4, 4]", "Gelu")
		var attrs []*onnxlite.Attribute
		if approx == "tanh" {
			attrs = append(attrs, attrString("approximate", approx))
		}
		c.op("Gelu", "y", []string{c.floatInRange("x", -4, 4, 3, 8)}, attrs...)
		c.out(f32, "y")
		add(c)
	}

	// GroupNormalization-18 (scale and bias per group; deprecated) and -21
	// (per channel, stash_type).
	c = newCase("group_norm_opset18", 18, semantic, "GroupNormalization-18",
		"num_groups 3 over 6 channels, scale and bias of shape (3): one per group (the GroupNormalization-18 semantics)", "GroupNormalization")
	c.op("GroupNormalization", "y", []string{c.floatIn("x", 2, 6, 3, 3), c.randInit("scale", 0.5, 1.5, 3), c.randInit("b", -0.5, 0.5, 3)}, attrInt("num_groups", 3))
	c.out(f32, "y")
	add(c)

	c = newCase("group_norm_opset21", 21, semantic, "GroupNormalization-21",
		"num_groups 3 over 6 channels, scale and bias of shape (6): one per channel (the GroupNormalization-21 semantics), epsilon 1e-3", "GroupNormalization")
	c.op("GroupNormalization", "y", []string{c.floatIn("x", 2, 6, 3, 3), c.randInit("scale", 0.5, 1.5, 6), c.randInit("b", -0.5, 0.5, 6)},
		attrInt("num_groups", 3), attrFloat("epsilon", 1e-3))
	c.out(f32, "y")
	add(c)

	c = newCase("group_norm_one_group_opset21", 21, semantic, "GroupNormalization-21", "num_groups 1: statistics over all of C, H, W", "GroupNormalization")
	c.op("GroupNormalization", "y", []string{c.floatIn("x", 2, 4, 3, 2), c.randInit("scale", 0.5, 1.5, 4), c.randInit("b", -0.5, 0.5, 4)}, attrInt("num_groups", 1))
	c.out(f32, "y")
	add(c)

	// Where with Equal (19), Less and Greater (13) masks.
	c = newCase("where_equal_opset19", 19, newOp, "Where-16, Equal-19",
		"y = Where(Equal(x, 0.5), a, 2x); x drawn from the multiples of 0.5 in [-2, 2], so about one in nine entries equals 0.5 exactly", "Where", "Equal", "Mul")
	x := c.in("x", f32, []int64{3, 6}, c.grid(18, 0.5, -2, 2))
	c.op("Where", "y", []string{c.op("Equal", "mask", []string{x, c.scalar("half", 0.5)}), c.randInit("a", -1, 1, 3, 6), c.op("Mul", "x2", []string{x, c.scalar("two", 2)})})
	c.out(f32, "y")
	add(c)

	c = newCase("where_less_opset16", 16, newOp, "Where-16, Less-13", "y = Where(Less(a, b), a, b), the elementwise minimum", "Where", "Less")
	a, b := c.floatIn("a", 2, 3, 4), c.floatIn("b", 2, 3, 4)
	c.op("Where", "y", []string{c.op("Less", "mask", []string{a, b}), a, b})
	c.out(f32, "y")
	add(c)

	c = newCase("where_greater_opset16", 16, newOp, "Where-16, Greater-13", "y = Where(Greater(x, 0), x, 0.1x) with a scalar threshold; inputs away from 0", "Where", "Greater", "Mul")
	x = c.in("x", f32, []int64{3, 5}, avoid(c.uniform(15, -2, 2), 0.05, 0))
	c.op("Where", "y", []string{c.op("Greater", "mask", []string{x, c.scalar("zero", 0)}), x, c.op("Mul", "leak", []string{x, c.scalar("slope", 0.1)})})
	c.out(f32, "y")
	add(c)

	c = newCase("where_broadcast_opset16", 16, newOp, "Where-16, Less-13",
		"condition Less(x (2x3x4), t (4)), X of shape 3x1 and a scalar Y: all three broadcast to 2x3x4", "Where", "Less")
	c.op("Where", "y", []string{c.op("Less", "mask", []string{c.floatIn("x", 2, 3, 4), c.randInit("t", -1, 1, 4)}), c.floatIn("a", 3, 1), c.scalar("fill", -0.75)})
	c.out(f32, "y")
	add(c)

	// Expand-13, Tile-13.
	c = newCase("expand_opset13", 13, newOp, "Expand-13", "3x1 expanded to shape [2, 3, 4]", "Expand")
	c.op("Expand", "y", []string{c.floatIn("x", 3, 1), c.ints("shape", 2, 3, 4)})
	c.out(f32, "y")
	add(c)

	c = newCase("expand_smaller_shape_opset13", 13, newOp, "Expand-13", "2x1x3 with shape [4, 1]: the shape has lower rank and a 1 that keeps the input's 3, giving 2x4x3", "Expand")
	c.op("Expand", "y", []string{c.floatIn("x", 2, 1, 3), c.ints("shape", 4, 1)})
	c.out(f32, "y")
	add(c)

	c = newCase("tile_opset13", 13, newOp, "Tile-13", "2x3 tiled by repeats [2, 3]", "Tile")
	c.op("Tile", "y", []string{c.floatIn("x", 2, 3), c.ints("repeats", 2, 3)})
	c.out(f32, "y")
	add(c)

	// Variadic Min, Max, Sum, Mean (13).
	for _, op := range []string{"Min", "Max", "Sum", "Mean"} {
		c = newCase(map[string]string{"Min": "min", "Max": "max", "Sum": "sum", "Mean": "mean"}[op]+"_variadic_opset13", 13, newOp, op+"-13",
			"three inputs broadcast together: 2x3x4, 3x1 and 4", op)
		c.op(op, "y", []string{c.floatIn("a", 2, 3, 4), c.floatIn("b", 3, 1), c.floatIn("c", 4)})
		c.out(f32, "y")
		add(c)
	}

	unary := func(name string, opset int64, rev, op, checks string, gen func(c *kase) []float32) {
		c := newCase(name, opset, newOp, rev, checks, op)
		x := gen(c)
		c.op(op, "y", []string{c.in("x", f32, []int64{4, int64(len(x)) / 4}, x)})
		c.out(f32, "y")
		add(c)
	}
	unary("reciprocal_opset13", 13, "Reciprocal-13", "Reciprocal", "inputs with |x| in [0.25, 4], both signs", func(c *kase) []float32 {
		x := c.uniform(24, 0.25, 4)
		for i := 1; i < len(x); i += 2 {
			x[i] = -x[i]
		}
		return x
	})
	unary("sign_opset13", 13, "Sign-13", "Sign", "inputs drawn from the multiples of 0.5 in [-2, 2]: exact zeros included deliberately (Sign(0) = 0)",
		func(c *kase) []float32 { return c.grid(24, 0.5, -2, 2) })
	unary("floor_opset13", 13, "Floor-13", "Floor", "inputs drawn from the multiples of 0.25 in [-3, 3]: exact integers and halves included deliberately",
		func(c *kase) []float32 { return c.grid(24, 0.25, -3, 3) })
	unary("ceil_opset13", 13, "Ceil-13", "Ceil", "inputs drawn from the multiples of 0.25 in [-3, 3]: exact integers and halves included deliberately",
		func(c *kase) []float32 { return c.grid(24, 0.25, -3, 3) })
	unary("mish_opset18", 18, "Mish-18", "Mish", "inputs in [-5, 5]", func(c *kase) []float32 { return c.uniform(24, -5, 5) })

	// The Reduce family with axes as an input (18); ReduceMax and ReduceMin
	// revised again at 20 (bool).
	reduce := func(name string, opset int64, rev, op, checks string, lo, hi float64, axes []int64, attrs ...*onnxlite.Attribute) {
		c := newCase(name, opset, newOp, rev, checks, op)
		ins := []string{c.floatInRange("x", lo, hi, 2, 3, 4)}
		if axes != nil {
			ins = append(ins, c.ints("axes", axes...))
		}
		c.op(op, "y", ins, attrs...)
		c.out(f32, "y")
		add(c)
	}
	reduce("reduce_max_axes_opset18", 18, "ReduceMax-18", "ReduceMax", "axes input [1], keepdims 1", -2, 2, []int64{1})
	reduce("reduce_max_opset20", 20, "ReduceMax-20", "ReduceMax", "newest revision (adds bool): axes [-1, -2], keepdims 0", -2, 2, []int64{-1, -2}, attrInt("keepdims", 0))
	reduce("reduce_min_axes_opset18", 18, "ReduceMin-18", "ReduceMin", "axes input [1], keepdims 1", -2, 2, []int64{1})
	reduce("reduce_min_opset20", 20, "ReduceMin-20", "ReduceMin", "newest revision (adds bool): axes [0, 2], keepdims 0", -2, 2, []int64{0, 2}, attrInt("keepdims", 0))
	reduce("reduce_min_no_axes_opset20", 20, "ReduceMin-20", "ReduceMin", "axes omitted: over all axes, keepdims 1", -2, 2, nil)
	reduce("reduce_l2_axes_opset18", 18, "ReduceL2-18", "ReduceL2", "axes input [2], keepdims 1", -2, 2, []int64{2})
	reduce("reduce_l2_no_axes_opset18", 18, "ReduceL2-18", "ReduceL2", "axes omitted, keepdims 0: a scalar", -2, 2, nil, attrInt("keepdims", 0))
	reduce("reduce_log_sum_exp_axes_opset18", 18, "ReduceLogSumExp-18", "ReduceLogSumExp", "axes input [1], keepdims 0", -2, 2, []int64{1}, attrInt("keepdims", 0))
	reduce("reduce_log_sum_exp_large_opset18", 18, "ReduceLogSumExp-18", "ReduceLogSumExp",
		"inputs in [80, 100], where exp overflows float32: the result is finite only if computed relative to the maximum; axes [-1]", 80, 100, []int64{-1})
	reduce("reduce_log_sum_exp_noop_opset18", 18, "ReduceLogSumExp-18", "ReduceLogSumExp", "axes omitted, noop_with_empty_axes 1: identity", -2, 2, nil, attrInt("noop_with_empty_axes", 1))

	cs = append(cs, resizeCases()...)
	cs = append(cs, gatherCases()...)
	return cs
}

// resizeCases covers Resize-18 (antialias, axes, keep_aspect_ratio_policy)
// and Resize-19 (half_pixel_symmetric) on 2-D images, nearest with each
// rounding mode and each coordinate transformation, and linear; and the
// Upsample operator that Resize replaced.
func resizeCases() []*kase {
	var cs []*kase
	type input struct {
		scales []float32
		sizes  []int64
		roi    []float32
	}
	resize := func(name string, opset int64, checks string, dims []int64, in input, attrs ...*onnxlite.Attribute) {
		c := newCase(name, opset, semantic, fmt.Sprintf("Resize-%d", opset), checks, "Resize")
		ins := []string{c.floatIn("x", dims...), "", "", ""}
		if in.roi != nil {
			ins[1] = c.floats("roi", []int64{int64(len(in.roi))}, in.roi...)
		}
		if in.scales != nil {
			ins[2] = c.floats("scales", []int64{int64(len(in.scales))}, in.scales...)
			ins = ins[:3]
		} else {
			ins[3] = c.ints("sizes", in.sizes...)
		}
		c.op("Resize", "y", ins, attrs...)
		c.out(f32, "y")
		cs = append(cs, c)
	}
	mode := func(m string) *onnxlite.Attribute { return attrString("mode", m) }
	ctm := func(m string) *onnxlite.Attribute { return attrString("coordinate_transformation_mode", m) }
	nearest := func(m string) *onnxlite.Attribute { return attrString("nearest_mode", m) }

	up2 := input{scales: []float32{1, 1, 2, 2}}
	for _, nm := range []string{"floor", "round_prefer_floor", "round_prefer_ceil", "ceil"} {
		resize("resize_nearest_asymmetric_"+nm+"_opset19", 19,
			"nearest, asymmetric, nearest_mode "+nm+", scales 2: x_original = x/2 hits every tie 0.5, 1.5, ...", []int64{1, 2, 3, 4}, up2,
			mode("nearest"), ctm("asymmetric"), nearest(nm))
	}
	down2 := input{scales: []float32{1, 1, 0.5, 0.5}}
	for _, nm := range []string{"round_prefer_floor", "round_prefer_ceil"} {
		resize("resize_nearest_half_pixel_down_"+nm+"_opset19", 19,
			"nearest, half_pixel, nearest_mode "+nm+", scales 0.5: x_original = 2x + 0.5, a tie at every output", []int64{1, 1, 6, 8}, down2,
			mode("nearest"), ctm("half_pixel"), nearest(nm))
	}
	resize("resize_nearest_align_corners_opset19", 19, "nearest, align_corners, round_prefer_ceil, sizes 4x4 -> 7x7: x_original = x/2, ties at odd x",
		[]int64{1, 1, 4, 4}, input{sizes: []int64{1, 1, 7, 7}}, mode("nearest"), ctm("align_corners"), nearest("round_prefer_ceil"))
	resize("resize_nearest_pytorch_half_pixel_opset19", 19, "nearest, pytorch_half_pixel, floor, sizes 4x4 -> 6x1: the width of 1 takes x_original = 0",
		[]int64{1, 1, 4, 4}, input{sizes: []int64{1, 1, 6, 1}}, mode("nearest"), ctm("pytorch_half_pixel"), nearest("floor"))
	resize("resize_nearest_half_pixel_symmetric_opset19", 19,
		"nearest, half_pixel_symmetric (new in Resize-19), scales 1.5 on 5x5: output 7x7 (floor of 7.5), so the adjustment 7/7.5 shifts the grid",
		[]int64{1, 1, 5, 5}, input{scales: []float32{1, 1, 1.5, 1.5}}, mode("nearest"), ctm("half_pixel_symmetric"))
	resize("resize_linear_half_pixel_opset19", 19, "linear (bilinear), half_pixel (default), scales 2", []int64{1, 2, 3, 4}, up2, mode("linear"))
	resize("resize_linear_align_corners_opset19", 19, "linear, align_corners, sizes 3x4 -> 5x7", []int64{1, 2, 3, 4}, input{sizes: []int64{1, 2, 5, 7}},
		mode("linear"), ctm("align_corners"))
	resize("resize_linear_asymmetric_opset19", 19, "linear, asymmetric, scales [1.5, 2.5]: output 4x10", []int64{1, 1, 3, 4}, input{scales: []float32{1, 1, 1.5, 2.5}},
		mode("linear"), ctm("asymmetric"))
	resize("resize_linear_pytorch_half_pixel_opset19", 19, "linear, pytorch_half_pixel, sizes 3x4 -> 1x6: the height of 1 samples x_original = 0",
		[]int64{1, 2, 3, 4}, input{sizes: []int64{1, 2, 1, 6}}, mode("linear"), ctm("pytorch_half_pixel"))
	resize("resize_linear_half_pixel_symmetric_opset19", 19, "linear, half_pixel_symmetric, scales 1.5 on 5x5 (output 7x7)",
		[]int64{1, 1, 5, 5}, input{scales: []float32{1, 1, 1.5, 1.5}}, mode("linear"), ctm("half_pixel_symmetric"))
	resize("resize_linear_down_opset19", 19, "linear, half_pixel, scales 0.5 without antialiasing: 8x8 -> 4x4", []int64{1, 1, 8, 8}, down2, mode("linear"))
	resize("resize_linear_tf_crop_and_resize_opset19", 19,
		"linear, tf_crop_and_resize, roi [0, 0, 0.2, -0.1, 1, 1, 0.9, 1.2], sizes 4x5 -> 3x4, extrapolation_value 10 for samples outside the input",
		[]int64{1, 1, 4, 5}, input{sizes: []int64{1, 1, 3, 4}, roi: []float32{0, 0, 0.2, -0.1, 1, 1, 0.9, 1.2}},
		mode("linear"), ctm("tf_crop_and_resize"), attrFloat("extrapolation_value", 10))
	resize("resize_linear_antialias_down_opset18", 18, "linear, antialias 1 (new in Resize-18), scales 0.5: 8x8 -> 4x4 with the stretched filter",
		[]int64{1, 1, 8, 8}, down2, mode("linear"), attrInt("antialias", 1))
	resize("resize_nearest_axes_opset18", 18, "axes [2, 3] (new in Resize-18) with scales [2, 3] of length 2; nearest, asymmetric, floor",
		[]int64{1, 2, 3, 4}, input{scales: []float32{2, 3}}, attrInts("axes", 2, 3), ctm("asymmetric"), nearest("floor"))
	resize("resize_linear_axes_sizes_opset18", 18, "axes [-1, -2] (reversed order) with sizes [6, 5]: width 6, height 5; linear",
		[]int64{1, 2, 3, 4}, input{sizes: []int64{6, 5}}, attrInts("axes", -1, -2), mode("linear"))
	resize("resize_nearest_not_larger_opset18", 18,
		"keep_aspect_ratio_policy not_larger (new in Resize-18) with axes [2, 3], sizes [7, 7] on 4x6: scale min(7/4, 7/6), output 5x7",
		[]int64{1, 1, 4, 6}, input{sizes: []int64{7, 7}}, attrInts("axes", 2, 3), attrString("keep_aspect_ratio_policy", "not_larger"))
	resize("resize_nearest_not_smaller_opset18", 18,
		"keep_aspect_ratio_policy not_smaller with axes [2, 3], sizes [7, 7] on 4x6: scale 7/4, width 6 x 1.75 = 10.5 rounds half up to 11, output 7x11",
		[]int64{1, 1, 4, 6}, input{sizes: []int64{7, 7}}, attrInts("axes", 2, 3), attrString("keep_aspect_ratio_policy", "not_smaller"))

	// Upsample (deprecated at 10): scales as an attribute at 7, an input at 9.
	c := newCase("upsample_nearest_opset7", 7, newOp, "Upsample-7", "nearest, scales attribute [1, 1, 2, 3]", "Upsample")
	c.op("Upsample", "y", []string{c.floatIn("x", 1, 2, 2, 3)}, attrFloats("scales", 1, 1, 2, 3))
	c.out(f32, "y")
	cs = append(cs, c)
	c = newCase("upsample_nearest_opset9", 9, newOp, "Upsample-9", "nearest, scales input [1, 1, 2, 3]", "Upsample")
	c.op("Upsample", "y", []string{c.floatIn("x", 1, 2, 2, 3), c.floats("scales", []int64{4}, 1, 1, 2, 3)})
	c.out(f32, "y")
	cs = append(cs, c)
	c = newCase("upsample_linear_opset9", 9, newOp, "Upsample-9", "linear, scales input [1, 1, 2, 2]", "Upsample")
	c.op("Upsample", "y", []string{c.floatIn("x", 1, 2, 3, 3), c.floats("scales", []int64{4}, 1, 1, 2, 2)}, attrString("mode", "linear"))
	c.out(f32, "y")
	cs = append(cs, c)
	return cs
}

// gatherCases covers Gather with int64 indices given at run time: an
// embedding lookup.
func gatherCases() []*kase {
	var cs []*kase
	c := newCase("gather_embedding_opset13", 13, indices, "Gather-13",
		"embedding lookup: a 10x4 table (initializer) indexed by run-time int64 ids of shape 2x5, ids in [0, 10)", "Gather")
	ids := make([]int64, 10)
	for i := range ids {
		ids[i] = int64(c.rng.IntN(10))
	}
	c.op("Gather", "y", []string{c.randInit("table", -1, 1, 10, 4), c.int64In("ids", "indices", []int64{2, 5}, ids)})
	c.out(f32, "y")
	cs = append(cs, c)

	c = newCase("gather_negative_indices_opset13", 13, indices, "Gather-13",
		"run-time ids in [-10, 10): negative ids count from the end of the 10-row table", "Gather")
	ids = make([]int64, 8)
	for i := range ids {
		ids[i] = int64(c.rng.IntN(20)) - 10
	}
	ids[0], ids[1] = -1, -10 // both ends, deliberately
	c.op("Gather", "y", []string{c.randInit("table", -1, 1, 10, 3), c.int64In("ids", "indices", []int64{8}, ids)})
	c.out(f32, "y")
	cs = append(cs, c)

	c = newCase("gather_axis1_opset13", 13, indices, "Gather-13", "run-time ids [4, 0, 4, 2] on axis 1 of a float input 3x5", "Gather")
	c.op("Gather", "y", []string{c.floatIn("x", 3, 5), c.int64In("ids", "indices", []int64{4}, []int64{4, 0, 4, 2})}, attrInt("axis", 1))
	c.out(f32, "y")
	cs = append(cs, c)
	return cs
}
