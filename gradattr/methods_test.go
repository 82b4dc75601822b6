package gradattr

import (
	"context"
	"encoding/json"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestParseMethod(t *testing.T) {
	// The canonical names and the command line's aliases, as the README's
	// method table lists them.
	for name, want := range map[string]Method{
		"gradient": MethodGradient, "grad": MethodGradient,
		"gradient-times-input": MethodGradientTimesInput, "grad-input": MethodGradientTimesInput,
		"smoothgrad":           MethodSmoothGrad,
		"integrated-gradients": MethodIntegratedGradients, "ig": MethodIntegratedGradients,
		"expected-gradients": MethodExpectedGradients, "expected-grad": MethodExpectedGradients,
		"shapley": MethodShapley, "surrogate": MethodSurrogate, "occlusion": MethodOcclusion,
	} {
		got, err := ParseMethod(name)
		require.NoError(t, err, name)
		assert.Equal(t, want, got, name)
		back, err := ParseMethod(got.String())
		require.NoError(t, err)
		assert.Equal(t, got, back, "the canonical name parses to itself")
	}
	for _, bad := range []string{"", "IG", "lime", "integrated gradients"} {
		_, err := ParseMethod(bad)
		assert.ErrorIs(t, err, ErrOptions, "%q", bad)
		assert.ErrorContains(t, err, "integrated-gradients (ig)")
	}
	assert.Len(t, Methods(), 8)
	assert.Equal(t, "ig", MethodIntegratedGradients.Alias())
	assert.Equal(t, "smoothgrad", MethodSmoothGrad.Alias(), "a short name is its own alias")
}

func TestAttributeClosedForms(t *testing.T) {
	// f(x) = w·x + b: every method has a closed form, because the gradient
	// is w everywhere (Simonyan et al. 2013; Shrikumar et al. 2016: x ⊙ w;
	// Smilkov et al. 2017: the mean of a constant; Sundararajan et al.
	// 2017, eq. 1: (x − x′) ⊙ w; Erion et al. 2021: E[(x − x′) ⊙ w] over
	// the reference set, exact for a one-row set).
	w := []float64{2, -1, 0.5}
	f := linear(w, 0.25)
	x := []float64{1, 3, -2}
	ref := [][]float64{{0.5, 1, 1}}
	ctx := context.Background()
	for _, c := range []struct {
		o    Options
		want []float64
	}{
		{Options{Method: MethodGradient}, w},
		{Options{Method: MethodGradientTimesInput}, []float64{2, -3, -1}},
		{MethodSmoothGrad.Defaults(), w},
		{Options{Method: MethodIntegratedGradients, Points: 2}, []float64{2, -3, -1}},
		{Options{Method: MethodIntegratedGradients, Points: 2, Reference: ref,
			Baselines: []Baseline{{Kind: BaselineMean}}}, []float64{1, -2, -1.5}},
		{Options{Method: MethodExpectedGradients, Reference: ref, Samples: 3}, []float64{1, -2, -1.5}},
	} {
		r, err := Attribute(ctx, f, x, 0, c.o)
		require.NoError(t, err, c.o.Method)
		assert.InDeltaSlice(t, c.want, r.Attributions, 1e-12, c.o.Method)
		assert.Equal(t, c.o.Method, r.Settings.Method)
	}
	_, err := Attribute(ctx, f, x, 0, Options{Method: "lime"})
	assert.ErrorIs(t, err, ErrOptions)
}

func TestOptionsSettingsMatchResults(t *testing.T) {
	// What Options.Settings records before the call is what the method
	// records in its Result, for every field both know: the same JSON,
	// after dropping the fields only a call can know.
	f := linear([]float64{1, -1}, 0)
	x := []float64{0.5, 2}
	for _, m := range Methods() {
		o := m.Defaults()
		if m.Reads(ParamReference) {
			o.Reference = [][]float64{{0, 0}, {1, 1}}
		}
		if m.Reads(ParamSteps) {
			o.Points = 4
		}
		r, err := Attribute(context.Background(), f, x, 0, o)
		require.NoError(t, err, m)
		// The estimate is a bound on what the call spent; for the methods
		// that switch features on and off, who know their players before
		// the call, it is what the call spent.
		est, err := o.Estimate([]int{2})
		require.NoError(t, err, m)
		assert.LessOrEqual(t, r.Cost.ForwardPasses, est.ForwardPasses, m)
		assert.LessOrEqual(t, r.Cost.GradientEvals, est.GradientEvals, m)
		if m.Perturbs() {
			assert.Equal(t, r.Cost.ForwardPasses, est.ForwardPasses, m)
		}
		got := r.Settings
		got.BatchSize = 0
		if o.Estimator == EstimatorAuto {
			got.Estimator = string(EstimatorAuto) // which one auto picks is the call's to know
		}
		want, err := json.Marshal(o.Settings())
		require.NoError(t, err)
		have, err := json.Marshal(got)
		require.NoError(t, err)
		assert.JSONEq(t, string(want), string(have), m)
	}
	// Automatic refinement is recorded as such, with its cap.
	s := MethodIntegratedGradients.Defaults().Settings()
	assert.True(t, s.Auto)
	assert.Equal(t, DefaultMaxPoints, s.MaxPoints)
	assert.Equal(t, []Baseline{{Kind: BaselineZero}}, s.Baselines)
}

func TestAttributeGroups(t *testing.T) {
	// Groups for every method: the methods that switch features on and off
	// play them as players (Shapley values of the grouped game, Shapley
	// 1953), the others sum their attributions per group; superpixels make
	// the groups from the image itself.
	ctx := context.Background()
	w := []float64{1, -2, 0.5, 3}
	f := linear(w, 0)
	x := []float64{1, 1, 2, -1}
	groups := []Group{{Name: "g0", Indices: []int{0, 1}}, {Name: "g1", Indices: []int{2, 3}}}
	ref := [][]float64{{0, 0, 0, 0}}
	for _, m := range Methods() {
		o := Options{Method: m, Groups: groups, Reference: ref, Ridge: 1e-14, Points: 2}
		r, err := Attribute(ctx, f, x, 0, o)
		require.NoError(t, err, m)
		require.NotNil(t, r.Groups, m)
		assert.Equal(t, []string{"g0", "g1"}, r.Groups.Names, m)
		switch m {
		case MethodGradient, MethodSmoothGrad:
			// Σ w over the group
			assert.InDeltaSlice(t, []float64{-1, 3.5}, r.Groups.Attributions, 1e-9, m)
		case MethodOcclusion:
			// f(x) − f(x with the group at 0) = Σ_{i∈g} w_i x_i
			assert.InDeltaSlice(t, []float64{-1, -2}, r.Groups.Attributions, 1e-9, m)
			assert.Equal(t, []float64{-1, -1, -2, -2}, r.Attributions, m)
		default:
			// Σ_{i∈g} w_i x_i against the zero baseline, for a linear model
			assert.InDeltaSlice(t, []float64{-1, -2}, r.Groups.Attributions, 1e-9, m)
		}
		if m.Perturbs() {
			assert.Equal(t, 2, r.Settings.Groups, m)
			assert.Equal(t, 2, o.Settings().Groups, m)
		} else {
			assert.Zero(t, o.Settings().Groups, m)
		}
	}
	// Groups that do not partition the features cannot be players.
	_, err := Attribute(ctx, f, x, 0, Options{Method: MethodShapley, Reference: ref, Groups: groups[:1]})
	assert.ErrorIs(t, err, ErrInput)
	assert.ErrorContains(t, err, "the groups must partition the features")
	_, err = Attribute(ctx, f, x, 0, Options{Method: MethodGradient, Groups: groups, Superpixels: 4})
	assert.ErrorIs(t, err, ErrOptions)

	// Superpixels of a 6×6 image of four flat quadrants: four segments,
	// each a quadrant, whatever the method.
	img := &Func{Shape: []int{6, 6}, Outputs: 1,
		F: func(out, x []float64) {
			out[0] = 0
			for _, v := range x {
				out[0] += v
			}
		},
		Grad: func(g, _ []float64, _ int) {
			for i := range g {
				g[i] = 1
			}
		}}
	q := make([]float64, 36)
	for p := range q {
		q[p] = float64(p/18*2 + p%6/3)
	}
	for _, m := range []Method{MethodGradient, MethodShapley, MethodOcclusion} {
		r, err := Attribute(ctx, img, q, 0, Options{Method: m, Superpixels: 4, Reference: [][]float64{make([]float64, 36)}})
		require.NoError(t, err, m)
		require.Len(t, r.Groups.Names, 4, m)
		require.Len(t, r.Groups.Segments, 36, m)
		for p, l := range r.Groups.Segments {
			assert.Equal(t, int(q[p]), l, "%s: pixel %d", m, p)
		}
		assert.Equal(t, 4, r.Settings.Superpixels, m)
		assert.Equal(t, float64(DefaultCompactness), r.Settings.Compactness, m)
	}
}
