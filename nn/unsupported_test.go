package nn

import (
	"errors"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/onnxlite"
)

func TestUnsupportedListsNodesNnDoesNotRun(t *testing.T) {
	// nn runs the operators it translates and those onnxlite folds away;
	// every other node is listed, named ("#i" when unnamed) in graph order,
	// and Compile refuses the model with all of them in one error (ONNX IR
	// spec: an operator set is a domain and a version, onnx/docs/IR.md,
	// from memory).
	g := newIR(13, 1)
	g.input("x", -1, 4)
	a := g.node("Relu", []string{"x"}, "a")
	b := g.node("LSTM", []string{a}, "b")
	g.m.Graph.Nodes[len(g.m.Graph.Nodes)-1].Name = ""
	c := g.node("FusedGemm", []string{b}, "c")
	g.m.Graph.Nodes[len(g.m.Graph.Nodes)-1].Domain = "com.example"
	g.m.Opsets = append(g.m.Opsets, onnxlite.OpsetImport{Domain: "com.example", Version: 1})
	g.node("Sigmoid", []string{c}, "y")
	g.output("y")
	want := []onnxlite.UnsupportedOp{
		{Op: "LSTM", Node: "#1"},
		{Op: "FusedGemm", Domain: "com.example", Node: g.m.Graph.Nodes[2].Name},
	}
	assert.Equal(t, want, Unsupported(g.m))

	_, err := Compile(g.m, Options{})
	require.ErrorIs(t, err, onnxlite.ErrUnsupported)
	var ue *onnxlite.UnsupportedError
	require.True(t, errors.As(err, &ue))
	assert.Equal(t, want, ue.Ops)
	assert.Nil(t, Unsupported(nil))
}

func TestUnsupportedCoversOnnxliteOperators(t *testing.T) {
	// Every operator onnxlite infers shapes for is one nn runs: translated,
	// or folded away by onnxlite (the fold-only operators). A model of
	// supported operators compiles.
	for _, op := range onnxlite.SupportedOps() {
		n := &onnxlite.Node{OpType: op}
		assert.True(t, runs(n), op)
		_, translated := translations[op]
		assert.NotEqual(t, translated, onnxlite.FoldOnly(op), "%s: translated or folded, not both", op)
	}
	for op := range translations {
		assert.True(t, onnxlite.IsSupported("", op), "%s: nn translates an operator onnxlite does not infer", op)
	}
	assert.Empty(t, Unsupported(mlpModel(4, 8, 3, 1)))
}
