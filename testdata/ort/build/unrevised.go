package main

import (
	"strings"

	"github.com/apportion/apportion/onnxlite"
)

// nodeCases lists every single-operator case, written under node/.
func nodeCases() []*kase {
	var cs []*kase
	cs = append(cs, revisionCases()...)
	cs = append(cs, newOpCases()...)
	cs = append(cs, unrevisedCases()...)
	cs = append(cs, shapeInputCases()...)
	cs = append(cs, dtypeCases()...)
	return cs
}

// snake turns an operator name into the case-name form: "LogSoftmax" ->
// "log_softmax".
func snake(op string) string {
	var b strings.Builder
	for i, r := range op {
		if r >= 'A' && r <= 'Z' {
			if i > 0 {
				b.WriteByte('_')
			}
			r += 'a' - 'A'
		}
		b.WriteRune(r)
	}
	return b.String()
}

// unrevisedCases declares at opset 26 the supported operators that no
// revision from 18 to 26 touched, so that a reader of opset 26 is checked on
// them too.
func unrevisedCases() []*kase {
	var cs []*kase
	unary := func(op, rev string, lo, hi float64, kinks []float64, checks string, attrs ...*onnxlite.Attribute) {
		c := newCase(snake(op)+"_opset26", 26, unrevised, rev, checks, op)
		c.in("x", f32, []int64{2, 3, 4}, avoid(c.uniform(24, lo, hi), 0.05, kinks...))
		c.op(op, "y", []string{"x"}, attrs...)
		c.out(f32, "y")
		cs = append(cs, c)
	}
	unary("Abs", "Abs-13", -2, 2, []float64{0}, "inputs away from 0")
	unary("Neg", "Neg-13", -2, 2, nil, "")
	unary("Sqrt", "Sqrt-13", 0.1, 4, nil, "inputs in [0.1, 4]")
	unary("Exp", "Exp-13", -3, 3, nil, "")
	unary("Log", "Log-13", 0.1, 5, nil, "inputs in [0.1, 5]")
	unary("Relu", "Relu-14", -2, 2, []float64{0}, "inputs away from 0")
	unary("LeakyRelu", "LeakyRelu-16", -2, 2, []float64{0}, "alpha 0.1; inputs away from 0", attrFloat("alpha", 0.1))
	unary("Sigmoid", "Sigmoid-13", -4, 4, nil, "")
	unary("Tanh", "Tanh-13", -3, 3, nil, "")
	unary("Erf", "Erf-13", -2, 2, nil, "")
	unary("Celu", "Celu-12", -3, 3, []float64{0}, "alpha 1.5; inputs away from 0", attrFloat("alpha", 1.5))
	unary("Softmax", "Softmax-13", -3, 3, nil, "axis 1 of 2x3x4", attrInt("axis", 1))
	unary("LogSoftmax", "LogSoftmax-13", -3, 3, nil, "axis -1 (default)")

	c := newCase("clip_opset26", 26, unrevised, "Clip-13", "min -0.5 and max 0.75 as inputs; inputs away from both", "Clip")
	c.in("x", f32, []int64{3, 8}, avoid(c.uniform(24, -2, 2), 0.05, -0.5, 0.75))
	c.op("Clip", "y", []string{"x", c.scalar("min", -0.5), c.scalar("max", 0.75)})
	c.out(f32, "y")
	cs = append(cs, c)

	c = newCase("clip_min_only_opset26", 26, unrevised, "Clip-13", "min 0.25 given, max omitted (empty input name)", "Clip")
	c.in("x", f32, []int64{3, 8}, avoid(c.uniform(24, -2, 2), 0.05, 0.25))
	c.op("Clip", "y", []string{"x", c.scalar("min", 0.25), ""})
	c.out(f32, "y")
	cs = append(cs, c)

	binary := func(op, rev string, b func(c *kase) string, checks string) {
		c := newCase(snake(op)+"_opset26", 26, unrevised, rev, checks, op)
		c.op(op, "y", []string{c.floatIn("a", 2, 3, 4), b(c)})
		c.out(f32, "y")
		cs = append(cs, c)
	}
	binary("Add", "Add-14", func(c *kase) string { return c.floatIn("b", 4) }, "b of shape 4 broadcast over 2x3x4")
	binary("Sub", "Sub-14", func(c *kase) string { return c.floatIn("b", 3, 1) }, "b of shape 3x1 broadcast over 2x3x4")
	binary("Mul", "Mul-14", func(c *kase) string { return c.floatIn("b", 2, 1, 4) }, "b of shape 2x1x4")
	binary("Div", "Div-14", func(c *kase) string {
		return c.in("b", f32, []int64{4}, avoid(c.uniform(4, -2, 2), 0.5, 0))
	}, "b of shape 4, |b| >= 0.5")

	c = newCase("pow_opset26", 26, unrevised, "Pow-15", "positive base in [0.2, 3], exponent in [-2, 2] of shape 4", "Pow")
	c.op("Pow", "y", []string{c.floatInRange("a", 0.2, 3, 2, 3, 4), c.floatIn("b", 4)})
	c.out(f32, "y")
	cs = append(cs, c)

	c = newCase("prelu_opset26", 26, unrevised, "PRelu-16", "slope of shape 3x1x1, one per channel; inputs away from 0", "PRelu")
	c.in("x", f32, []int64{2, 3, 4, 4}, avoid(c.uniform(96, -2, 2), 0.05, 0))
	c.op("PRelu", "y", []string{"x", c.randInit("slope", 0.05, 0.3, 3, 1, 1)})
	c.out(f32, "y")
	cs = append(cs, c)

	c = newCase("matmul_batched_opset26", 26, unrevised, "MatMul-13", "2x3x4 times 4x5", "MatMul")
	c.op("MatMul", "y", []string{c.floatIn("a", 2, 3, 4), c.randInit("b", -1, 1, 4, 5)})
	c.out(f32, "y")
	cs = append(cs, c)

	c = newCase("gemm_opset26", 26, unrevised, "Gemm-13", "transA 1 (A is 4x3), B 4x5, C of shape 5 broadcast, alpha 0.5, beta 2", "Gemm")
	c.op("Gemm", "y", []string{c.floatIn("a", 4, 3), c.randInit("b", -1, 1, 4, 5), c.randInit("c", -1, 1, 5)},
		attrInt("transA", 1), attrFloat("alpha", 0.5), attrFloat("beta", 2))
	c.out(f32, "y")
	cs = append(cs, c)

	c = newCase("concat_opset26", 26, unrevised, "Concat-13", "three inputs on axis -1", "Concat")
	c.op("Concat", "y", []string{c.floatIn("a", 2, 3), c.floatIn("b", 2, 1), c.randInit("c", -1, 1, 2, 2)}, attrInt("axis", -1))
	c.out(f32, "y")
	cs = append(cs, c)

	c = newCase("gather_constant_indices_opset26", 26, unrevised, "Gather-13", "constant indices [2, 0, 2] on axis 0", "Gather")
	c.op("Gather", "y", []string{c.floatIn("x", 3, 4), c.ints("ids", 2, 0, 2)})
	c.out(f32, "y")
	cs = append(cs, c)

	c = newCase("slice_opset26", 26, unrevised, "Slice-13", "constant starts [1, -1], ends [3, -100], axes [0, 1], steps [1, -2] on 4x6", "Slice")
	c.op("Slice", "y", []string{c.floatIn("x", 4, 6), c.ints("starts", 1, -1), c.ints("ends", 3, -100), c.ints("axes", 0, 1), c.ints("steps", 1, -2)})
	c.out(f32, "y")
	cs = append(cs, c)

	c = newCase("range_opset26", 26, unrevised, "Range-11", "Range(1.0, 2.0, 0.25) = [1, 1.25, 1.5, 1.75] added to x of shape 3x4", "Range", "Add")
	c.op("Add", "y", []string{c.floatIn("x", 3, 4), c.op("Range", "r", []string{c.scalar("start", 1), c.scalar("limit", 2), c.scalar("delta", 0.25)})})
	c.out(f32, "y")
	cs = append(cs, c)

	c = newCase("batch_norm_opset26", 26, unrevised, "BatchNormalization-15", "inference mode, epsilon 1e-3", "BatchNormalization")
	c.op("BatchNormalization", "y", []string{c.floatIn("x", 2, 3, 4, 4), c.randInit("scale", 0.5, 1.5, 3), c.randInit("b", -0.5, 0.5, 3),
		c.randInit("mean", -0.5, 0.5, 3), c.randInit("var", 0.5, 2, 3)}, attrFloat("epsilon", 1e-3))
	c.out(f32, "y")
	cs = append(cs, c)
	return cs
}
