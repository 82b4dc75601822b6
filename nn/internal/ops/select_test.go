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

// elemSelectCases covers the ops that move, repeat, resample and normalise
// elements, each differentiated with respect to its data.
func elemSelectCases() []elemCase {
	wide := elemUniform(-2, 2)
	ints := func(lo, hi int) func(r *rand.Rand, k int) float64 {
		return func(r *rand.Rand, k int) float64 {
			if k == 1 {
				return float64(lo + r.IntN(hi-lo))
			}
			return -2 + 4*r.Float64()
		}
	}
	resample := func(name string, in, out []int, spec ResampleSpec) elemCase {
		for a := range in {
			ax := ResampleAxis{In: in[a], Out: out[a], Scale: float64(out[a]) / float64(in[a]),
				Width: float64(out[a]), RoiEnd: 1}
			spec.Axes = append(spec.Axes, ax)
		}
		return elemCase{name: name, shapes: [][]int{in}, draw: wide,
			build: func(xs []*G.Node) (*G.Node, error) { return Resample(xs[0], spec) }}
	}
	cases := []elemCase{
		{name: "Slice negative step", shapes: [][]int{{4, 6}}, draw: wide,
			build: func(xs []*G.Node) (*G.Node, error) { return Slice(xs[0], []int{1, 5}, []int{1, -2}, []int{2, 3}) }},
		{name: "Expand", shapes: [][]int{{3, 1}}, draw: wide,
			build: func(xs []*G.Node) (*G.Node, error) { return Broadcast(xs[0], []int{2, 3, 4}) }},
		{name: "Gather constant indices", shapes: [][]int{{5, 3}}, draw: wide,
			build: func(xs []*G.Node) (*G.Node, error) { return Take(xs[0], 0, []int{2, 0, 2, 4}) }},
		{name: "Gather run-time indices axis 0", shapes: [][]int{{5, 3}, {2, 2}}, draw: ints(-5, 5), fixed: []int{1},
			build: func(xs []*G.Node) (*G.Node, error) { return Gather(xs[0], xs[1], 0) }},
		{name: "Gather run-time indices axis 1", shapes: [][]int{{2, 4, 3}, {5}}, draw: ints(0, 4), fixed: []int{1},
			build: func(xs []*G.Node) (*G.Node, error) { return Gather(xs[0], xs[1], 1) }},
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
		resample("Resize nearest asymmetric floor", []int{1, 2, 3}, []int{1, 4, 6},
			ResampleSpec{Mode: "nearest", Coord: "asymmetric", Nearest: "floor"}),
		resample("Resize linear half_pixel", []int{2, 3, 4}, []int{2, 5, 6},
			ResampleSpec{Mode: "linear", Coord: "half_pixel"}),
		resample("Resize cubic align_corners", []int{1, 4, 5}, []int{1, 7, 3},
			ResampleSpec{Mode: "cubic", Coord: "align_corners", CubicA: -0.75}),
		resample("Resize cubic exclude_outside", []int{1, 4, 5}, []int{1, 6, 8},
			ResampleSpec{Mode: "cubic", Coord: "half_pixel", CubicA: -0.5, ExcludeOutside: true}),
		resample("Resize linear antialias", []int{1, 8, 8}, []int{1, 4, 3},
			ResampleSpec{Mode: "linear", Coord: "half_pixel", Antialias: true}),
		resample("Resize tf_crop_and_resize", []int{1, 4, 5}, []int{1, 3, 4},
			ResampleSpec{Mode: "linear", Coord: "tf_crop_and_resize", Extrapolation: 10}),
		{name: "Pad wrap and crop", shapes: [][]int{{2, 3, 4}}, draw: wide,
			build: func(xs []*G.Node) (*G.Node, error) { return Pad(xs[0], []int{0, 2, -1, 0, -1, 3}, "wrap", 0) }},
		{name: "Pad reflect after crop", shapes: [][]int{{2, 5}}, draw: wide,
			build: func(xs []*G.Node) (*G.Node, error) { return Pad(xs[0], []int{0, -1, 0, 2}, "reflect", 0) }},
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
	ind, _ := elemInput(g, tensor.Float64, []int{2}, []float64{-1, 0}, "i")
	gat, err := Gather(x, ind, 1)
	require.NoError(t, err)
	sl, err := Slice(x, []int{1, 2}, []int{-1, -1}, []int{2, 3})
	require.NoError(t, err)
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
	// ONNX Gather: index −1 counts from the end.
	assert.Equal(t, []float64{3, 1, 6, 4}, elemValues(t, gat.Value()))
	// Slice with steps −1 from the last row and column: x reversed.
	assert.Equal(t, []float64{6, 5, 4, 3, 2, 1}, elemValues(t, sl.Value()))
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

// TestGatherRefusesBadIndices: an index that is not a whole number in
// [−d, d) fails the run, naming it.
func TestGatherRefusesBadIndices(t *testing.T) {
	for _, bad := range []float64{5, -6, 1.5} {
		g := G.NewGraph()
		x, _ := elemInput(g, tensor.Float64, []int{5}, []float64{1, 2, 3, 4, 5}, "x")
		ind, _ := elemInput(g, tensor.Float64, []int{1}, []float64{bad}, "i")
		y, err := Gather(x, ind, 0)
		require.NoError(t, err)
		vm := G.NewTapeMachine(g)
		err = vm.RunAll()
		vm.Close()
		require.Error(t, err)
		assert.Contains(t, err.Error(), "expected a whole number from -5 to 4")
		_ = y
	}
}
