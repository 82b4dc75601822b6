package main

import (
	"math"
	"strings"

	"github.com/x448/float16"

	"github.com/apportion/apportion/onnxlite"
)

// shapeInputCases have int64 graph inputs that reach only shape positions:
// a runtime must know their values to know the output's shape.
func shapeInputCases() []*kase {
	var cs []*kase
	add := func(name string, opset int64, rev, checks string, build func(c *kase)) {
		op, _, _ := strings.Cut(rev, "-")
		c := newCase(name, opset, shapeInput, rev, checks, op)
		build(c)
		c.out(f32, c.g.Nodes[len(c.g.Nodes)-1].Outputs...)
		cs = append(cs, c)
	}
	shape := func(c *kase, name string, v ...int64) string {
		return c.int64In(name, "shape", []int64{int64(len(v))}, v)
	}
	add("reshape_runtime_shape_opset18", 18, "Reshape-14", "run-time shape [4, -1] for 2x3x4", func(c *kase) {
		c.op("Reshape", "y", []string{c.floatIn("x", 2, 3, 4), shape(c, "shape", 4, -1)})
	})
	add("slice_runtime_opset18", 18, "Slice-13", "run-time starts [1, -1], ends [3, -100], axes [0, 1], steps [1, -2] on 4x6", func(c *kase) {
		c.op("Slice", "y", []string{c.floatIn("x", 4, 6), shape(c, "starts", 1, -1), shape(c, "ends", 3, -100), shape(c, "axes", 0, 1), shape(c, "steps", 1, -2)})
	})
	add("squeeze_runtime_axes_opset18", 18, "Squeeze-13", "run-time axes [0, 2] on 1x3x1x4", func(c *kase) {
		c.op("Squeeze", "y", []string{c.floatIn("x", 1, 3, 1, 4), shape(c, "axes", 0, 2)})
	})
	add("unsqueeze_runtime_axes_opset18", 18, "Unsqueeze-13", "run-time axes [1, -1] on 3x4: 3x1x4x1", func(c *kase) {
		c.op("Unsqueeze", "y", []string{c.floatIn("x", 3, 4), shape(c, "axes", 1, -1)})
	})
	add("reduce_sum_runtime_axes_opset18", 18, "ReduceSum-13", "run-time axes [1], keepdims 0 on 2x3x4", func(c *kase) {
		c.op("ReduceSum", "y", []string{c.floatIn("x", 2, 3, 4), shape(c, "axes", 1)}, attrInt("keepdims", 0))
	})
	add("reduce_mean_runtime_axes_opset18", 18, "ReduceMean-18", "run-time axes [0, -1], keepdims 1 on 2x3x4", func(c *kase) {
		c.op("ReduceMean", "y", []string{c.floatIn("x", 2, 3, 4), shape(c, "axes", 0, -1)})
	})
	add("pad_runtime_pads_opset18", 18, "Pad-18", "run-time pads [1, 0, 0, 2], constant mode", func(c *kase) {
		c.op("Pad", "y", []string{c.floatIn("x", 2, 3), shape(c, "pads", 1, 0, 0, 2)})
	})
	add("expand_runtime_shape_opset18", 18, "Expand-13", "run-time shape [2, 3, 4] for 3x1", func(c *kase) {
		c.op("Expand", "y", []string{c.floatIn("x", 3, 1), shape(c, "shape", 2, 3, 4)})
	})
	add("tile_runtime_repeats_opset18", 18, "Tile-13", "run-time repeats [3, 1] for 2x3", func(c *kase) {
		c.op("Tile", "y", []string{c.floatIn("x", 2, 3), shape(c, "repeats", 3, 1)})
	})
	add("split_runtime_split_opset18", 18, "Split-18", "run-time split [1, 4] on axis 1 of 2x5", func(c *kase) {
		c.node("Split", []string{c.floatIn("x", 2, 5), shape(c, "split", 1, 4)}, []string{"y0", "y1"}, attrInt("axis", 1))
	})
	add("resize_runtime_sizes_opset19", 19, "Resize-19", "run-time sizes [1, 1, 5, 7] for 1x1x3x4; nearest, half_pixel, round_prefer_floor (defaults)", func(c *kase) {
		c.op("Resize", "y", []string{c.floatIn("x", 1, 1, 3, 4), "", "", shape(c, "sizes", 1, 1, 5, 7)})
	})
	add("constant_of_shape_runtime_opset25", 25, "ConstantOfShape-25", "x + ConstantOfShape(run-time shape [3, 4], value 0.5) for x of shape 4", func(c *kase) {
		c.op("ConstantOfShape", "k", []string{shape(c, "shape", 3, 4)}, attrTensor("value", &onnxlite.Tensor{DType: f32, Dims: []int64{1}, Data: []float32{0.5}}))
		c.op("Add", "y", []string{c.floatIn("x", 4), "k"})
	})
	cs[len(cs)-1].ops = []string{"ConstantOfShape", "Add"}
	return cs
}

