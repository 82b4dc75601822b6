package onnxlite_test

import (
	"errors"
	"slices"
	"testing"

	"github.com/apportion/apportion/onnxlite"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// Hand-built graphs. The structural rules they exercise are those of the ONNX
// IR specification (onnx/docs/IR.md, "Graphs" and "Names Within a Graph":
// names are assigned once, every input is defined, nodes are topologically
// sorted, the default opset is imported); from memory of that document.

func tensorInput(name string, dt onnxlite.DataType, dims ...int64) *onnxlite.ValueInfo {
	ds := make([]onnxlite.Dim, len(dims))
	for i, d := range dims {
		ds[i] = onnxlite.Dim{Value: d, HasValue: true}
	}
	return &onnxlite.ValueInfo{Name: name, Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: dt, Shape: ds, HasShape: true}}
}

func output(name string) *onnxlite.ValueInfo { return &onnxlite.ValueInfo{Name: name} }

func node(name, op string, ins, outs []string, attrs ...*onnxlite.Attribute) *onnxlite.Node {
	return &onnxlite.Node{Name: name, OpType: op, Inputs: ins, Outputs: outs, Attrs: attrs}
}

func intsAttr(name string, v ...int64) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrInts, Ints: v}
}

func intAttr(name string, v int64) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrInt, I: v}
}

func int64Tensor(t *testing.T, name string, dims []int64, v ...int64) *onnxlite.Tensor {
	tn, err := onnxlite.NewTensor(name, onnxlite.Int64, dims, v)
	require.NoError(t, err)
	return tn
}

func model(opset int64, g *onnxlite.Graph) *onnxlite.Model {
	return &onnxlite.Model{IRVersion: 8, Opsets: []onnxlite.OpsetImport{{Domain: "", Version: opset}}, Graph: g}
}

// chain is x → Relu a → Relu b → Relu c → y.
func chain() *onnxlite.Graph {
	return &onnxlite.Graph{
		Inputs:  []*onnxlite.ValueInfo{tensorInput("x", onnxlite.Float, 2, 3)},
		Outputs: []*onnxlite.ValueInfo{output("y")},
		Nodes: []*onnxlite.Node{
			node("a", "Relu", []string{"x"}, []string{"t1"}),
			node("b", "Relu", []string{"t1"}, []string{"t2"}),
			node("c", "Relu", []string{"t2"}, []string{"y"}),
		},
	}
}

func TestValidateAcceptsChain(t *testing.T) {
	require.NoError(t, model(13, chain()).Validate())
}

func TestValidateNoGraph(t *testing.T) {
	err := (&onnxlite.Model{}).Validate()
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), "graph")
	var nilModel *onnxlite.Model
	require.ErrorIs(t, nilModel.Validate(), onnxlite.ErrInvalid)
}

func TestValidateMissingDefaultOpset(t *testing.T) {
	m := model(13, chain())
	m.Opsets = []onnxlite.OpsetImport{{Domain: "com.example", Version: 1}}
	err := m.Validate()
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), "default domain")
	assert.Contains(t, err.Error(), `"com.example" version 1`)
}

// TestValidateOnlyOtherDomains: a model whose nodes all come from another
// operator set it imports (as the ONNX backend test data's
// ai.onnx.preview.training cases do) breaks no rule of the ONNX IR
// specification (opset_import lists every domain used), so it is not
// supported rather than invalid.
func TestValidateOnlyOtherDomains(t *testing.T) {
	g := chain()
	for _, n := range g.Nodes {
		n.Domain = "ai.onnx.preview.training"
	}
	m := model(13, g)
	m.Opsets = []onnxlite.OpsetImport{{Domain: "ai.onnx.preview.training", Version: 1}}
	err := m.Validate()
	require.ErrorIs(t, err, onnxlite.ErrUnsupported)
	assert.NotErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), `"ai.onnx.preview.training" version 1`)
}

