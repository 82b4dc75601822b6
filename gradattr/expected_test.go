package gradattr

import (
	"context"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestExpectedGradientsReplay(t *testing.T) {
	// With a caller-supplied list of (reference, α) draws the result is the
	// hand-computed Monte Carlo mean of Erion et al. 2021 (definition of expected gradients):
	// (1/k) Σ_d (x − x′_d) ⊙ ∇F(x′_d + α_d(x − x′_d)), ∇ from the analytic
	// gradient of the tanh network (checked against finite differences in
	// TestClosedFormGradients).
	net := newTanhNet(3, 4, 2, 6)
	m := net.model()
	x := []float64{0.8, -0.3, 1.1}
	ref := [][]float64{{0, 0, 0}, {1, -1, 0.5}, {-0.5, 0.2, 0.9}}
	draws := []Draw{{1, 0.25}, {0, 0.9}, {1, 0.5}, {2, 0.1}, {2, 1}}
	want := make([]float64, 3)
	g := make([]float64, 3)
	p := make([]float64, 3)
	for _, d := range draws {
		xb := ref[d.Reference]
		for i := range p {
			p[i] = xb[i] + d.Alpha*(x[i]-xb[i])
		}
		m.Grad(g, p, 1)
		for i := range want {
			want[i] += (x[i] - xb[i]) * g[i] / float64(len(draws))
		}
	}
	meanRef := 0.0
	for _, r := range ref {
		meanRef += eval(m, r, 1) / 3
	}
	for _, bs := range []int{1, 2, 64} {
		r, err := ExpectedGradients(context.Background(), m, x, 1, ExpectedGradientsOptions{Reference: ref, Draws: draws, BatchSize: bs})
		require.NoError(t, err)
		assert.InDeltaSlice(t, want, r.Attributions, 1e-15, "batch %d", bs)
		assert.InDelta(t, meanRef, r.BaselineOutput, 1e-15) // mean of f over the reference set
		assert.Equal(t, 5, r.Cost.GradientEvals)
		assert.Equal(t, 4, r.Cost.ForwardPasses) // f(x) and the 3 references
		assert.True(t, r.Settings.CallerNoise)
		require.NotNil(t, r.Completeness)
		assert.True(t, r.Completeness.Judged)
		assert.InDelta(t, eval(m, x, 1)-meanRef, r.Completeness.Expected, 1e-15)
	}
}

func TestExpectedGradientsLinear(t *testing.T) {
	// For f = w·x + b each draw gives w ⊙ (x − x′_d), whose expectation
	// over uniform draws from the reference set is w ⊙ (x − x̄) (Erion et
	// al. 2021; linearity), with standard error
	// |w_i| · sd_ref(x_i) / √k for k draws (common practice). The sum is
	// then f(x) − mean f(reference) in expectation.
	w := []float64{1.5, -0.5, 2}
	f := linear(w, 0.3)
	x := []float64{1, 2, -1}
	ref := make([][]float64, 25)
	for k := range ref {
		ref[k] = []float64{math.Sin(float64(k)), math.Cos(float64(3 * k)), float64(k%5) - 2}
	}
	mean, sd := make([]float64, 3), make([]float64, 3)
	for _, r := range ref {
		for i, v := range r {
			mean[i] += v / 25
		}
	}
	for _, r := range ref {
		for i, v := range r {
			sd[i] += (v - mean[i]) * (v - mean[i]) / 25
		}
	}
	const k = 4000
	r, err := ExpectedGradients(context.Background(), f, x, 0, ExpectedGradientsOptions{Reference: ref, Samples: k, Seed: 5})
	require.NoError(t, err)
	for i := range w {
		se := math.Abs(w[i]) * math.Sqrt(sd[i]/k)
		assert.InDelta(t, w[i]*(x[i]-mean[i]), r.Attributions[i], 5*se, "feature %d", i)
	}
	assert.True(t, r.Completeness.OK, "relative gap %g", r.Completeness.RelativeGap)
	assert.Equal(t, k, r.Settings.Samples)
	assert.Equal(t, 25, r.Settings.References)

	r, err = ExpectedGradients(context.Background(), f, x, 0, ExpectedGradientsOptions{Reference: ref})
	require.NoError(t, err)
	assert.Equal(t, DefaultDraws, r.Cost.GradientEvals)
}

func TestExpectedGradientsErrors(t *testing.T) {
	f := linear([]float64{1, 2}, 0)
	x := []float64{1, 1}
	ctx := context.Background()
	_, err := ExpectedGradients(ctx, f, x, 0, ExpectedGradientsOptions{})
	assert.ErrorIs(t, err, ErrInput)
	assert.ErrorContains(t, err, "reference set")
	_, err = ExpectedGradients(ctx, f, x, 0, ExpectedGradientsOptions{Reference: [][]float64{{1, 2, 3}}})
	assert.ErrorIs(t, err, ErrInput)
	assert.ErrorContains(t, err, "expects 2")
	_, err = ExpectedGradients(ctx, f, x, 0, ExpectedGradientsOptions{Reference: [][]float64{{1, 2}}, Draws: []Draw{{Reference: 1}}})
	assert.ErrorIs(t, err, ErrInput)
	_, err = ExpectedGradients(ctx, f, x, 0, ExpectedGradientsOptions{Reference: [][]float64{{1, 2}}, Draws: []Draw{{Alpha: 1.5}}})
	assert.ErrorIs(t, err, ErrInput)
	_, err = ExpectedGradients(ctx, f, x, 0, ExpectedGradientsOptions{Reference: [][]float64{{1, 2}}, Samples: -1})
	assert.ErrorIs(t, err, ErrOptions)
	_, err = ExpectedGradients(ctx, f, x, 0, ExpectedGradientsOptions{Reference: [][]float64{{1, 2}}, Samples: MaxSamplesLimit + 1})
	assert.ErrorIs(t, err, ErrOptions)
	_, err = ExpectedGradients(ctx, f, x, 0, ExpectedGradientsOptions{Reference: [][]float64{{1, 2}}, Tolerance: -1})
	assert.ErrorIs(t, err, ErrOptions)
}
