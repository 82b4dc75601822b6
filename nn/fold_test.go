package nn

import (
	"context"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/onnxlite"
)

// TestFoldsConstantSubgraphs compiles a model with two all-constant
// subgraphs the onnxlite folding does not evaluate itself: integer pads
// computed through a Transpose (as PyTorch's exporter writes a reflection
// pad's amounts) and a float Relu → Exp of a weight. The engine evaluates
// both when the program is compiled, so only Add and Pad are left to run;
// the result is the closed form pad(x + exp(max(c, 0))) on both engines.
func TestFoldsConstantSubgraphs(t *testing.T) {
	g := newIR(13, 40)
	g.input("x", -1, 4)
	c := g.floats("c", []int64{4}, []float32{-1, 2, -3, 4})
	r := g.node("Relu", []string{c}, "r")
	e := g.node("Exp", []string{r}, "e")
	a := g.node("Add", []string{"x", e}, "a")
	// [[0, 0], [1, 2]]ᵀ flattened: pads [0, 1, 0, 2] (begins, then ends).
	pm := g.node("Reshape", []string{g.ints("p", 0, 0, 1, 2), g.ints("s", 2, 2)}, "pm")
	pt := g.node("Transpose", []string{pm}, "pt", aInts("perm", 1, 0))
	pads := g.node("Reshape", []string{pt, g.ints("s1", -1)}, "pads")
	g.node("Pad", []string{a, pads}, "y", aString("mode", "edge"))
	g.output("y")
	x := []float64{0.5, -1, 2, 0.25}
	for _, dt := range []DType{Float32, Float64} {
		nw, err := Compile(g.m, Options{DType: dt, Machines: 1})
		require.NoError(t, err)
		p, err := nw.program([][]int{{1, 4}}, request{})
		require.NoError(t, err)
		var left []string
		for _, n := range p.static.Nodes {
			left = append(left, n.OpType)
		}
		assert.Equal(t, []string{"Add", "Pad"}, left, dt.String())
		out, err := nw.Forward(context.Background(), []*onnxlite.Tensor{tensor64("x", []int64{1, 4}, x)})
		require.NoError(t, err)
		got, err := out[0].Float64s()
		require.NoError(t, err)
		// closed form: y = edge-pad(x + exp(max(c, 0))) by 1 before and 2 after.
		var inner []float64
		for k, cv := range []float64{-1, 2, -3, 4} {
			inner = append(inner, x[k]+math.Exp(math.Max(cv, 0)))
		}
		want := append(append([]float64{inner[0]}, inner...), inner[3], inner[3])
		assert.InDeltaSlice(t, want, got, 1e-5*60, dt.String())
	}
}
