package onnxlite_test

import (
	"errors"
	"math"
	"testing"

	"github.com/apportion/apportion/onnxlite"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// viewGraph is the pattern PyTorch exporters emit for x.view(x.size(0), -1)
// (common practice in exported models): Shape → Gather(0) → Unsqueeze →
// Concat with [-1] → Reshape.
func viewGraph(t *testing.T, opset int64) *onnxlite.Model {
	g := &onnxlite.Graph{
		Inputs:  []*onnxlite.ValueInfo{tensorInput("x", onnxlite.Float, 2, 3, 4, 5)},
		Outputs: []*onnxlite.ValueInfo{output("y")},
		Initializers: []*onnxlite.Tensor{
			int64Tensor(t, "zero", []int64{}, 0),
			int64Tensor(t, "minus_one", []int64{1}, -1),
		},
	}
	unsq := node("unsqueeze", "Unsqueeze", []string{"n"}, []string{"n1"}, intsAttr("axes", 0))
	if opset >= 13 {
		g.Initializers = append(g.Initializers, int64Tensor(t, "axes0", []int64{1}, 0))
		unsq = node("unsqueeze", "Unsqueeze", []string{"n", "axes0"}, []string{"n1"})
	}
	g.Nodes = []*onnxlite.Node{
		node("relu", "Relu", []string{"x"}, []string{"r"}),
		node("shape", "Shape", []string{"r"}, []string{"s"}),
		node("gather", "Gather", []string{"s", "zero"}, []string{"n"}, intAttr("axis", 0)),
		unsq,
		node("concat", "Concat", []string{"n1", "minus_one"}, []string{"target"}, intAttr("axis", 0)),
		node("reshape", "Reshape", []string{"r", "target"}, []string{"y"}),
	}
	return model(opset, g)
}

func TestInferFoldsViewPattern(t *testing.T) {
	for _, opset := range []int64{11, 13} {
		st, err := onnxlite.Infer(viewGraph(t, opset), nil)
		require.NoError(t, err, "opset %d", opset)
		ops := []string{}
		for _, n := range st.Nodes {
			ops = append(ops, n.OpType)
		}
		assert.Equal(t, []string{"Relu", "Reshape"}, ops, "opset %d", opset)
		target := st.Consts["target"]
		require.NotNil(t, target)
		// x.view(x.size(0), -1): the batch dim, then -1 (common practice).
		assert.Equal(t, []int64{2, -1}, target.Data)
		assert.Equal(t, onnxlite.Int64, target.DType)
		// Reshape: -1 takes the remaining 3·4·5 = 60 elements (ONNX Reshape spec).
		assert.Equal(t, onnxlite.ValueShape{DType: onnxlite.Float, Shape: []int{2, 60}}, st.Values["y"])
		assert.Equal(t, []string{"x"}, st.Inputs)
		assert.Equal(t, []string{"y"}, st.Outputs)
	}
}

func TestInferConcreteShapes(t *testing.T) {
	m := viewGraph(t, 13)
	m.Graph.Inputs[0].Type.Shape[0] = onnxlite.Dim{Param: "batch"}
	st, err := onnxlite.Infer(m, map[string][]int{"x": {7, 3, 4, 5}})
	require.NoError(t, err)
	assert.Equal(t, []int64{7, -1}, st.Consts["target"].Data)
	assert.Equal(t, []int{7, 60}, st.Values["y"].Shape)

	_, err = onnxlite.Infer(m, nil)
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), `"x"`)
	assert.Contains(t, err.Error(), `"batch"`)

	_, err = onnxlite.Infer(m, map[string][]int{"x": {7, 3, 4, 6}})
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), "expected 5")
	assert.Contains(t, err.Error(), "got 6")

	_, err = onnxlite.Infer(m, map[string][]int{"x": {7, 3, 4}})
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), "rank 4")

	// A shape for a value that is not a runtime input is the caller's
	// mistake, not the model's.
	_, err = onnxlite.Infer(m, map[string][]int{"x": {7, 3, 4, 5}, "zero": {1}})
	require.Error(t, err)
	assert.NotErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), `"zero"`)
}

