package gradattr

import (
	"context"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// normalMoment returns E[Y^k] for Y ~ N(μ, σ²):
// Σ_{j even} C(k,j) μ^{k−j} σ^j (j−1)!! (moments of the normal
// distribution, E ε^j = σ^j (j−1)!! for even j, 0 for odd j).
func normalMoment(k int, mu, sigma float64) float64 {
	s := 0.0
	binom := 1.0 // C(k, j)
	for j := 0; j <= k; j++ {
		if j > 0 {
			binom = binom * float64(k-j+1) / float64(j)
		}
		if j%2 == 1 {
			continue
		}
		df := 1.0
		for i := j - 1; i > 1; i -= 2 {
			df *= float64(i)
		}
		s += binom * math.Pow(mu, float64(k-j)) * math.Pow(sigma, float64(j)) * df
	}
	return s
}

func TestSmoothGradCubicMoments(t *testing.T) {
	// f = Σ x_i³, so each copy's gradient is g_i = 3(x_i + ε_i)² = 3Y²,
	// Y ~ N(x_i, σ²), with raw moments E g^k = 3^k E Y^{2k}
	// (normalMoment). Closed forms:
	//   SmoothGrad:          E g  = 3(x² + σ²)                   (Smilkov et al. 2017)
	//   SmoothGrad-Squared:  E g² = 9(x⁴ + 6x²σ² + 3σ⁴)          (Hooker et al. 2019; E ε⁴ = 3σ⁴)
	//   VarGrad:             Var g = 9(4x²σ² + 2σ⁴)               (Adebayo et al. 2018)
	// Each estimate must lie within 5 standard errors: √(Var g/n),
	// √(Var g²/n) and, for the variance, √((μ₄ − Var²)/n) with μ₄ the fourth
	// central moment of g (standard large-sample variance of a sample
	// variance, common practice).
	x := []float64{0.5, -1.25, 2}
	sigma := []float64{0.3, 0.6, 0.2}
	const n = 20000
	raw := func(i, k int) float64 { return math.Pow(3, float64(k)) * normalMoment(2*k, x[i], sigma[i]) }
	for _, v := range []Variant{VariantMean, VariantSquared, VariantVariance} {
		r, err := SmoothGrad(context.Background(), cubic(3), x, 0, SmoothGradOptions{Samples: n, Sigma: sigma, Variant: v, Seed: 11})
		require.NoError(t, err)
		assert.Nil(t, r.Completeness)
		for i := range x {
			m1, m2, m3, m4 := raw(i, 1), raw(i, 2), raw(i, 3), raw(i, 4)
			variance := m2 - m1*m1
			var want, se float64
			switch v {
			case VariantMean:
				want = 3 * (x[i]*x[i] + sigma[i]*sigma[i])
				se = math.Sqrt(variance / n)
				assert.InDelta(t, want, m1, 1e-12) // the moment helper agrees with the closed form
			case VariantSquared:
				want = 9 * (math.Pow(x[i], 4) + 6*x[i]*x[i]*sigma[i]*sigma[i] + 3*math.Pow(sigma[i], 4))
				se = math.Sqrt((m4 - m2*m2) / n)
				assert.InDelta(t, want, m2, 1e-12)
			case VariantVariance:
				want = 9 * (4*x[i]*x[i]*sigma[i]*sigma[i] + 2*math.Pow(sigma[i], 4))
				mu4 := m4 - 4*m1*m3 + 6*m1*m1*m2 - 3*math.Pow(m1, 4)
				se = math.Sqrt((mu4 - variance*variance) / n)
				assert.InDelta(t, want, variance, 1e-12)
			}
			assert.InDelta(t, want, r.Attributions[i], 5*se, "%v feature %d", v, i)
		}
	}
}

func TestSmoothGradDefaultSigma(t *testing.T) {
	// Default σ = 0.15·(max x − min x) (Smilkov et al. 2017), checked
	// through E g = 3(x² + σ²) on the cubic within 5 standard errors.
	x := []float64{0.5, -1.25, 2}
	sigma := DefaultNoise * (2 - -1.25)
	const n = 20000
	r, err := SmoothGrad(context.Background(), cubic(3), x, 0, SmoothGradOptions{Samples: n, Seed: 3})
	require.NoError(t, err)
	assert.Equal(t, DefaultNoise, r.Settings.Noise)
	for i := range x {
		want := 3 * (x[i]*x[i] + sigma*sigma)
		se := math.Sqrt(9 * (4*x[i]*x[i]*sigma*sigma + 2*math.Pow(sigma, 4)) / n)
		assert.InDelta(t, want, r.Attributions[i], 5*se, "feature %d", i)
	}
	// The default sample count is 50 (Smilkov et al. 2017).
	r, err = SmoothGrad(context.Background(), cubic(3), x, 0, SmoothGradOptions{})
	require.NoError(t, err)
	assert.Equal(t, 50, r.Cost.GradientEvals)
	assert.Equal(t, 50, r.Settings.Samples)
}

func TestSmoothGradCallerNoise(t *testing.T) {
	// Caller-supplied ε: the result is the hand-computed mean of
	// 3(x + ε_k)² (closed form of the cubic's gradient), times x when asked.
	x := []float64{1, -2}
	eps := [][]float64{{0.1, -0.3}, {-0.5, 0.2}, {0.25, 0.05}}
	want := make([]float64, 2)
	for _, e := range eps {
		for i := range x {
			y := x[i] + e[i]
			want[i] += 3 * y * y / 3
		}
	}
	r, err := SmoothGrad(context.Background(), cubic(2), x, 0, SmoothGradOptions{Perturbations: eps, BatchSize: 2})
	require.NoError(t, err)
	assert.InDeltaSlice(t, want, r.Attributions, 1e-14)
	assert.True(t, r.Settings.CallerNoise)
	assert.Equal(t, 3, r.Settings.Samples)

	r, err = SmoothGrad(context.Background(), cubic(2), x, 0, SmoothGradOptions{
		NoiseFunc: func(k int, e []float64) { copy(e, eps[k]) }, Samples: 3, TimesInput: true})
	require.NoError(t, err)
	for i := range x {
		assert.InDelta(t, want[i]*x[i], r.Attributions[i], 1e-14)
	}

	_, err = SmoothGrad(context.Background(), cubic(2), x, 0, SmoothGradOptions{Perturbations: eps, Samples: 4})
	assert.ErrorIs(t, err, ErrOptions)
	_, err = SmoothGrad(context.Background(), cubic(2), x, 0, SmoothGradOptions{Perturbations: [][]float64{{0.1}}})
	assert.ErrorIs(t, err, ErrInput)
	_, err = SmoothGrad(context.Background(), cubic(2), x, 0, SmoothGradOptions{
		NoiseFunc: func(k int, e []float64) { e[1] = math.NaN() }})
	assert.ErrorIs(t, err, ErrInput)
	_, err = SmoothGrad(context.Background(), cubic(2), x, 0, SmoothGradOptions{
		NoiseFunc: func(k int, e []float64) { panic("boom") }})
	assert.ErrorIs(t, err, ErrInput)
	assert.ErrorContains(t, err, "NoiseFunc panicked on copy 0: boom")
}

func TestParseVariant(t *testing.T) {
	for _, v := range []Variant{VariantMean, VariantSquared, VariantVariance} {
		got, err := ParseVariant(v.String())
		require.NoError(t, err)
		assert.Equal(t, v, got)
	}
	_, err := ParseVariant("median")
	assert.ErrorIs(t, err, ErrOptions)
	assert.ErrorContains(t, err, `"median"`)
	assert.Equal(t, "Variant(9)", Variant(9).String())
}
