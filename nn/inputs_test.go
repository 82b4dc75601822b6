package nn

import (
	"context"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/onnxlite"
)

// TestIntegerInputsExact: an integer input the model computes with is held
// as a floating-point number, which holds every integer of magnitude up to
// 2^24 in binary32 and 2^53 in binary64 (IEEE 754 significands of 24 and 53
// bits); beyond that the engine refuses the value instead of rounding it.
func TestIntegerInputsExact(t *testing.T) {
	g := newIR(13, 41)
	g.input("n", -1, 2)
	g.m.Graph.Inputs[0].Type.Elem = onnxlite.Int64
	g.node("Cast", []string{"n"}, "y", aInt("to", int64(onnxlite.Double)))
	g.output("y")
	big := int64(1)<<24 + 1
	feed := []*onnxlite.Tensor{{Name: "n", DType: onnxlite.Int64, Dims: []int64{1, 2}, Data: []int64{-3, big}}}

	nw, err := Compile(g.m, Options{})
	require.NoError(t, err)
	assert.True(t, nw.Inputs()[0].DType == onnxlite.Int64 && !nw.Inputs()[0].CompileTime)
	_, err = nw.Forward(context.Background(), feed)
	require.ErrorIs(t, err, ErrBadRequest)
	assert.Contains(t, err.Error(), "the float32 engine holds integers exactly only up to 16777216 in magnitude")

	nw, err = Compile(g.m, Options{DType: Float64})
	require.NoError(t, err)
	out, err := nw.Forward(context.Background(), feed)
	require.NoError(t, err)
	got, err := out[0].Float64s()
	require.NoError(t, err)
	assert.Equal(t, []float64{-3, float64(big)}, got)

	// A float tensor for an integer input is a bad request, and the other
	// way round.
	_, err = nw.Forward(context.Background(), []*onnxlite.Tensor{tensor64("n", []int64{1, 2}, []float64{1, 2})})
	assert.ErrorIs(t, err, ErrBadRequest)
}

// TestCompileTimeInputsCachedByValue: an input that reaches only a
// Reshape's target shape is read when compiling; each value gets a program
// of its own and the same value the same program.
func TestCompileTimeInputsCachedByValue(t *testing.T) {
	g := newIR(13, 42)
	g.input("x", 2, 6)
	g.input("s", 2)
	g.m.Graph.Inputs[1].Type.Elem = onnxlite.Int64
	g.node("Reshape", []string{"x", "s"}, "y")
	g.output("y")
	nw, err := Compile(g.m, Options{DType: Float64})
	require.NoError(t, err)
	require.True(t, nw.Inputs()[1].CompileTime)
	x := tensor64("x", []int64{2, 6}, []float64{1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12})
	shape := func(a, b int64) *onnxlite.Tensor {
		return &onnxlite.Tensor{Name: "s", DType: onnxlite.Int64, Dims: []int64{2}, Data: []int64{a, b}}
	}
	for _, c := range []struct {
		a, b int64
		want []int
	}{{3, 4, []int{3, 4}}, {-1, 2, []int{6, 2}}, {3, 4, []int{3, 4}}} {
		out, err := nw.Forward(context.Background(), []*onnxlite.Tensor{x, shape(c.a, c.b)})
		require.NoError(t, err)
		// ONNX Reshape: −1 takes the remaining elements.
		assert.Equal(t, c.want, out[0].Shape())
	}
	nw.mu.Lock()
	programs := len(nw.progs)
	nw.mu.Unlock()
	assert.Equal(t, 2, programs, "one program per value")
}