// TestInferFoldOnlyRefused gives each fold-only operator (FoldOnly) a
// run-time input. The node forms follow the ONNX operator specs (opset 13):
// ConstantOfShape(input) and Range(start, limit, delta).
func TestInferFoldOnlyRefused(t *testing.T) {
	cases := []struct {
		op     string
		inputs []*onnxlite.ValueInfo
		inits  []*onnxlite.Tensor
		ins    []string
	}{
		{"ConstantOfShape", []*onnxlite.ValueInfo{tensorInput("x", onnxlite.Int64, 2)}, nil, []string{"x"}},
		{"Range", []*onnxlite.ValueInfo{tensorInput("x", onnxlite.Int64)},
			[]*onnxlite.Tensor{int64Tensor(t, "limit", []int64{}, 5), int64Tensor(t, "delta", []int64{}, 1)}, []string{"x", "limit", "delta"}},
	}
	for _, c := range cases {
		require.True(t, onnxlite.FoldOnly(c.op), c.op)
		g := &onnxlite.Graph{
			Inputs:       c.inputs,
			Outputs:      []*onnxlite.ValueInfo{output("y")},
			Initializers: c.inits,
			Nodes:        []*onnxlite.Node{node("pick", c.op, c.ins, []string{"y"})},
		}
		_, err := onnxlite.Infer(model(13, g), nil)
		require.ErrorIs(t, err, onnxlite.ErrFoldOnly, c.op)
		require.ErrorIs(t, err, onnxlite.ErrUnsupported, c.op)
		assert.NotErrorIs(t, err, onnxlite.ErrInvalid, c.op)
		assert.Contains(t, err.Error(), `node "pick" (`+c.op+`)`)
		assert.Contains(t, err.Error(), `"x"`, c.op)
	}

	// The same Gather on constant data folds (ONNX Gather, axis 0: rows 0
	// and 2 of [[1 2 3] [4 5 6] [7 8 9] [10 11 12]]).
	g := &onnxlite.Graph{
		Outputs: []*onnxlite.ValueInfo{output("y")},
		Initializers: []*onnxlite.Tensor{
			int64Tensor(t, "x", []int64{4, 3}, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12),
			int64Tensor(t, "idx", []int64{2}, 0, 2),
		},
		Nodes: []*onnxlite.Node{node("pick", "Gather", []string{"x", "idx"}, []string{"y"})},
	}
	st, err := onnxlite.Infer(model(13, g), nil)
	require.NoError(t, err)
	assert.Equal(t, []int64{1, 2, 3, 7, 8, 9}, st.Consts["y"].Data)
}

func TestInferBroadcastMismatch(t *testing.T) {
	g := &onnxlite.Graph{
		Inputs:  []*onnxlite.ValueInfo{tensorInput("a", onnxlite.Float, 2, 3), tensorInput("b", onnxlite.Float, 4)},
		Outputs: []*onnxlite.ValueInfo{output("y")},
		Nodes:   []*onnxlite.Node{node("add", "Add", []string{"a", "b"}, []string{"y"})},
	}
	_, err := onnxlite.Infer(model(13, g), nil)
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	// numpy broadcasting (ONNX Broadcasting.md): 3 and 4 differ and neither is 1.
	assert.Contains(t, err.Error(), "[2 3]")
	assert.Contains(t, err.Error(), "[4]")
	assert.Contains(t, err.Error(), `"add"`)
}

