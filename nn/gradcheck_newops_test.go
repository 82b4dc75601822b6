package nn

import (
	"testing"

	"github.com/apportion/apportion/onnxlite"
)

// TestGradcheckNewOperators checks the gradient of every operator added for
// opsets 18 to 26 and the exporters of today (normalizations, GELU,
// selections, resampling, masks, variadic and reducing operators) against
// central finite differences in float64, as TestGradcheckOperators does for
// the others. Floor, Ceil, Round and Sign have a zero gradient wherever
// they have one (the backward passes zero; PyTorch's does too, common
// practice); the check confirms the zero away from their jumps.
func TestGradcheckNewOperators(t *testing.T) {
	unary := func(op string, attrs ...*onnxlite.Attribute) func(g *irGraph) {
		return func(g *irGraph) { g.node(op, []string{"x"}, "y", attrs...) }
	}
	integers := []float64{-3, -2, -1, 0, 1, 2, 3}
	halves := []float64{-2.5, -1.5, -0.5, 0.5, 1.5, 2.5}
	cases := []opCase{
		{name: "Gelu none", build: unary("Gelu"), shape: []int64{7}, lo: -3, hi: 3, opset: 20},
		{name: "Gelu tanh", build: unary("Gelu", aString("approximate", "tanh")), shape: []int64{7}, lo: -3, hi: 3, opset: 20},
		{name: "Mish", build: unary("Mish"), shape: []int64{7}, lo: -4, hi: 4, opset: 18},
		{name: "ThresholdedRelu", build: unary("ThresholdedRelu", aFloat("alpha", 0.4)), shape: []int64{7}, lo: -2, hi: 2, kinks: []float64{0.4}},
		{name: "Reciprocal", build: unary("Reciprocal"), shape: []int64{7}, lo: 0.5, hi: 3},
		{name: "Sign Floor Ceil Round", build: func(g *irGraph) {
			a := g.node("Sign", []string{"x"}, "a")
			b := g.node("Floor", []string{"x"}, "b")
			c := g.node("Ceil", []string{"x"}, "c")
			d := g.node("Round", []string{"x"}, "d")
			e := g.node("Sum", []string{a, b, c, d, "x"}, "e") // x keeps the gradient non-trivial
			g.node("Mul", []string{e, "x"}, "y")
		}, shape: []int64{6}, lo: -3, hi: 3, kinks: append(integers, halves...)},
		{name: "Sum Mean Max Min broadcast", build: func(g *irGraph) {
			a := g.node("Sum", []string{"x", g.random("s", 1, 3, 1), g.random("t", 1, 4)}, "a")
			b := g.node("Mean", []string{a, "x", g.random("u", 1, 4)}, "b")
			c := g.node("Max", []string{b, g.random("v", 1, 3, 1), "x"}, "c")
			g.node("Min", []string{c, g.random("w", 1, 4), a}, "y")
		}, shape: []int64{3, 4}, lo: -1, hi: 1, kinks: []float64{}},
		{name: "Where Less Greater Equal", build: func(g *irGraph) {
			t := g.random("t", 1, 4)
			m := g.node("Less", []string{"x", t}, "m")
			d := g.node("Mul", []string{"x", g.floats("two", nil, []float32{2})}, "d")
			a := g.node("Where", []string{m, "x", d}, "a")
			gt := g.node("Greater", []string{a, g.floats("z", nil, []float32{0.25})}, "gt")
			b := g.node("Where", []string{gt, a, g.random("c", 1, 3, 1)}, "b")
			eq := g.node("Equal", []string{"x", g.floats("h", nil, []float32{0.5})}, "eq")
			g.node("Where", []string{eq, g.floats("k", nil, []float32{7}), b}, "y")
		}, shape: []int64{3, 4}, lo: -1, hi: 1, opset: 16},
		{name: "ReduceMax ReduceMin ReduceL2 ReduceLogSumExp", build: func(g *irGraph) {
			a := g.node("ReduceMax", []string{"x", g.ints("a1", 2)}, "a")
			b := g.node("ReduceMin", []string{"x", g.ints("a2", 1)}, "b", aInt("keepdims", 0))
			c := g.node("ReduceL2", []string{"x", g.ints("a3", -1)}, "c")
			d := g.node("ReduceLogSumExp", []string{"x", g.ints("a4", 1, 2)}, "d")
			ac := g.node("Add", []string{a, c}, "ac")
			bu := g.node("Unsqueeze", []string{b, g.ints("a5", 1)}, "bu")
			m := g.node("Mul", []string{ac, bu}, "m")
			g.node("Add", []string{m, d}, "y")
		}, shape: []int64{3, 4}, lo: -1, hi: 1, opset: 18},
		{name: "Slice Split Concat", build: func(g *irGraph) {
			s := g.node("Slice", []string{"x", g.ints("st", 4), g.ints("en", -100), g.ints("ax", 2), g.ints("sp", -2)}, "s")
			g.m.Graph.Nodes = append(g.m.Graph.Nodes, &onnxlite.Node{Name: "split", OpType: "Split",
				Inputs: []string{"x"}, Outputs: []string{"p", "q", "r"}, Attrs: []*onnxlite.Attribute{aInt("axis", 2), aInt("num_outputs", 3)}})
			pq := g.node("Mul", []string{"p", "q"}, "pq")
			g.node("Concat", []string{s, pq, "r"}, "y", aInt("axis", 2))
		}, shape: []int64{4, 5}, lo: -1, hi: 1, opset: 18},
		{name: "Expand Tile Gather", build: func(g *irGraph) {
			e := g.node("Expand", []string{"x", g.ints("sh", 1, 3, 4)}, "e")
			tl := g.node("Tile", []string{e, g.ints("rp", 1, 1, 2)}, "t")
			g.node("Gather", []string{tl, g.ints("id", 5, 0, -1, 5)}, "y", aInt("axis", 2))
		}, shape: []int64{3, 1}, lo: -1, hi: 1},
		{name: "Pad axes wrap", build: func(g *irGraph) {
			g.node("Pad", []string{"x", g.ints("pads", 2, 3), "", g.ints("axes", -1)}, "y", aString("mode", "wrap"))
		}, shape: []int64{2, 3}, lo: -1, hi: 1, opset: 19},
		{name: "LayerNormalization axis -1", build: func(g *irGraph) {
			g.node("LayerNormalization", []string{"x", g.random("s", 1, 5), g.random("b", 1, 5)}, "y")
		}, shape: []int64{2, 5}, lo: -2, hi: 2, opset: 17},
		{name: "LayerNormalization axis 1 with statistics", build: func(g *irGraph) {
			g.m.Graph.Nodes = append(g.m.Graph.Nodes, &onnxlite.Node{Name: "ln", OpType: "LayerNormalization",
				Inputs: []string{"x", g.random("s", 1, 3, 4)}, Outputs: []string{"a", "mean", "inv"},
				Attrs: []*onnxlite.Attribute{aInt("axis", 1), aFloat("epsilon", 1e-3)}})
			m := g.node("Mul", []string{"mean", "inv"}, "mi")
			g.node("Add", []string{"a", m}, "y")
		}, shape: []int64{3, 4}, lo: -2, hi: 2, opset: 17},
		{name: "GroupNormalization opset 18", build: func(g *irGraph) {
			g.node("GroupNormalization", []string{"x", g.random("s", 1, 2), g.random("b", 1, 2)}, "y", aInt("num_groups", 2))
		}, shape: []int64{4, 3}, lo: -2, hi: 2, opset: 18},
		{name: "GroupNormalization opset 21", build: func(g *irGraph) {
			g.node("GroupNormalization", []string{"x", g.random("s", 1, 4), g.random("b", 1, 4)}, "y", aInt("num_groups", 2))
		}, shape: []int64{4, 3}, lo: -2, hi: 2, opset: 21},
		{name: "InstanceNormalization", build: func(g *irGraph) {
			g.node("InstanceNormalization", []string{"x", g.random("s", 1, 3), g.random("b", 1, 3)}, "y", aFloat("epsilon", 1e-4))
		}, shape: []int64{3, 2, 3}, lo: -2, hi: 2},
		{name: "Resize linear and cubic", build: func(g *irGraph) {
			a := g.node("Resize", []string{"x", "", g.floats("sc", []int64{4}, []float32{1, 1, 1.5, 2})}, "a", aString("mode", "linear"))
			g.node("Resize", []string{a, "", "", g.ints("sz", 5, 3)}, "y", aString("mode", "cubic"),
				aString("coordinate_transformation_mode", "align_corners"), aInts("axes", 2, 3))
		}, shape: []int64{2, 3, 4}, lo: -1, hi: 1, opset: 19},
		{name: "Resize nearest antialias, Upsample", build: func(g *irGraph) {
			a := g.node("Resize", []string{"x", "", g.floats("sc", []int64{2}, []float32{0.5, 0.75})}, "a",
				aString("mode", "linear"), aInt("antialias", 1), aInts("axes", 2, 3))
			g.node("Resize", []string{a, "", g.floats("s2", []int64{4}, []float32{1, 1, 2, 3})}, "y",
				aString("mode", "nearest"), aString("coordinate_transformation_mode", "asymmetric"), aString("nearest_mode", "floor"))
		}, shape: []int64{1, 6, 4}, lo: -1, hi: 1, opset: 18},
	}
	checkOpCases(t, cases, 300)
}
