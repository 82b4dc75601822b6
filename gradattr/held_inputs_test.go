package gradattr_test

import (
	"context"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/gradattr"
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
	w := []float64{0.5, -1, 2, 0.25, 1.5, 0.75, -0.5, 1, -2, 0.125, 1, -0.25}
	bias := []float64{0.1, -0.2, 0.3, -0.4}
	in := func(name string, dt onnxlite.DataType, dims ...onnxlite.Dim) *onnxlite.ValueInfo {
		return &onnxlite.ValueInfo{Name: name, Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: dt, HasShape: true, Shape: dims}}
	}
	fixed := func(d int64) onnxlite.Dim { return onnxlite.Dim{Value: d, HasValue: true} }
	m := &onnxlite.Model{IRVersion: 8, Opsets: []onnxlite.OpsetImport{{Version: 13}}, ProducerName: "apportion-test",
		Graph: &onnxlite.Graph{
			Name:    "held_shape",
			Inputs:  []*onnxlite.ValueInfo{in("x", onnxlite.Double, onnxlite.Dim{Param: "N"}, fixed(3)), in("shape", onnxlite.Int64, fixed(2))},
			Outputs: []*onnxlite.ValueInfo{{Name: "y", Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: onnxlite.Double}}},
			Initializers: []*onnxlite.Tensor{
				{Name: "W", DType: onnxlite.Double, Dims: []int64{3, 4}, Data: w},
				{Name: "b", DType: onnxlite.Double, Dims: []int64{4}, Data: bias},
			},
			Nodes: []*onnxlite.Node{
				{Name: "dense", OpType: "Gemm", Inputs: []string{"x", "W", "b"}, Outputs: []string{"h"}},
				{Name: "act", OpType: "Relu", Inputs: []string{"h"}, Outputs: []string{"r"}},
				{Name: "reshape", OpType: "Reshape", Inputs: []string{"r", "shape"}, Outputs: []string{"l"}},
				{Name: "prob", OpType: "Softmax", Inputs: []string{"l"}, Outputs: []string{"y"}},
			},
		}}
	f := func(x []float64) []float64 {
		z := make([]float64, 4)
		total := 0.0
		for j := range z {
			h := bias[j]
			for i := range 3 {
				h += x[i] * w[i*4+j]
			}
			z[j] = math.Exp(max(h, 0))
			total += z[j]
		}
		for j := range z {
			z[j] /= total
		}
		return z
	}
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