func TestInferIntegerDivTruncates(t *testing.T) {
	g := &onnxlite.Graph{
		Outputs: []*onnxlite.ValueInfo{output("q")},
		Initializers: []*onnxlite.Tensor{
			int64Tensor(t, "a", []int64{4}, -7, 7, -7, 7),
			int64Tensor(t, "b", []int64{4}, 2, -2, -2, 2),
		},
		Nodes: []*onnxlite.Node{node("div", "Div", []string{"a", "b"}, []string{"q"})},
	}
	st, err := onnxlite.Infer(model(13, g), nil)
	require.NoError(t, err)
	assert.Empty(t, st.Nodes)
	// C99 §6.5.5 (and the Go spec): integer quotients truncate toward zero.
	assert.Equal(t, []int64{-3, -3, 3, 3}, st.Consts["q"].Data)

	g.Initializers[1] = int64Tensor(t, "b", []int64{4}, 2, 0, 1, 1)
	_, err = onnxlite.Infer(model(13, g), nil)
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), "division by zero")
}

func TestInferFloatFoldRoundsOnce(t *testing.T) {
	a, err := onnxlite.NewTensor("a", onnxlite.Float, []int64{1}, []float32{1})
	require.NoError(t, err)
	b, err := onnxlite.NewTensor("b", onnxlite.Float, []int64{1}, []float32{3})
	require.NoError(t, err)
	g := &onnxlite.Graph{
		Outputs:      []*onnxlite.ValueInfo{output("q")},
		Initializers: []*onnxlite.Tensor{a, b},
		Nodes:        []*onnxlite.Node{node("div", "Div", []string{"a", "b"}, []string{"q"})},
	}
	st, err := onnxlite.Infer(model(13, g), nil)
	require.NoError(t, err)
	// IEEE 754 binary32 nearest to 1/3 is 0x3eaaaaab.
	assert.Equal(t, uint32(0x3eaaaaab), math.Float32bits(st.Consts["q"].Data.([]float32)[0]))
}

func TestInferLimits(t *testing.T) {
	t.Run("elements", func(t *testing.T) {
		g := &onnxlite.Graph{
			Outputs:      []*onnxlite.ValueInfo{output("y")},
			Initializers: []*onnxlite.Tensor{int64Tensor(t, "shape", []int64{3}, 1<<20, 1<<20, 1<<20)},
			Nodes:        []*onnxlite.Node{node("fill", "ConstantOfShape", []string{"shape"}, []string{"y"})},
		}
		_, err := onnxlite.Infer(model(13, g), nil)
		var le *onnxlite.LimitError
		require.ErrorAs(t, err, &le)
		assert.Equal(t, onnxlite.DefaultLimits.MaxTensorElements, le.Max)
		assert.Contains(t, err.Error(), `"fill"`)
	})
	t.Run("rank", func(t *testing.T) {
		g := &onnxlite.Graph{
			Inputs:       []*onnxlite.ValueInfo{tensorInput("x", onnxlite.Float, 1, 1, 1, 1, 1, 1, 1, 1)},
			Outputs:      []*onnxlite.ValueInfo{output("y")},
			Initializers: []*onnxlite.Tensor{int64Tensor(t, "axes", []int64{1}, 0)},
			Nodes:        []*onnxlite.Node{node("u", "Unsqueeze", []string{"x", "axes"}, []string{"y"})},
		}
		_, err := onnxlite.Infer(model(13, g), nil)
		var le *onnxlite.LimitError
		require.ErrorAs(t, err, &le)
		assert.Equal(t, "MaxRank", le.Limit)
		assert.Equal(t, int64(9), le.Value)
	})
}