func TestValidateOpsetOutOfRange(t *testing.T) {
	// ONNX Runtime 1.30 accepts opsets up to 26 (testdata/ort/README.md);
	// a newer one is refused with the advice to re-export.
	require.NoError(t, model(26, chain()).Validate())
	err := model(27, chain()).Validate()
	require.ErrorIs(t, err, onnxlite.ErrUnsupported)
	assert.NotErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Equal(t, "not supported by apportion: the model imports ONNX opset 27, newer than 26, the newest apportion reads: re-export the model at opset 26", err.Error())
}

func TestValidateDomainNotImported(t *testing.T) {
	g := chain()
	g.Nodes[1].Domain = "com.example"
	err := model(13, g).Validate()
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), `"b"`)
	assert.Contains(t, err.Error(), "com.example")
}

func TestValidateDuplicateNames(t *testing.T) {
	t.Run("initializers", func(t *testing.T) {
		g := chain()
		g.Initializers = []*onnxlite.Tensor{int64Tensor(t, "w", []int64{1}, 1), int64Tensor(t, "w", []int64{1}, 2)}
		err := model(13, g).Validate()
		require.ErrorIs(t, err, onnxlite.ErrInvalid)
		assert.Contains(t, err.Error(), `initializer "w"`)
	})
	t.Run("node outputs", func(t *testing.T) {
		g := chain()
		g.Nodes[2].Outputs = []string{"t1"}
		g.Outputs = []*onnxlite.ValueInfo{output("t1")}
		err := model(13, g).Validate()
		require.ErrorIs(t, err, onnxlite.ErrInvalid)
		assert.Contains(t, err.Error(), `node "c"`)
		assert.Contains(t, err.Error(), `"t1" is already defined by node "a"`)
	})
	t.Run("node output shadows input", func(t *testing.T) {
		g := chain()
		g.Nodes[0].Outputs = []string{"x"}
		err := model(13, g).Validate()
		require.ErrorIs(t, err, onnxlite.ErrInvalid)
		assert.Contains(t, err.Error(), "graph input")
	})
	t.Run("input repeating an initializer (IR < 4)", func(t *testing.T) {
		g := chain()
		g.Initializers = []*onnxlite.Tensor{int64Tensor(t, "w", []int64{1}, 1)}
		g.Inputs = append(g.Inputs, tensorInput("w", onnxlite.Int64, 1))
		m := model(6, g)
		m.IRVersion = 3
		require.NoError(t, m.Validate())
	})
}

func TestValidateMissingInput(t *testing.T) {
	g := chain()
	g.Nodes[1].Inputs = []string{"nowhere"}
	err := model(13, g).Validate()
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), `node "b" (Relu)`)
	assert.Contains(t, err.Error(), `"nowhere"`)

	g = chain()
	g.Outputs = []*onnxlite.ValueInfo{output("z")}
	err = model(13, g).Validate()
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	assert.Contains(t, err.Error(), `graph output "z"`)
}

func TestValidateOmittedOptionalInput(t *testing.T) {
	g := chain()
	g.Nodes[1] = node("b", "Clip", []string{"t1", "", ""}, []string{"t2"})
	require.NoError(t, model(13, g).Validate())
}

func TestValidateLeavesNodesInferSortsThem(t *testing.T) {
	g := chain()
	a, b, c := g.Nodes[0], g.Nodes[1], g.Nodes[2]
	// A second independent branch d keeps its place relative to a (stable).
	d := node("d", "Relu", []string{"x"}, []string{"u"})
	g.Outputs = append(g.Outputs, output("u"))
	g.Nodes = []*onnxlite.Node{c, d, b, a}
	m := model(13, g)
	require.NoError(t, m.Validate())
	assert.Equal(t, []*onnxlite.Node{c, d, b, a}, g.Nodes, "Validate does not modify the model")
	st, err := onnxlite.Infer(m, nil)
	require.NoError(t, err)
	assert.Equal(t, []*onnxlite.Node{d, a, b, c}, st.Nodes)
	assert.Equal(t, []*onnxlite.Node{c, d, b, a}, g.Nodes, "Infer does not modify the model")

	// A sorted graph is left as it is.
	g.Nodes = []*onnxlite.Node{a, d, b, c}
	st, err = onnxlite.Infer(m, nil)
	require.NoError(t, err)
	assert.Equal(t, []*onnxlite.Node{a, d, b, c}, st.Nodes)
}

