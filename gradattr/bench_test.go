package gradattr

import (
	"context"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// logSumExp is f(x) = log Σ_i exp(a_i x_i) over 30 inputs, ∂f/∂x_i =
// a_i softmax(a ⊙ x)_i; F and Grad allocate nothing.
func logSumExp() *Func {
	const n = 30
	a := make([]float64, n)
	for i := range a {
		a[i] = 0.5 + float64(i%7)/4
	}
	return &Func{Shape: []int{n}, Outputs: 1,
		F: func(out, x []float64) {
			m := math.Inf(-1)
			for i := range x {
				m = math.Max(m, a[i]*x[i])
			}
			s := 0.0
			for i := range x {
				s += math.Exp(a[i]*x[i] - m)
			}
			out[0] = m + math.Log(s)
		},
		Grad: func(g, x []float64, _ int) {
			m := math.Inf(-1)
			for i := range x {
				m = math.Max(m, a[i]*x[i])
			}
			s := 0.0
			for i := range x {
				g[i] = math.Exp(a[i]*x[i] - m)
				s += g[i]
			}
			for i := range g {
				g[i] *= a[i] / s
			}
		}}
}

func benchInput() []float64 {
	x := make([]float64, 30)
	for i := range x {
		x[i] = math.Sin(float64(i))
	}
	return x
}

func BenchmarkIG64(b *testing.B) {
	f, x := logSumExp(), benchInput()
	ctx := context.Background()
	b.ReportAllocs()
	for b.Loop() {
		if _, err := IntegratedGradients(ctx, f, x, 0, IGOptions{Points: 64, Rule: RuleGaussLegendre}); err != nil {
			b.Fatal(err)
		}
	}
}

func BenchmarkSmoothGrad50(b *testing.B) {
	f, x := logSumExp(), benchInput()
	ctx := context.Background()
	b.ReportAllocs()
	for b.Loop() {
		if _, err := SmoothGrad(ctx, f, x, 0, SmoothGradOptions{Samples: 50}); err != nil {
			b.Fatal(err)
		}
	}
}

func TestNoPerPointAllocations(t *testing.T) {
	// The point buffer is reused across chunks: ten times the points in
	// the same batch size costs only the per-chunk allocations of the model
	// (Func allocates its out and grad slices per call) and the node list.
	f, x := logSumExp(), benchInput()
	ctx := context.Background()
	count := func(points int, run func(n int) error) float64 {
		return testing.AllocsPerRun(5, func() { require.NoError(t, run(points)) })
	}
	ig := func(n int) error {
		_, err := IntegratedGradients(ctx, f, x, 0, IGOptions{Points: n, Rule: RuleMidpoint})
		return err
	}
	sg := func(n int) error {
		_, err := SmoothGrad(ctx, f, x, 0, SmoothGradOptions{Samples: n})
		return err
	}
	for name, run := range map[string]func(int) error{"ig": ig, "smoothgrad": sg} {
		small, large := count(64, run), count(640, run)
		chunks := 640/DefaultBatchSize - 1
		assert.LessOrEqual(t, large-small, float64(3*chunks+2), "%s: %v allocs for 64 points, %v for 640", name, small, large)
	}
}