func TestInferBadInput(t *testing.T) {
	nan, err := onnxlite.NewTensor("delta", onnxlite.Float, []int64{}, []float32{float32(math.NaN())})
	require.NoError(t, err)
	one, err := onnxlite.NewTensor("one", onnxlite.Float, []int64{}, []float32{1})
	require.NoError(t, err)
	g := &onnxlite.Graph{
		Outputs:      []*onnxlite.ValueInfo{output("y")},
		Initializers: []*onnxlite.Tensor{one, nan},
		Nodes:        []*onnxlite.Node{node("r", "Range", []string{"one", "one", "delta"}, []string{"y"})},
	}
	_, err = onnxlite.Infer(model(13, g), nil)
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), "NaN")

	// A Reshape whose target does not hold the input's element count.
	g = &onnxlite.Graph{
		Inputs:       []*onnxlite.ValueInfo{tensorInput("x", onnxlite.Float, 2, 3)},
		Outputs:      []*onnxlite.ValueInfo{output("y")},
		Initializers: []*onnxlite.Tensor{int64Tensor(t, "s", []int64{2}, 4, 2)},
		Nodes:        []*onnxlite.Node{node("rs", "Reshape", []string{"x", "s"}, []string{"y"})},
	}
	_, err = onnxlite.Infer(model(13, g), nil)
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), "6 elements")
	assert.Contains(t, err.Error(), "8 elements")

	// A node missing a required input.
	g.Nodes[0].Inputs = []string{"x"}
	_, err = onnxlite.Infer(model(13, g), nil)
	require.ErrorIs(t, err, onnxlite.ErrInvalid)

	// Initializer data that disagrees with its dims.
	g.Initializers[0] = &onnxlite.Tensor{Name: "s", DType: onnxlite.Int64, Dims: []int64{3}, Data: []int64{1}}
	g.Nodes[0].Inputs = []string{"x", "s"}
	_, err = onnxlite.Infer(model(13, g), nil)
	require.ErrorIs(t, err, onnxlite.ErrInvalid)

	_, err = onnxlite.Infer(&onnxlite.Model{}, nil)
	require.True(t, errors.Is(err, onnxlite.ErrInvalid))
}

func TestInferSymbolicDimsAgree(t *testing.T) {
	a := tensorInput("a", onnxlite.Float, 0, 3)
	b := tensorInput("b", onnxlite.Float, 0, 3)
	a.Type.Shape[0] = onnxlite.Dim{Param: "batch"}
	b.Type.Shape[0] = onnxlite.Dim{Param: "batch"}
	g := &onnxlite.Graph{
		Inputs:  []*onnxlite.ValueInfo{a, b},
		Outputs: []*onnxlite.ValueInfo{output("y")},
		Nodes:   []*onnxlite.Node{node("add", "Add", []string{"a", "b"}, []string{"y"})},
	}
	st, err := onnxlite.Infer(model(13, g), map[string][]int{"a": {5, 3}, "b": {5, 3}})
	require.NoError(t, err)
	assert.Equal(t, []int{5, 3}, st.Values["y"].Shape)
	_, err = onnxlite.Infer(model(13, g), map[string][]int{"a": {5, 3}, "b": {1, 3}})
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), `"batch"`)
	assert.Contains(t, err.Error(), "expected 5, got 1")
}

// inferOne runs Infer on a one-node graph whose runtime inputs have the given
// shapes (FLOAT) and whose constant inputs are int64 initializers.
func inferOne(t *testing.T, opset int64, op string, shapes [][]int64, consts map[int][]int64, attrs ...*onnxlite.Attribute) (onnxlite.ValueShape, error) {
	t.Helper()
	g := &onnxlite.Graph{Outputs: []*onnxlite.ValueInfo{output("y")}}
	n := node("n", op, nil, []string{"y"}, attrs...)
	total := len(shapes) + len(consts)
	for i := 0; i < total; i++ {
		name := string(rune('a' + i))
		if v, ok := consts[i]; ok {
			g.Initializers = append(g.Initializers, int64Tensor(t, name, []int64{int64(len(v))}, v...))
		} else if len(shapes) > 0 {
			g.Inputs = append(g.Inputs, tensorInput(name, onnxlite.Float, shapes[0]...))
			shapes = shapes[1:]
		} else {
			name = ""
		}
		n.Inputs = append(n.Inputs, name)
	}
	g.Nodes = []*onnxlite.Node{n}
	st, err := onnxlite.Infer(model(opset, g), nil)
	if err != nil {
		return onnxlite.ValueShape{}, err
	}
	return st.Values["y"], nil
}

