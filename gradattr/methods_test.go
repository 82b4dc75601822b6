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
	assert.Len(t, Methods(), 5)
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
		got := r.Settings
		got.BatchSize = 0
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
