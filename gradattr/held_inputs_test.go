package gradattr_test

import (
	"context"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/heldshape"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
)

// TestIntegratedGradientsHeldInputs: a network whose target shape is a
// compile-time input, held by Head.With, has integrated gradients by
// quadrature with ExactAuto (the exact path integral is not offered for a
// model of several inputs), and they meet completeness against the closed
// form y = softmax(relu(x·W + b)); SmoothGrad's gradient sums fall back
// to point-by-point gradients there and agree with averaging Gradient.
func TestIntegratedGradientsHeldInputs(t *testing.T) {
	m := heldshape.Model(onnxlite.Double)
	f := heldshape.F
	nw, err := nn.Compile(m, nn.Options{DType: nn.Float64})
	require.NoError(t, err)
	head, err := nw.Head(nn.Selection{})
	require.NoError(t, err)
	head, err = head.With([]*onnxlite.Tensor{nil, {Name: "shape", DType: onnxlite.Int64, Dims: []int64{2}, Data: []int64{-1, 4}}})
	require.NoError(t, err)
	require.Error(t, head.PiecewiseLinear())

	ctx := context.Background()
	x := []float64{1, 2, -0.5}
	const target = 2
	res, err := gradattr.IntegratedGradients(ctx, head, x, target, gradattr.IGOptions{Exact: gradattr.ExactAuto})
	require.NoError(t, err)
	assert.False(t, res.Settings.Exact)
	assert.Contains(t, res.Settings.ExactSkipped, "not available for a model of several inputs")
	require.NotNil(t, res.Completeness)
	assert.True(t, res.Completeness.OK, "relative gap %v", res.Completeness.RelativeGap)
	// Completeness (Sundararajan et al. 2017, Proposition 1) against the
	// closed form: Σ a_i = F(x) − F(0) within the default tolerance.
	want := f(x)[target] - f([]float64{0, 0, 0})[target]
	s := 0.0
	for _, a := range res.Attributions {
		s += a
	}
	assert.InDelta(t, want, s, gradattr.DefaultTolerance*math.Abs(want))

	// The gradient sum of two points equals the weighted sum of the
	// points' gradients, which central finite differences of the closed
	// form confirm.
	pts := []float64{1, 2, -0.5, 0.3, -0.2, 0.9}
	_, sum, err := head.GradientSum(ctx, pts, 2, []float64{0.25, 0.75}, target)
	require.NoError(t, err)
	const eps = 1e-6
	for i := range 3 {
		fd := 0.0
		for p, wt := range []float64{0.25, 0.75} {
			up, down := append([]float64(nil), pts[p*3:p*3+3]...), append([]float64(nil), pts[p*3:p*3+3]...)
			up[i] += eps
			down[i] -= eps
			fd += wt * (f(up)[target] - f(down)[target]) / (2 * eps)
		}
		assert.InDelta(t, fd, sum[i], 1e-7, "feature %d", i)
	}
}