func strAttr(name, v string) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrString, S: v}
}

// shapeRuleCase is one node run through inferOne. With says nil the
// inferred output shape must be want; otherwise Infer must fail with an
// ErrInvalid that names the node and contains each of says.
type shapeRuleCase struct {
	name   string
	opset  int64
	op     string
	shapes [][]int64
	consts map[int][]int64
	attrs  []*onnxlite.Attribute
	want   []int
	says   []string
}

func checkShapeRules(t *testing.T, cases []shapeRuleCase) {
	t.Helper()
	for _, c := range cases {
		got, err := inferOne(t, c.opset, c.op, c.shapes, c.consts, c.attrs...)
		if c.says == nil {
			if assert.NoError(t, err, c.name) {
				assert.Equal(t, c.want, got.Shape, c.name)
			}
			continue
		}
		if assert.ErrorIs(t, err, onnxlite.ErrInvalid, c.name) {
			assert.Contains(t, err.Error(), `node "n"`, c.name)
			for _, s := range c.says {
				assert.Contains(t, err.Error(), s, c.name)
			}
		}
	}
}

func TestInferShapeRules(t *testing.T) {
	checkShapeRules(t, []shapeRuleCase{
		// numpy.matmul documentation: a 1-D first operand gets a 1 prepended, a
		// 1-D second one a 1 appended, both removed afterwards; batch dims broadcast.
		{"matmul vector·matrix", 13, "MatMul", [][]int64{{3}, {2, 3, 4}}, nil, nil, []int{2, 4}, nil},
		{"matmul matrix·vector", 13, "MatMul", [][]int64{{2, 5, 3}, {3}}, nil, nil, []int{2, 5}, nil},
		{"matmul vector·vector", 13, "MatMul", [][]int64{{3}, {3}}, nil, nil, []int{}, nil},
		{"matmul batch broadcast", 13, "MatMul", [][]int64{{4, 1, 2, 3}, {5, 3, 6}}, nil, nil, []int{4, 5, 2, 6}, nil},
		// ONNX Gemm: A' is M×K, B' is K×N, C broadcasts to M×N.
		{"gemm transposed", 13, "Gemm", [][]int64{{3, 2}, {4, 3}, {4}}, nil,
			[]*onnxlite.Attribute{intAttr("transA", 1), intAttr("transB", 1)}, []int{2, 4}, nil},
		{"gemm no C", 13, "Gemm", [][]int64{{2, 3}, {3, 4}}, nil, nil, []int{2, 4}, nil},
		// ONNX Conv/pool output size ⌊(in + pads − ((k−1)·d + 1))/s⌋ + 1, channels M.
		{"conv 1-D grouped dilated", 13, "Conv", [][]int64{{1, 4, 10}, {6, 2, 3}}, nil,
			[]*onnxlite.Attribute{intAttr("group", 2), intsAttr("dilations", 2), intsAttr("strides", 2), intsAttr("pads", 1, 0)}, []int{1, 6, (10+1-((3-1)*2+1))/2 + 1}, nil},
		{"conv SAME_LOWER", 13, "Conv", [][]int64{{1, 1, 7, 8}, {2, 1, 3, 3}}, nil,
			[]*onnxlite.Attribute{strAttr("auto_pad", "SAME_LOWER"), intsAttr("strides", 2, 3)}, []int{1, 2, (7 + 1) / 2, (8 + 2) / 3}, nil}, // ⌈in/s⌉
		{"maxpool 1-D ceil", 12, "MaxPool", [][]int64{{1, 3, 10}}, nil,
			[]*onnxlite.Attribute{intsAttr("kernel_shape", 3), intsAttr("strides", 2), intAttr("ceil_mode", 1)}, []int{1, 3, (10-3+1)/2 + 1}, nil}, // ⌈(10−3)/2⌉ + 1
		{"avgpool VALID", 11, "AveragePool", [][]int64{{1, 3, 10, 9}}, nil,
			[]*onnxlite.Attribute{intsAttr("kernel_shape", 3, 2), intsAttr("strides", 2, 2), strAttr("auto_pad", "VALID")}, []int{1, 3, (10 - 3 + 1 + 1) / 2, (9 - 2 + 1 + 1) / 2}, nil}, // ⌈(in−k+1)/s⌉
		{"global pool 1-D", 13, "GlobalAveragePool", [][]int64{{2, 3, 10}}, nil, nil, []int{2, 3, 1}, nil},
		// ONNX Flatten: (d0·…·d_{axis−1}, d_axis·…), negative axis from opset 11.
		{"flatten negative axis", 13, "Flatten", [][]int64{{2, 3, 4, 5}}, nil, []*onnxlite.Attribute{intAttr("axis", -1)}, []int{24, 5}, nil},
		{"flatten axis 0", 13, "Flatten", [][]int64{{2, 3}}, nil, []*onnxlite.Attribute{intAttr("axis", 0)}, []int{1, 6}, nil},
		// ONNX Reshape: 0 copies the input dim; with allowzero=1 it is a 0.
		{"reshape zero copies", 13, "Reshape", [][]int64{{2, 3, 4}}, map[int][]int64{1: {0, -1}}, nil, []int{2, 12}, nil},
		{"reshape allowzero", 14, "Reshape", [][]int64{{0, 3}}, map[int][]int64{1: {3, 0}},
			[]*onnxlite.Attribute{intAttr("allowzero", 1)}, []int{3, 0}, nil},
		// ONNX Squeeze/Unsqueeze: attribute axes before opset 13, input from it.
		{"squeeze all ones", 13, "Squeeze", [][]int64{{1, 3, 1, 2}}, nil, nil, []int{3, 2}, nil},
		{"squeeze attr", 11, "Squeeze", [][]int64{{1, 3, 1}}, nil, []*onnxlite.Attribute{intsAttr("axes", -1)}, []int{1, 3}, nil},
		{"unsqueeze input", 13, "Unsqueeze", [][]int64{{3, 4}}, map[int][]int64{1: {-1, 0}}, nil, []int{1, 3, 4, 1}, nil},
		// ONNX Transpose: the default perm reverses the axes.
		{"transpose default", 13, "Transpose", [][]int64{{2, 3, 4}}, nil, nil, []int{4, 3, 2}, nil},
		// ONNX Pad: pads are begins then ends; negative pads crop.
		{"pad attr opset 2", 2, "Pad", [][]int64{{2, 3}}, nil, []*onnxlite.Attribute{intsAttr("pads", 1, -1, 0, 2)}, []int{3, 4}, nil},
		{"pad input", 13, "Pad", [][]int64{{2, 3}}, map[int][]int64{1: {0, 1, 2, 1}}, nil, []int{4, 5}, nil},
		// ONNX ReduceSum 13: axes input; empty axes with noop_with_empty_axes=1 is the identity.
		{"reducesum noop", 13, "ReduceSum", [][]int64{{2, 3}}, nil, []*onnxlite.Attribute{intAttr("noop_with_empty_axes", 1)}, []int{2, 3}, nil},
		{"reducesum all", 13, "ReduceSum", [][]int64{{2, 3}}, nil, []*onnxlite.Attribute{intAttr("keepdims", 0)}, []int{}, nil},
		{"reducemean attr", 13, "ReduceMean", [][]int64{{2, 3, 4}}, nil, []*onnxlite.Attribute{intsAttr("axes", 1)}, []int{2, 1, 4}, nil},
		// ONNX Add before opset 7: with broadcast=1, B matches A's dims from axis.
		{"legacy broadcast", 6, "Add", [][]int64{{2, 3, 4, 5}, {3, 4}}, nil,
			[]*onnxlite.Attribute{intAttr("broadcast", 1), intAttr("axis", 1)}, []int{2, 3, 4, 5}, nil},
		{"numpy broadcast", 13, "Mul", [][]int64{{2, 1, 4}, {3, 1}}, nil, nil, []int{2, 3, 4}, nil},
	})
}

