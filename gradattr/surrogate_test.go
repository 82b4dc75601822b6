package gradattr

import (
	"context"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestSurrogateLinearModel(t *testing.T) {
	// On f(x) = w·x + b every coalition's value is linear in z,
	// v(z) = f(x′) + Σ_i z_i w_i (x_i − x′_i), so the weighted least
	// squares fit is exact and, as the ridge penalty goes to zero, the
	// coefficients go to w_i (x_i − x′_i) and the intercept to f(x′)
	// (Ribeiro et al. 2016, §3.4: a linear g fitted to a linear f); the
	// shrinkage of a ridge fit is O(λ) (Hoerl & Kennard 1970).
	w := []float64{2, -1, 0.5, 3, -0.25}
	f := linear(w, 0.7)
	x := []float64{1, 3, -2, 0.5, 4}
	base := []float64{0.5, -1, 1, 2, 0}
	want := make([]float64, len(w))
	fb := 0.7
	for i := range w {
		want[i] = w[i] * (x[i] - base[i])
		fb += w[i] * base[i]
	}
	prev, prevFit := math.Inf(1), 0.0
	for _, ridge := range []float64{1e-2, 1e-4, 1e-7, 1e-10} {
		r, err := Surrogate(context.Background(), f, x, 0, SurrogateOptions{Ridge: ridge, Coalitions: 256, Seed: 2,
			Baselines: []Baseline{{Kind: BaselineValues, Values: base}}})
		require.NoError(t, err)
		worst := 0.0
		for i := range want {
			worst = math.Max(worst, math.Abs(r.Attributions[i]-want[i]))
		}
		assert.Less(t, worst, prev, "ridge %g", ridge)
		prev = worst
		assert.Greater(t, r.Surrogate.Fidelity, prevFit, "ridge %g", ridge)
		prevFit = r.Surrogate.Fidelity
		if ridge == 1e-10 {
			assert.InDeltaSlice(t, want, r.Attributions, 1e-8)
			assert.InDelta(t, fb, r.Surrogate.Intercept, 1e-8)
			assert.InDelta(t, 1, r.Surrogate.Fidelity, 1e-12, "a linear model is fitted exactly")
		}
		assert.InDelta(t, fb, r.BaselineOutput, 1e-12)
		require.NotNil(t, r.Completeness)
		assert.False(t, r.Completeness.Judged)
	}
}

func TestSurrogateMatchesWeightedLeastSquares(t *testing.T) {
	// The coefficients solve the weighted ridge normal equations with an
	// unpenalised intercept: at the fit, the weighted residuals are
	// orthogonal to the intercept column (Σπ r = 0) and, for each player,
	// Σπ z_i r = λ Σπ β_i (the stationarity condition of the weighted mean
	// squared error plus λ‖β‖²; Ribeiro et al. 2016, eq. 2 with a ridge
	// term; Hoerl & Kennard 1970).
	// Checked on the surrogate's own coalitions: the same seed draws them
	// again.
	tn := newTanhNet(4, 3, 2, 5)
	f := tn.model()
	x := []float64{0.4, -1, 1.5, 0.2}
	const n, seed, ridge, width = 64, 9, 0.5, 0.6
	r, err := Surrogate(context.Background(), f, x, 1, SurrogateOptions{Coalitions: n, Seed: seed, Ridge: ridge, KernelWidth: width})
	require.NoError(t, err)
	d := 4
	z := surroundings(n, d, seed)
	beta, b0 := r.Attributions, r.Surrogate.Intercept
	sumR, sumPi := 0.0, 0.0
	sumZR := make([]float64, d)
	for c := 0; c < n; c++ {
		p := make([]float64, d)
		kept := 0
		for i := range p {
			if z[c*d+i] {
				p[i] = x[i]
				kept++
			}
		}
		v := eval(f, p, 1)
		pred := b0
		for i := range beta {
			if z[c*d+i] {
				pred += beta[i]
			}
		}
		pi := math.Exp(-float64(d-kept) / float64(d) / (width * width))
		sumR += pi * (v - pred)
		sumPi += pi
		for i := range beta {
			if z[c*d+i] {
				sumZR[i] += pi * (v - pred)
			}
		}
	}
	assert.InDelta(t, 0, sumR, 1e-12)
	for i := range beta {
		assert.InDelta(t, ridge*sumPi*beta[i], sumZR[i], 1e-12, "player %d", i)
	}
	assert.Greater(t, r.Surrogate.Fidelity, 0.0)
	assert.Less(t, r.Surrogate.Fidelity, 1.0)
}

func TestSurrogateGroupsAndErrors(t *testing.T) {
	// Groups move together: a linear model over two groups has the
	// coefficients Σ_{i∈g} w_i (x_i − x′_i) per group (the linear case
	// above, on the grouped features), spread over the group's features.
	w := []float64{1, 2, -1, 0.5}
	f := linear(w, 0)
	x := []float64{1, 1, 2, -2}
	groups := []Group{{Name: "p", Indices: []int{0, 2}}, {Name: "q", Indices: []int{1, 3}}}
	r, err := Surrogate(context.Background(), f, x, 0, SurrogateOptions{Groups: groups, Ridge: 1e-10, Coalitions: 16})
	require.NoError(t, err)
	assert.InDeltaSlice(t, []float64{1 - 2, 2 - 1}, r.Groups.Attributions, 1e-8)
	assert.InDeltaSlice(t, []float64{-0.5, 0.5, -0.5, 0.5}, r.Attributions, 1e-8)
	assert.Equal(t, 2, r.Settings.Groups)

	for _, c := range []struct {
		opt SurrogateOptions
		msg string
	}{
		{SurrogateOptions{Coalitions: 3}, "coalitions 3, want 0 (default 2048) or 4.."},
		{SurrogateOptions{KernelWidth: -1}, "kernel width -1"},
		{SurrogateOptions{Ridge: math.Inf(1)}, "ridge +Inf"},
	} {
		_, err := Surrogate(context.Background(), f, x, 0, c.opt)
		assert.ErrorIs(t, err, ErrOptions)
		assert.ErrorContains(t, err, c.msg)
	}
}
