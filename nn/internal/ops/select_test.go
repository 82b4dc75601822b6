package ops

import (
	"math"
	"math/rand/v2"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// elemSelectCases covers the ops that select, move, repeat, resample and
// normalise elements, each differentiated with respect to its data.
func elemSelectCases() []elemCase {
	wide := elemUniform(-2, 2)
	cases := []elemCase{
		{name: "Where broadcast", shapes: [][]int{{2, 3, 4}, {3, 1}, {4}}, fixed: []int{0},
			draw: func(r *rand.Rand, k int) float64 {
				if k == 0 {
					return float64(r.IntN(2))
				}
				return -2 + 4*r.Float64()
			},
			build: func(xs []*G.Node) (*G.Node, error) { return Where(xs[0], xs[1], xs[2]) }},
		{name: "Normalize rows of 4", shapes: [][]int{{3, 2, 4}}, draw: wide,
			build: func(xs []*G.Node) (*G.Node, error) { return Normalize(xs[0], 4, 1e-5) }},
		{name: "Normalize rows of 12", shapes: [][]int{{2, 3, 4}}, draw: wide,
			build: func(xs []*G.Node) (*G.Node, error) { return Normalize(xs[0], 12, 1e-3) }},
	}
	for _, kind := range []string{"ReduceMax", "ReduceMin", "ReduceL2", "ReduceLogSumExp"} {
		cases = append(cases,
			elemCase{name: kind + " axis 1", shapes: [][]int{{2, 3, 4}}, draw: wide,
				build: func(xs []*G.Node) (*G.Node, error) { return ReduceBy(xs[0], []int{1}, true, kind) }},
			elemCase{name: kind + " axes 0 2", shapes: [][]int{{2, 3, 4}}, draw: wide,
				build: func(xs []*G.Node) (*G.Node, error) { return ReduceBy(xs[0], []int{0, 2}, false, kind) }})
	}
	return cases
}

func TestSelectGradientMatchesFiniteDifferences(t *testing.T) {
	for _, c := range elemSelectCases() {
		t.Run(c.name, func(t *testing.T) { elemCheckGrad(t, c) })
	}
}

func TestSelectFloat32MatchesFloat64(t *testing.T) {
	for _, c := range elemSelectCases() {
		t.Run(c.name, func(t *testing.T) { elemCheckPrecision(t, c) })
	}
}

// TestSelectClosedForms checks values that follow from the definitions.
func TestSelectClosedForms(t *testing.T) {
	g := G.NewGraph()
	x, _ := elemInput(g, tensor.Float64, []int{2, 3}, []float64{1, 2, 3, 4, 5, 6}, "x")
	lse, err := ReduceBy(x, []int{1}, false, "ReduceLogSumExp")
	require.NoError(t, err)
	l2, err := ReduceBy(x, nil, false, "ReduceL2")
	require.NoError(t, err)
	nrm, err := Normalize(x, 3, 0)
	require.NoError(t, err)
	big, _ := elemInput(g, tensor.Float32, []int{2}, []float64{88, 100}, "big")
	lse32, err := ReduceBy(big, nil, false, "ReduceLogSumExp")
	require.NoError(t, err)
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	require.NoError(t, vm.RunAll())
	// log(e¹ + e² + e³) = 3 + log(1 + e⁻¹ + e⁻²).
	assert.InDelta(t, 3+math.Log(1+math.Exp(-1)+math.Exp(-2)), elemValues(t, lse.Value())[0], 1e-15)
	// √(1 + 4 + … + 36) = √91.
	assert.InDelta(t, math.Sqrt(91), elemValues(t, l2.Value())[0], 1e-14)
	// (x − 2)/√(2/3) for the row 1, 2, 3: ∓√(3/2) and 0.
	assert.InDeltaSlice(t, []float64{-math.Sqrt(1.5), 0, math.Sqrt(1.5)}, elemValues(t, nrm.Value())[:3], 1e-15)
	// e¹⁰⁰ overflows binary32 (max ≈ 3.4e38); relative to the maximum the
	// sum does not: 100 + log(1 + e⁻¹²).
	assert.InDelta(t, 100+math.Log1p(math.Exp(-12)), elemValues(t, lse32.Value())[0], 1e-4)
}
