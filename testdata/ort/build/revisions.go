package main

import (
	"fmt"

	"github.com/apportion/apportion/onnxlite"
)

const f32 = onnxlite.Float

// revisionCases covers every revision, from opset 18 to 26, of the
// operators apportion supports: one case per semantic change, one case at the
// newest revising opset for a type-only change (ONNX 1.23 Changelog.md).
func revisionCases() []*kase {
	var cs []*kase
	add := func(c *kase) { cs = append(cs, c) }

	// Pad-18: the optional axes input. Pad-19: the wrap mode. Pad-21, 23,
	// 24, 25: types only. value, when given, is the constant_value input.
	pad := func(name string, opset int64, kind, checks, mode string, dims, pads, axes []int64, value ...float32) {
		c := newCase(name, opset, kind, fmt.Sprintf("Pad-%d", min(opset, 25)), checks, "Pad")
		ins := []string{c.floatIn("x", dims...), c.ints("pads", pads...), ""}
		if len(value) > 0 {
			ins[2] = c.scalar("value", value[0])
		}
		if axes != nil {
			ins = append(ins, c.ints("axes", axes...))
		} else if ins[2] == "" {
			ins = ins[:2]
		}
		var attrs []*onnxlite.Attribute
		if mode != "constant" {
			attrs = append(attrs, attrString("mode", mode))
		}
		c.op("Pad", "y", ins, attrs...)
		c.out(f32, "y")
		add(c)
	}
	pad("pad_axes_constant_opset18", 18, semantic, "axes input (new in Pad-18): axes [2, 3], pads [1, 2, 0, 1], constant_value 0.5",
		"constant", []int64{1, 2, 3, 4}, []int64{1, 2, 0, 1}, []int64{2, 3}, 0.5)
	pad("pad_axes_negative_reflect_opset18", 18, semantic, "axes input with a negative axis [-1], reflect mode, pads [2, 1], constant_value omitted",
		"reflect", []int64{2, 3, 5}, []int64{2, 1}, []int64{-1})
	pad("pad_axes_edge_opset18", 18, semantic, "axes input [0, -1], edge mode, pads [1, 0, 0, 2]",
		"edge", []int64{2, 3, 4}, []int64{1, 0, 0, 2}, []int64{0, -1})
	pad("pad_wrap_opset19", 19, semantic, "wrap mode (new in Pad-19) on both spatial axes: pads [0, 0, 2, 1, 0, 0, 1, 3] on 3x4",
		"wrap", []int64{1, 1, 3, 4}, []int64{0, 0, 2, 1, 0, 0, 1, 3}, nil)
	pad("pad_wrap_axes_opset19", 19, semantic, "wrap mode with the axes input: axes [1], pads [3, 2] on a width of 4",
		"wrap", []int64{3, 4}, []int64{3, 2}, []int64{1})
	pad("pad_reflect_opset25", 25, typeOnly, "newest revision (types only since Pad-19): reflect, pads [0, 0, 1, 2, 0, 0, 2, 1]",
		"reflect", []int64{1, 2, 4, 5}, []int64{0, 0, 1, 2, 0, 0, 2, 1}, nil)
	pad("pad_constant_negative_opset25", 25, typeOnly, "negative pads remove elements: pads [-1, 2, 0, -2], constant mode, default value 0",
		"constant", []int64{3, 5}, []int64{-1, 2, 0, -2}, nil)

	// ReduceMean-18: axes moved from an attribute to an optional input;
	// noop_with_empty_axes added.
	reduce := func(name string, opset int64, rev, checks, op string, axes []int64, attrs ...*onnxlite.Attribute) {
		c := newCase(name, opset, semantic, rev, checks, op)
		ins := []string{c.floatIn("x", 2, 3, 4, 5)}
		if axes != nil {
			ins = append(ins, c.ints("axes", axes...))
		}
		c.op(op, "y", ins, attrs...)
		c.out(f32, "y")
		add(c)
	}
	reduce("reduce_mean_axes_input_opset18", 18, "ReduceMean-18", "axes as an input: [1, 3], keepdims 1 (default)", "ReduceMean", []int64{1, 3})
	reduce("reduce_mean_axes_keepdims0_opset18", 18, "ReduceMean-18", "axes input [-1], keepdims 0", "ReduceMean", []int64{-1}, attrInt("keepdims", 0))
	reduce("reduce_mean_no_axes_opset18", 18, "ReduceMean-18", "axes omitted, noop_with_empty_axes 0: reduce over all axes, keepdims 0 gives a scalar", "ReduceMean", nil, attrInt("keepdims", 0))
	reduce("reduce_mean_empty_axes_opset18", 18, "ReduceMean-18", "axes an empty tensor, noop_with_empty_axes 0: reduce over all axes, keepdims 1 gives 1x1x1x1", "ReduceMean", []int64{})
	reduce("reduce_mean_empty_axes_noop_opset18", 18, "ReduceMean-18", "axes an empty tensor, noop_with_empty_axes 1: identity", "ReduceMean", []int64{}, attrInt("noop_with_empty_axes", 1))
	reduce("reduce_mean_no_axes_noop_opset18", 18, "ReduceMean-18", "axes omitted, noop_with_empty_axes 1: identity", "ReduceMean", nil, attrInt("noop_with_empty_axes", 1))
	reduce("reduce_sum_axes_opset26", 26, "ReduceSum-13", "unrevised since 13 (axes input since 13), declared at 26: axes [0, 2], keepdims 0", "ReduceSum", []int64{0, 2}, attrInt("keepdims", 0))
	reduce("reduce_sum_no_axes_noop_opset26", 26, "ReduceSum-13", "axes omitted, noop_with_empty_axes 1: identity", "ReduceSum", nil, attrInt("noop_with_empty_axes", 1))
	cs[len(cs)-1].kind, cs[len(cs)-2].kind = unrevised, unrevised

	// AveragePool-19: dilations. AveragePool-22 and MaxPool-22: sliding
	// windows that would start in the right padding are ignored (ceil_mode);
	// bfloat16.
	pool := func(name string, opset int64, kind, rev, checks, op string, dims []int64, attrs ...*onnxlite.Attribute) {
		c := newCase(name, opset, kind, rev, checks, op)
		c.op(op, "y", []string{c.floatIn("x", dims...)}, attrs...)
		c.out(f32, "y")
		add(c)
	}
	pool("averagepool_dilations_opset19", 19, semantic, "AveragePool-19", "dilations [2, 2] (new in AveragePool-19), kernel 2x2, stride 1 on 6x6",
		"AveragePool", []int64{1, 2, 6, 6}, attrInts("kernel_shape", 2, 2), attrInts("dilations", 2, 2))
	pool("averagepool_dilations_pads_opset19", 19, semantic, "AveragePool-19", "dilations [2, 1], kernel 3x3, strides [2, 1], pads [2, 1, 2, 1], count_include_pad 0",
		"AveragePool", []int64{1, 1, 7, 6}, attrInts("kernel_shape", 3, 3), attrInts("dilations", 2, 1), attrInts("strides", 2, 1), attrInts("pads", 2, 1, 2, 1))
	pool("averagepool_dilations_pads_include_opset19", 19, semantic, "AveragePool-19", "as averagepool_dilations_pads with count_include_pad 1",
		"AveragePool", []int64{1, 1, 7, 6}, attrInts("kernel_shape", 3, 3), attrInts("dilations", 2, 1), attrInts("strides", 2, 1), attrInts("pads", 2, 1, 2, 1), attrInt("count_include_pad", 1))
	pool("averagepool_dilations_ceil_opset19", 19, semantic, "AveragePool-19", "dilations [2, 2], kernel 2x2, stride 2, ceil_mode 1 on 8x8: the last window reaches past the input",
		"AveragePool", []int64{1, 1, 8, 8}, attrInts("kernel_shape", 2, 2), attrInts("dilations", 2, 2), attrInts("strides", 2, 2), attrInt("ceil_mode", 1))
	pool("averagepool_ceil_right_pad_opset22", 22, semantic, "AveragePool-22",
		"ceil_mode 1, kernel 2x2, stride 2, pads [0, 0, 1, 1] on 4x5: by AveragePool-22 the window that would start in the bottom padding is dropped (height 2), the one starting at the last column is kept (width 3)",
		"AveragePool", []int64{1, 1, 4, 5}, attrInts("kernel_shape", 2, 2), attrInts("strides", 2, 2), attrInts("pads", 0, 0, 1, 1), attrInt("ceil_mode", 1))
	pool("averagepool_ceil_right_pad_include_opset22", 22, semantic, "AveragePool-22", "as averagepool_ceil_right_pad with count_include_pad 1",
		"AveragePool", []int64{1, 1, 4, 5}, attrInts("kernel_shape", 2, 2), attrInts("strides", 2, 2), attrInts("pads", 0, 0, 1, 1), attrInt("ceil_mode", 1), attrInt("count_include_pad", 1))
	pool("maxpool_ceil_right_pad_opset22", 22, semantic, "MaxPool-22",
		"ceil_mode 1, kernel 2x2, stride 2, pads [0, 0, 1, 1] on 4x5: the window that would start in the bottom padding is dropped (MaxPool-22 wording)",
		"MaxPool", []int64{1, 1, 4, 5}, attrInts("kernel_shape", 2, 2), attrInts("strides", 2, 2), attrInts("pads", 0, 0, 1, 1), attrInt("ceil_mode", 1))
	pool("maxpool_dilations_pads_opset22", 22, typeOnly, "MaxPool-22", "newest revision: kernel 3x3, dilations [2, 2], pads 2 on every side, stride 1",
		"MaxPool", []int64{1, 2, 7, 7}, attrInts("kernel_shape", 3, 3), attrInts("dilations", 2, 2), attrInts("pads", 2, 2, 2, 2))
	pool("global_averagepool_opset22", 22, typeOnly, "GlobalAveragePool-22", "newest revision (types only)", "GlobalAveragePool", []int64{2, 3, 4, 5})
	pool("global_maxpool_opset22", 22, typeOnly, "GlobalMaxPool-22", "newest revision (types only)", "GlobalMaxPool", []int64{2, 3, 4, 5})

	// Conv-22: types only.
	c := newCase("conv_group_dilation_opset22", 22, typeOnly, "Conv-22",
		"newest revision (types only): groups 2, dilations [2, 1], strides [1, 2], pads [2, 1, 2, 1], bias", "Conv")
	c.op("Conv", "y", []string{c.floatIn("x", 1, 4, 7, 7), c.weights("w", 18, 4, 2, 3, 3), c.randInit("b", -0.1, 0.1, 4)},
		attrInt("group", 2), attrInts("dilations", 2, 1), attrInts("strides", 1, 2), attrInts("pads", 2, 1, 2, 1), attrInts("kernel_shape", 3, 3))
	c.out(f32, "y")
	add(c)

	c = newCase("conv_1d_same_upper_opset22", 22, typeOnly, "Conv-22",
		"1-D, auto_pad SAME_UPPER with an even kernel (4) and stride 2: the odd padding goes at the end", "Conv")
	c.op("Conv", "y", []string{c.floatIn("x", 1, 2, 9), c.weights("w", 8, 3, 2, 4)}, attrString("auto_pad", "SAME_UPPER"), attrInts("strides", 2))
	c.out(f32, "y")
	add(c)

	// Activations revised at 22 for bfloat16 only.
	act := func(name, rev, op string, lo, hi float64, kinks []float64, checks string, attrs ...*onnxlite.Attribute) {
		c := newCase(name, 22, typeOnly, rev, checks, op)
		c.in("x", f32, []int64{3, 8}, avoid(c.uniform(24, lo, hi), 0.05, kinks...))
		c.op(op, "y", []string{"x"}, attrs...)
		c.out(f32, "y")
		add(c)
	}
	act("elu_opset22", "Elu-22", "Elu", -3, 3, []float64{0}, "newest revision (types only), alpha 0.7; inputs at least 0.05 from the kink at 0", attrFloat("alpha", 0.7))
	act("selu_opset22", "Selu-22", "Selu", -3, 3, []float64{0}, "newest revision (types only), default alpha and gamma; inputs away from 0")
	act("hard_sigmoid_opset22", "HardSigmoid-22", "HardSigmoid", -4, 4, []float64{-1.6, 2.4},
		"newest revision (types only), alpha 0.25, beta 0.4; inputs away from the kinks at -1.6 and 2.4", attrFloat("alpha", 0.25), attrFloat("beta", 0.4))
	act("hard_swish_opset22", "HardSwish-22", "HardSwish", -5, 5, []float64{-3, 3}, "newest revision (types only); inputs away from the kinks at -3 and 3")
	act("softplus_opset22", "Softplus-22", "Softplus", -5, 5, nil, "newest revision (types only)")
	act("softsign_opset22", "Softsign-22", "Softsign", -5, 5, nil, "newest revision (types only)")
	act("thresholded_relu_opset22", "ThresholdedRelu-22", "ThresholdedRelu", -2, 2, []float64{0.6},
		"newest revision (types only), alpha 0.6; inputs away from the jump at 0.6", attrFloat("alpha", 0.6))
	act("mish_opset22", "Mish-22", "Mish", -5, 5, nil, "newest revision (types only)")

	c = newCase("dropout_inference_opset22", 22, typeOnly, "Dropout-22",
		"newest revision: ratio input 0.3, training_mode absent, so the output equals the input", "Dropout")
	c.op("Dropout", "y", []string{c.floatIn("x", 2, 5), c.scalar("ratio", 0.3)})
	c.out(f32, "y")
	add(c)

	c = newCase("instance_norm_opset22", 22, typeOnly, "InstanceNormalization-22", "newest revision (types only), epsilon 1e-4", "InstanceNormalization")
	c.op("InstanceNormalization", "y", []string{c.floatIn("x", 2, 3, 4, 4), c.randInit("scale", 0.5, 1.5, 3), c.randInit("b", -0.5, 0.5, 3)}, attrFloat("epsilon", 1e-4))
	c.out(f32, "y")
	add(c)

	c = newCase("round_opset22", 22, typeOnly, "Round-22",
		"newest revision (types only). Deliberate ties: the first 8 inputs are ±0.5, ±1.5, ±2.5, ±3.5 (round half to even: 0, 2, 2, 4)", "Round")
	x := append([]float32{-3.5, -2.5, -1.5, -0.5, 0.5, 1.5, 2.5, 3.5}, avoid(c.uniform(16, -4, 4), 0.01, -3.5, -2.5, -1.5, -0.5, 0.5, 1.5, 2.5, 3.5)...)
	c.op("Round", "y", []string{c.in("x", f32, []int64{3, 8}, x)})
	c.out(f32, "y")
	add(c)

	// Shape and data-movement operators revised at 19, 21, 23, 24 and 25 for
	// types only (Transpose-21 also states that perm has the input's rank).
	c = newCase("flatten_opset25", 25, typeOnly, "Flatten-25", "newest revision (types only), axis 2 on 2x3x4x5", "Flatten")
	c.op("Flatten", "y", []string{c.floatIn("x", 2, 3, 4, 5)}, attrInt("axis", 2))
	c.out(f32, "y")
	add(c)

	c = newCase("flatten_negative_axis_opset25", 25, typeOnly, "Flatten-25", "axis -1", "Flatten")
	c.op("Flatten", "y", []string{c.floatIn("x", 2, 3, 4)}, attrInt("axis", -1))
	c.out(f32, "y")
	add(c)

	c = newCase("reshape_opset25", 25, typeOnly, "Reshape-25", "newest revision (types only): shape [0, -1, 2] (0 copies the input dimension, allowzero 0)", "Reshape")
	c.op("Reshape", "y", []string{c.floatIn("x", 2, 3, 4), c.ints("shape", 0, -1, 2)})
	c.out(f32, "y")
	add(c)

	c = newCase("transpose_opset25", 25, typeOnly, "Transpose-25", "newest revision (types only): perm [0, 2, 3, 1]", "Transpose")
	c.op("Transpose", "y", []string{c.floatIn("x", 2, 3, 4, 5)}, attrInts("perm", 0, 2, 3, 1))
	c.out(f32, "y")
	add(c)

	c = newCase("transpose_default_perm_opset25", 25, typeOnly, "Transpose-25", "perm omitted: the dimensions reversed", "Transpose")
	c.op("Transpose", "y", []string{c.floatIn("x", 2, 3, 4)})
	c.out(f32, "y")
	add(c)

	c = newCase("squeeze_opset25", 25, typeOnly, "Squeeze-25", "newest revision (types only): axes input [0, -2]", "Squeeze")
	c.op("Squeeze", "y", []string{c.floatIn("x", 1, 3, 1, 4), c.ints("axes", 0, -2)})
	c.out(f32, "y")
	add(c)

	c = newCase("squeeze_no_axes_opset25", 25, typeOnly, "Squeeze-25", "axes omitted: every dimension of size 1 removed", "Squeeze")
	c.op("Squeeze", "y", []string{c.floatIn("x", 1, 3, 1, 4)})
	c.out(f32, "y")
	add(c)

	c = newCase("unsqueeze_opset25", 25, typeOnly, "Unsqueeze-25", "newest revision (types only): axes input [0, -1], counted in the output's rank", "Unsqueeze")
	c.op("Unsqueeze", "y", []string{c.floatIn("x", 3, 4), c.ints("axes", 0, -1)})
	c.out(f32, "y")
	add(c)

	c = newCase("identity_opset25", 25, typeOnly, "Identity-25", "newest revision (types only)", "Identity")
	c.op("Identity", "y", []string{c.floatIn("x", 2, 3)})
	c.out(f32, "y")
	add(c)

	c = newCase("constant_opset25", 25, typeOnly, "Constant-25",
		"newest revision (types only): value (a 2x3 tensor), value_float 1.5 and value_ints [3, 2] (as a Reshape shape): y = Reshape((x + C) * 1.5, [3, 2])", "Constant", "Add", "Mul", "Reshape")
	c.op("Constant", "c", nil, attrTensor("value", &onnxlite.Tensor{Name: "c", DType: f32, Dims: []int64{2, 3}, Data: c.uniform(6, -1, 1)}))
	c.op("Constant", "k", nil, attrFloat("value_float", 1.5))
	c.op("Constant", "shape", nil, attrInts("value_ints", 3, 2))
	c.op("Reshape", "y", []string{c.op("Mul", "xck", []string{c.op("Add", "xc", []string{c.floatIn("x", 2, 3), "c"}), "k"}), "shape"})
	c.out(f32, "y")
	add(c)

	c = newCase("cast_float16_roundtrip_opset25", 25, typeOnly, "Cast-25",
		"newest revision (types and the float8 attributes only): float -> float16 -> float rounds to half precision (nearest even); inputs in [-100, 100]", "Cast")
	c.op("Cast", "y", []string{c.op("Cast", "h", []string{c.floatInRange("x", -100, 100, 2, 6)}, attrInt("to", int64(onnxlite.Float16)))}, attrInt("to", int64(f32)))
	c.out(f32, "y")
	add(c)

	c = newCase("cast_double_opset25", 25, typeOnly, "Cast-25",
		"float -> double, times a double 0.1, -> float", "Cast", "Mul")
	c.op("Cast", "d", []string{c.floatIn("x", 2, 6)}, attrInt("to", int64(onnxlite.Double)))
	c.op("Mul", "dk", []string{"d", c.init("k", onnxlite.Double, []int64{}, []float64{0.1})})
	c.op("Cast", "y", []string{"dk"}, attrInt("to", int64(f32)))
	c.out(f32, "y")
	add(c)

	c = newCase("shape_start_end_opset25", 25, typeOnly, "Shape-25",
		"newest revision (types only): Shape with start 1, end -1 as an int64 output s = [3, 4], and x reshaped to [Shape(x, end=1), -1]", "Shape", "Concat", "Reshape")
	x2 := c.floatIn("x", 2, 3, 4, 5)
	c.op("Shape", "s", []string{x2}, attrInt("start", 1), attrInt("end", -1))
	c.op("Shape", "n", []string{x2}, attrInt("end", 1))
	c.op("Concat", "shape", []string{"n", c.ints("minus_one", -1)}, attrInt("axis", 0))
	c.op("Reshape", "y", []string{x2, "shape"})
	c.out(onnxlite.Int64, "s")
	c.out(f32, "y")
	add(c)

	c = newCase("constant_of_shape_opset25", 25, typeOnly, "ConstantOfShape-25",
		"newest revision (ConstantOfShape-20, 21, 23, 24, 25: types only): y = x + ConstantOfShape(Shape(x), value 0.25)", "ConstantOfShape", "Shape", "Add")
	x3 := c.floatIn("x", 2, 3, 4)
	c.op("ConstantOfShape", "k", []string{c.op("Shape", "s", []string{x3})}, attrTensor("value", &onnxlite.Tensor{DType: f32, Dims: []int64{1}, Data: []float32{0.25}}))
	c.op("Add", "y", []string{x3, "k"})
	c.out(f32, "y")
	add(c)

	// Split-18: num_outputs.
	c = newCase("split_num_outputs_opset18", 18, semantic, "Split-18", "num_outputs 3 (new in Split-18) on axis 1 of length 6: three 2x2 parts", "Split")
	c.node("Split", []string{c.floatIn("x", 2, 6)}, []string{"y0", "y1", "y2"}, attrInt("axis", 1), attrInt("num_outputs", 3))
	c.out(f32, "y0", "y1", "y2")
	add(c)

	c = newCase("split_num_outputs_uneven_opset18", 18, semantic, "Split-18", "num_outputs 3 on axis 0 of length 7: parts of 3, 3 and 1 (the last chunk smaller)", "Split")
	c.node("Split", []string{c.floatIn("x", 7, 2)}, []string{"y0", "y1", "y2"}, attrInt("num_outputs", 3))
	c.out(f32, "y0", "y1", "y2")
	add(c)

	c = newCase("split_input_opset18", 18, semantic, "Split-18", "split input [1, 4] on axis -1", "Split")
	c.node("Split", []string{c.floatIn("x", 2, 5), c.ints("split", 1, 4)}, []string{"y0", "y1"}, attrInt("axis", -1))
	c.out(f32, "y0", "y1")
	add(c)

	return cs
}