func TestInferShapeRuleErrors(t *testing.T) {
	checkShapeRules(t, []shapeRuleCase{
		{"matmul inner", 13, "MatMul", [][]int64{{2, 3}, {4, 5}}, nil, nil, nil, []string{"[2 3]", "[4 5]"}},
		{"gemm inner", 13, "Gemm", [][]int64{{2, 3}, {4, 5}}, nil, nil, nil, []string{"2×3", "4×5"}},
		{"conv channels", 13, "Conv", [][]int64{{1, 3, 5, 5}, {2, 2, 3, 3}}, nil, nil, nil, []string{"X has 3", "2"}},
		{"conv kernel larger", 13, "Conv", [][]int64{{1, 1, 2, 2}, {1, 1, 3, 3}}, nil, nil, nil, []string{"smaller than the effective kernel 3"}},
		{"legacy without broadcast", 6, "Add", [][]int64{{2, 3}, {3}}, nil, nil, nil, []string{"broadcast=1", "[2 3]", "[3]"}},
		{"squeeze non-one", 13, "Squeeze", [][]int64{{2, 3}}, map[int][]int64{1: {0}}, nil, nil, []string{"size 2", "expected 1"}},
		{"concat mismatch", 13, "Concat", [][]int64{{2, 3}, {2, 4}}, nil, []*onnxlite.Attribute{intAttr("axis", 0)}, nil, []string{"[2 4]", "axis 1"}},
		{"axis out of range", 13, "Softmax", [][]int64{{2, 3}}, nil, []*onnxlite.Attribute{intAttr("axis", 2)}, nil, []string{"axis 2", "-2 to 1"}},
		{"transpose perm", 13, "Transpose", [][]int64{{2, 3}}, nil, []*onnxlite.Attribute{intsAttr("perm", 0, 0)}, nil, []string{"perm [0 0]"}},
		{"auto_pad", 13, "MaxPool", [][]int64{{1, 1, 4}}, nil, []*onnxlite.Attribute{intsAttr("kernel_shape", 2), strAttr("auto_pad", "FULL")}, nil, []string{`"FULL"`}},
		{"reshape two -1", 13, "Reshape", [][]int64{{2, 3}}, map[int][]int64{1: {-1, -1}}, nil, nil, []string{"two"}},
		// ONNX MatMul and Conv specs: inputs A, B and X, W are required.
		{"matmul without B", 13, "MatMul", [][]int64{{2, 3}}, nil, nil, nil, []string{"expected input 1, got none"}},
		{"conv without W", 13, "Conv", [][]int64{{1, 1, 4, 4}}, nil, nil, nil, []string{"expected input 1, got none"}},
	})
}

func TestInferFoldBroadcastLimit(t *testing.T) {
	// [2^15, 1] + [1, 2^14] broadcasts to 2^29 elements, above DefaultLimits.MaxTensorElements = 2^28.
	a := make([]int64, 1<<15)
	b := make([]int64, 1<<14)
	ta, err := onnxlite.NewTensor("a", onnxlite.Int64, []int64{1 << 15, 1}, a)
	require.NoError(t, err)
	tb, err := onnxlite.NewTensor("b", onnxlite.Int64, []int64{1, 1 << 14}, b)
	require.NoError(t, err)
	g := &onnxlite.Graph{
		Outputs:      []*onnxlite.ValueInfo{output("y")},
		Initializers: []*onnxlite.Tensor{ta, tb},
		Nodes:        []*onnxlite.Node{node("big", "Add", []string{"a", "b"}, []string{"y"})},
	}
	_, err = onnxlite.Infer(model(13, g), nil)
	var le *onnxlite.LimitError
	require.ErrorAs(t, err, &le)
	assert.Equal(t, int64(1<<29), le.Value)
	assert.Contains(t, err.Error(), `"big"`)
}