// dtypeCases have float16 or bfloat16 graph inputs.
func dtypeCases() []*kase {
	var cs []*kase
	// Values on a grid of 1/32 in [-2, 2] are exact in float16 and in
	// bfloat16 (at most 7 significant bits).
	halfGrid := func(c *kase, n int64) []float32 { return c.grid(n, 1.0/32, -2, 2) }
	half := func(v []float32) []float16.Float16 {
		out := make([]float16.Float16, len(v))
		for i, f := range v {
			out[i] = float16.Fromfloat32(f)
		}
		return out
	}

	c := newCase("float16_input_cast_opset21", 21, dtype, "Cast-21",
		"a float16 graph input widened by Cast to float, then Gemm (4 -> 3) and Relu", "Cast", "Gemm", "Relu")
	c.in("x", onnxlite.Float16, []int64{3, 4}, half(halfGrid(c, 12)))
	c.op("Relu", "y", []string{c.op("Gemm", "g", []string{c.op("Cast", "xf", []string{"x"}, attrInt("to", int64(f32))), c.weights("w", 4, 4, 3), c.randInit("b", -0.1, 0.1, 3)})})
	c.out(f32, "y")
	cs = append(cs, c)

	c = newCase("float16_graph_opset21", 21, dtype, "MatMul-13",
		"a graph in float16 throughout: MatMul with float16 weights, Add, Relu; the output is float16 (ONNX Runtime computes in float16)", "MatMul", "Add", "Relu")
	c.in("x", onnxlite.Float16, []int64{3, 4}, half(halfGrid(c, 12)))
	w := c.init("w", onnxlite.Float16, []int64{4, 3}, half(c.grid(12, 1.0/16, -1, 1)))
	b := c.init("b", onnxlite.Float16, []int64{3}, half(c.grid(3, 1.0/16, -0.25, 0.25)))
	c.op("Relu", "y", []string{c.op("Add", "mb", []string{c.op("MatMul", "m", []string{"x", w}), b})})
	c.out(onnxlite.Float16, "y")
	cs = append(cs, c)

	c = newCase("bfloat16_input_cast_opset26", 26, dtype, "Cast-25",
		"a bfloat16 graph input widened by Cast to float, then Gemm (4 -> 3) and Relu. ONNX Runtime's node binding cannot take a bfloat16 tensor, "+
			"so ort_model.onnx takes the same bits as uint16 and reinterprets them with BitCast (opset 26) before the Cast", "Cast", "Gemm", "Relu")
	x := halfGrid(c, 12)
	bf := make([]onnxlite.BFloat16Bits, len(x))
	for i, v := range x {
		bf[i] = onnxlite.BFloat16Bits(math.Float32bits(v) >> 16) // exact: v has at most 7 significant bits
	}
	c.in("x", onnxlite.BFloat16, []int64{3, 4}, bf)
	c.op("Relu", "y", []string{c.op("Gemm", "g", []string{c.op("Cast", "xf", []string{"x"}, attrInt("to", int64(f32))), c.weights("w", 4, 4, 3), c.randInit("b", -0.1, 0.1, 3)})})
	c.out(f32, "y")
	bfloat16Twin(c)
	cs = append(cs, c)
	return cs
}

// bfloat16Twin gives c a twin graph for ONNX Runtime: each bfloat16 graph
// input becomes a uint16 input of the same name and bits, reinterpreted as
// bfloat16 by BitCast (opset 26) before its first use.
func bfloat16Twin(c *kase) {
	t := *c.g
	t.Inputs = nil
	t.Nodes = nil
	rename := map[string]string{}
	for _, in := range c.g.Inputs {
		if in.Type.Elem != onnxlite.BFloat16 {
			t.Inputs = append(t.Inputs, in)
			continue
		}
		ty := *in.Type
		ty.Elem = onnxlite.Uint16
		t.Inputs = append(t.Inputs, &onnxlite.ValueInfo{Name: in.Name, Type: &ty})
		bits := in.Name + ".as_bfloat16"
		rename[in.Name] = bits
		t.Nodes = append(t.Nodes, &onnxlite.Node{Name: bits, OpType: "BitCast", Inputs: []string{in.Name}, Outputs: []string{bits},
			Attrs: []*onnxlite.Attribute{attrInt("to", int64(onnxlite.BFloat16))}})
	}
	for _, n := range c.g.Nodes {
		m := *n
		m.Inputs = make([]string, len(n.Inputs))
		for i, s := range n.Inputs {
			if r, ok := rename[s]; ok {
				s = r
			}
			m.Inputs[i] = s
		}
		t.Nodes = append(t.Nodes, &m)
	}
	c.twin, c.twinOpset = &t, 26
}
