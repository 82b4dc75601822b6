package ops

import (
	"fmt"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

func elemSoftmaxCases() []elemCase {
	var out []elemCase
	for _, log := range []bool{false, true} {
		for _, axis := range []int{0, 1, 2, -1} {
			out = append(out, elemCase{
				name: fmt.Sprintf("log=%v/axis=%d", log, axis), shapes: [][]int{{2, 3, 4}}, draw: elemUniform(-3, 3),
				build: func(xs []*G.Node) (*G.Node, error) { return Softmax(xs[0], axis, log) },
			})
		}
	}
	return out
}

func TestSoftmaxGradientMatchesFiniteDifferences(t *testing.T) {
	for _, c := range elemSoftmaxCases() {
		t.Run(c.name, func(t *testing.T) { elemCheckGrad(t, c) })
	}
}

func TestSoftmaxFloat32MatchesFloat64(t *testing.T) {
	for _, c := range elemSoftmaxCases() {
		t.Run(c.name, func(t *testing.T) { elemCheckPrecision(t, c) })
	}
}

// TestSoftmaxLargeInputs checks the max-subtraction: exp(1000) overflows
// IEEE 754 binary64, yet Softmax(x + c) = Softmax(x) (shift invariance,
// Bridle 1990) keeps the result finite.
func TestSoftmaxLargeInputs(t *testing.T) {
	g := G.NewGraph()
	x, _ := elemInput(g, tensor.Float64, []int{1, 3}, []float64{1000, 1001, 1002}, "x")
	x0, _ := elemInput(g, tensor.Float64, []int{1, 3}, []float64{0, 1, 2}, "x0")
	y, err := Softmax(x, 1, false)
	require.NoError(t, err)
	y0, err := Softmax(x0, 1, false)
	require.NoError(t, err)
	ly, err := Softmax(x, -1, true)
	require.NoError(t, err)
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	require.NoError(t, vm.RunAll())
	got := elemValues(t, y.Value())
	assert.InDeltaSlice(t, elemValues(t, y0.Value()), got, 1e-15)
	// closed form: Softmax(0,1,2)_0 = 1/(1+e+e²)
	assert.InDelta(t, 1/(1+math.E+math.E*math.E), got[0], 1e-15)
	// closed form: log-softmax_2 = -log(1+e⁻¹+e⁻²)
	assert.InDelta(t, -math.Log(1+math.Exp(-1)+math.Exp(-2)), elemValues(t, ly.Value())[2], 1e-13)
}

func TestSoftmaxRejectsBadInput(t *testing.T) {
	g := G.NewGraph()
	x, _ := elemInput(g, tensor.Float64, []int{2, 3}, make([]float64, 6), "x")
	_, err := Softmax(x, 2, false)
	assert.ErrorContains(t, err, "axis 2 out of range for input of shape [2 3]")
	_, err = Softmax(x, -3, true)
	assert.ErrorContains(t, err, "axis -3 out of range")
	_, err = Softmax(nil, 0, false)
	assert.Error(t, err)
}
