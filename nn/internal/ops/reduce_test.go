package ops

import (
	"fmt"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

func elemReduceCases() []elemCase {
	var out []elemCase
	for _, mean := range []bool{false, true} {
		for _, keep := range []bool{false, true} {
			for _, axes := range [][]int{nil, {1}, {0, 2}, {2}, {0, 1, 2}} {
				out = append(out, elemCase{
					name:   fmt.Sprintf("mean=%v/keep=%v/axes=%v", mean, keep, axes),
					shapes: [][]int{{2, 3, 4}}, draw: elemUniform(-3, 3),
					build: func(xs []*G.Node) (*G.Node, error) { return Reduce(xs[0], axes, keep, mean) },
				})
			}
		}
	}
	return out
}

func TestReduceGradientMatchesFiniteDifferences(t *testing.T) {
	for _, c := range elemReduceCases() {
		t.Run(c.name, func(t *testing.T) { elemCheckGrad(t, c) })
	}
}

func TestReduceFloat32MatchesFloat64(t *testing.T) {
	for _, c := range elemReduceCases() {
		t.Run(c.name, func(t *testing.T) { elemCheckPrecision(t, c) })
	}
}

// TestReduceShapes checks the output shapes of ONNX ReduceSum-13 and
// ReduceMean-13 (keepdims keeps reduced axes as 1, otherwise drops them).
func TestReduceShapes(t *testing.T) {
	g := G.NewGraph()
	x, _ := elemInput(g, tensor.Float64, []int{3, 2, 2}, make([]float64, 12), "x")
	for _, c := range []struct {
		axes []int
		keep bool
		want []int
	}{
		{[]int{1}, true, []int{3, 1, 2}},
		{[]int{1}, false, []int{3, 2}},
		{nil, true, []int{1, 1, 1}},
		{nil, false, []int{}},
		{[]int{0, 2}, false, []int{2}},
	} {
		y, err := Reduce(x, c.axes, c.keep, false)
		require.NoError(t, err)
		assert.Equal(t, c.want, []int(y.Shape()), "axes %v keepdims %v", c.axes, c.keep)
	}
}

func TestReduceRejectsBadInput(t *testing.T) {
	g := G.NewGraph()
	x, _ := elemInput(g, tensor.Float64, []int{2, 3}, make([]float64, 6), "x")
	_, err := Reduce(x, []int{2}, true, false)
	assert.ErrorContains(t, err, "axis 2 out of range for input of shape [2 3]")
	_, err = Reduce(x, []int{-1}, true, true)
	assert.ErrorContains(t, err, "axis -1 out of range")
	_, err = Reduce(x, []int{1, 1}, true, true)
	assert.ErrorContains(t, err, "repeated")
	_, err = Reduce(nil, nil, true, true)
	assert.Error(t, err)
}