func TestValidateCycle(t *testing.T) {
	g := chain()
	// a reads c's output: a → b → c → a.
	g.Nodes[0].Inputs = []string{"x2"}
	g.Nodes = append(g.Nodes, node("e", "Relu", []string{"x"}, []string{"unused"}))
	g.Nodes[2].Outputs = []string{"y", "x2"}
	g.Nodes[2].OpType = "Dropout"
	err := model(13, g).Validate()
	require.ErrorIs(t, err, onnxlite.ErrCycle)
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	msg := err.Error()
	for _, n := range []string{`"a"`, `"b"`, `"c"`} {
		assert.Contains(t, msg, n)
	}
	assert.NotContains(t, msg, `"e"`, "e is not on the cycle")
}

func TestValidateUnsupportedAllAtOnce(t *testing.T) {
	g := chain()
	g.Nodes[0].OpType = "LSTM"
	g.Nodes[2].OpType = "TopK"
	g.Nodes[1].Domain = "com.microsoft"
	g.Nodes[1].OpType = "FusedGemm"
	m := model(13, g)
	m.Opsets = append(m.Opsets, onnxlite.OpsetImport{Domain: "com.microsoft", Version: 1})
	err := m.Validate()
	require.ErrorIs(t, err, onnxlite.ErrUnsupported)
	require.NotErrorIs(t, err, onnxlite.ErrInvalid)
	var ue *onnxlite.UnsupportedError
	require.ErrorAs(t, err, &ue)
	want := []onnxlite.UnsupportedOp{
		{Op: "LSTM", Node: "a"},
		{Op: "FusedGemm", Domain: "com.microsoft", Node: "b"},
		{Op: "TopK", Node: "c"},
	}
	assert.Equal(t, want, ue.Ops)
	assert.Equal(t, want, onnxlite.Unsupported(m))
	for _, s := range []string{"LSTM", `"a"`, "com.microsoft.FusedGemm", `"b"`, "TopK", `"c"`} {
		assert.Contains(t, err.Error(), s)
	}
}

func TestValidateStructureBeforeOps(t *testing.T) {
	g := chain()
	g.Nodes[0].OpType = "LSTM"
	g.Nodes[1].Inputs = []string{"nowhere"}
	err := model(13, g).Validate()
	require.ErrorIs(t, err, onnxlite.ErrInvalid)
	require.False(t, errors.Is(err, onnxlite.ErrUnsupported))
}

func TestUnnamedNodesAreNumbered(t *testing.T) {
	g := chain()
	g.Nodes[1].Name = ""
	g.Nodes[1].OpType = "TopK"
	assert.Equal(t, []onnxlite.UnsupportedOp{{Op: "TopK", Node: "#1"}}, onnxlite.Unsupported(model(13, g)))
}

func TestSupportedOps(t *testing.T) {
	ops := onnxlite.SupportedOps()
	assert.True(t, slices.IsSorted(ops))
	for _, op := range ops {
		assert.True(t, onnxlite.IsSupported("", op), op)
		assert.True(t, onnxlite.IsSupported("ai.onnx", op), op)
		assert.False(t, onnxlite.IsSupported("com.example", op), op)
	}
	assert.False(t, onnxlite.IsSupported("", "LSTM"))
	var fold []string
	for _, op := range ops {
		if onnxlite.FoldOnly(op) {
			fold = append(fold, op)
		}
	}
	assert.Equal(t, []string{"ConstantOfShape", "Range", "Shape"}, fold)
}
