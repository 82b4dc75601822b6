package gradattr_test

import (
	"context"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/modelcount"
)

// countingFunc is f(x) = sin(3x₀)·x₁ with its gradient, counting the
// samples sent through it.
func countingFunc() *modelcount.Model {
	return &modelcount.Model{Model: &gradattr.Func{
		Shape: []int{2}, Outputs: 1,
		F: func(out, x []float64) { out[0] = math.Sin(3*x[0]) * x[1] },
		Grad: func(grad, x []float64, _ int) {
			grad[0], grad[1] = 3*math.Cos(3*x[0])*x[1], math.Sin(3*x[0])
		},
	}}
}

func TestEstimateBoundsTheModelCalls(t *testing.T) {
	// Estimate is checked against the samples a counting model sees. With a
	// tolerance no quadrature of this non-linear f meets (the gap of
	// integrated gradients of sin(3x₀)·x₁ never reaches 1e-300), automatic
	// refinement runs to its end, and the estimate is exact.
	x := []float64{0.7, 1.3}
	ref := [][]float64{{0, 0}, {0.2, 0.1}, {-0.3, 0.5}}
	cases := []gradattr.Options{
		{Method: gradattr.MethodGradient},
		{Method: gradattr.MethodGradientTimesInput},
		{Method: gradattr.MethodSmoothGrad, Samples: 37},
		{Method: gradattr.MethodExpectedGradients, Reference: ref, Samples: 19},
		{Method: gradattr.MethodIntegratedGradients, Points: 33},
		{Method: gradattr.MethodIntegratedGradients, Points: 33, Baselines: []gradattr.Baseline{{}, {Kind: gradattr.BaselineMean, Reference: ref}}},
	}
	for _, r := range []gradattr.Rule{gradattr.RuleTrapezoid, gradattr.RuleLeft, gradattr.RuleRight, gradattr.RuleMidpoint, gradattr.RuleGaussLegendre} {
		cases = append(cases, gradattr.Options{Method: gradattr.MethodIntegratedGradients, Rule: r, Tolerance: 1e-300, Exact: gradattr.ExactNever})
	}
	for _, o := range cases {
		f := countingFunc()
		res, err := gradattr.Attribute(context.Background(), f, x, 0, o)
		require.NoError(t, err, "%+v", o)
		assert.Equal(t, f.Samples(), res.Cost.GradientEvals+res.Cost.ForwardPasses, "%v %v", o.Method, o.Rule)
		est, err := o.Estimate([]int{2})
		require.NoError(t, err)
		assert.Equal(t, f.Samples(), est.GradientEvals+est.ForwardPasses, "%v %v points %d", o.Method, o.Rule, o.Points)
	}
}

func TestEstimateCountsTheExactAttempt(t *testing.T) {
	// Automatic integrated gradients may first integrate exactly, up to
	// DefaultMaxPieces pieces per baseline, then by quadrature: the
	// estimate, a bound, counts both; -steps exact counts MaxPiecesLimit
	// pieces per baseline (each piece one forward pass with its
	// directional derivative and one backward pass, as a gradient).
	quad := gradattr.Options{Method: gradattr.MethodIntegratedGradients, Exact: gradattr.ExactNever}
	auto := quad
	auto.Exact = gradattr.ExactAuto
	exact := quad
	exact.Exact = gradattr.ExactAlways
	estQuad, err := quad.Estimate([]int{2})
	require.NoError(t, err)
	estAuto, err := auto.Estimate([]int{2})
	require.NoError(t, err)
	estExact, err := exact.Estimate([]int{2})
	require.NoError(t, err)
	assert.Equal(t, estQuad.GradientEvals+gradattr.DefaultMaxPieces, estAuto.GradientEvals)
	assert.Equal(t, gradattr.MaxPiecesLimit, estExact.GradientEvals)
	assert.Equal(t, estQuad.ForwardPasses, estExact.ForwardPasses)
}
