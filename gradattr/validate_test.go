package gradattr

import (
	"context"
	"encoding/json"
	"errors"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestGradient(t *testing.T) {
	// Gradient (Simonyan et al. 2013) of the tanh network against
	// central finite differences, signed and absolute; TargetTop picks the
	// largest output (Top).
	net := newTanhNet(4, 5, 3, 9)
	m := net.model()
	x := []float64{0.2, -0.9, 1.3, 0.5}
	out := outputsOf(m, x)
	top := Top(out)
	r, err := Gradient(context.Background(), m, x, TargetTop, GradientOptions{})
	require.NoError(t, err)
	assert.Equal(t, top, r.Target)
	assert.Equal(t, out, r.Outputs)
	assert.Equal(t, out[top], r.Output)
	assert.Nil(t, r.Completeness)
	assert.Equal(t, []int{4}, r.Shape)
	fd := centralDiff(m, x, top, 1e-5)
	assert.InDeltaSlice(t, fd, r.Attributions, 1e-8) // central difference
	a, err := Gradient(context.Background(), m, x, top, GradientOptions{Absolute: true})
	require.NoError(t, err)
	for i := range fd {
		assert.InDelta(t, math.Abs(fd[i]), a.Attributions[i], 1e-8)
	}
	assert.True(t, a.Settings.Absolute)
}

func TestTop(t *testing.T) {
	// Argmax with first-index ties (common practice, as numpy.argmax).
	assert.Equal(t, 1, Top([]float64{0.1, 0.7, 0.2}))
	assert.Equal(t, 0, Top([]float64{0.5, 0.5}))
	assert.Equal(t, 2, Top([]float64{math.NaN(), -1, 3}))
	assert.Equal(t, -1, Top(nil))
	assert.Equal(t, -1, Top([]float64{math.NaN()}))
}

// badModel returns wrong lengths, NaN, errors or panics on request.
type badModel struct {
	Func
	mode string
}

func (b *badModel) Forward(ctx context.Context, x []float64, n int) ([]float64, error) {
	switch b.mode {
	case "short":
		return make([]float64, n*b.Outputs-1), nil
	case "panic-forward":
		panic("forward broke")
	}
	return b.Func.Forward(ctx, x, n)
}

func (b *badModel) Gradient(ctx context.Context, x []float64, n int, target []int) ([]float64, []float64, error) {
	out, g, err := b.Func.Gradient(ctx, x, n, target)
	switch b.mode {
	case "nan":
		g[len(g)-1] = math.NaN()
	case "short-grad":
		g = g[1:]
	case "error":
		return nil, nil, errors.New("device lost")
	case "panic":
		var s []float64
		_ = s[3]
	}
	return out, g, err
}

func TestValidation(t *testing.T) {
	ctx := context.Background()
	f := cubic(3)
	x := []float64{1, 2, 3}
	img := &Func{Shape: []int{1, 2, 2}, Outputs: 1, F: cubic(4).F, Grad: cubic(4).Grad}
	cases := []struct {
		name     string
		run      func() error
		sentinel error
		says     string
	}{
		{"short input", func() error { _, err := Gradient(ctx, f, []float64{1, 2}, 0, GradientOptions{}); return err }, ErrInput, "has 2 values, model expects 3"},
		{"NaN input", func() error {
			_, err := IntegratedGradients(ctx, img, []float64{0, 1, math.NaN(), 2}, 0, IGOptions{})
			return err
		}, ErrInput, "value 2 (position [0 1 0]) is NaN"},
		{"Inf input", func() error {
			_, err := SmoothGrad(ctx, f, []float64{1, math.Inf(1), 3}, 0, SmoothGradOptions{})
			return err
		}, ErrInput, "+Inf"},
		{"target", func() error { _, err := Gradient(ctx, f, x, 1, GradientOptions{}); return err }, ErrInput, "target 1, model has outputs 0..0"},
		{"unknown rule", func() error { _, err := IntegratedGradients(ctx, f, x, 0, IGOptions{Rule: Rule(9)}); return err }, ErrOptions, "unknown quadrature rule 9"},
		{"trapezoid 1 point", func() error { _, err := IntegratedGradients(ctx, f, x, 0, IGOptions{Points: 1}); return err }, ErrOptions, "want 2..65536, or 0 to refine the count automatically"},
		{"too many points", func() error {
			_, err := IntegratedGradients(ctx, f, x, 0, IGOptions{Points: MaxPointsLimit + 1})
			return err
		}, ErrOptions, "65537 points"},
		{"oversized request", func() error {
			wide := &Func{Shape: []int{1 << 10, 1 << 10}, Outputs: 1, F: func(out, x []float64) {}, Grad: func(g, x []float64, k int) {}}
			_, err := IntegratedGradients(ctx, wide, make([]float64, 1<<20), 0, IGOptions{Points: 512, Baselines: make([]Baseline, 2)})
			return err
		}, ErrOptions, "2 baselines × 512 points × 1048576 features exceeds 268435456"},
		{"max points", func() error { _, err := IntegratedGradients(ctx, f, x, 0, IGOptions{MaxPoints: -3}); return err }, ErrOptions, "max points -3"},
		{"tolerance", func() error {
			_, err := IntegratedGradients(ctx, f, x, 0, IGOptions{Tolerance: math.NaN()})
			return err
		}, ErrOptions, "tolerance NaN"},
		{"batch", func() error { _, err := IntegratedGradients(ctx, f, x, 0, IGOptions{BatchSize: -1}); return err }, ErrOptions, "batch size -1"},
		{"huge batch", func() error {
			_, err := SmoothGrad(ctx, f, x, 0, SmoothGradOptions{BatchSize: MaxBatchSize + 1})
			return err
		}, ErrOptions, "batch size"},
		{"variant", func() error { _, err := SmoothGrad(ctx, f, x, 0, SmoothGradOptions{Variant: 7}); return err }, ErrOptions, "variant 7"},
		{"noise", func() error { _, err := SmoothGrad(ctx, f, x, 0, SmoothGradOptions{Noise: -0.1}); return err }, ErrOptions, "noise -0.1"},
		{"sigma length", func() error { _, err := SmoothGrad(ctx, f, x, 0, SmoothGradOptions{Sigma: []float64{1}}); return err }, ErrOptions, "sigma has 1 values"},
		{"samples", func() error { _, err := SmoothGrad(ctx, f, x, 0, SmoothGradOptions{Samples: -2}); return err }, ErrOptions, "samples -2"},
		{"baseline length", func() error {
			_, err := IntegratedGradients(ctx, f, x, 0, IGOptions{Baselines: []Baseline{{Kind: BaselineValues, Values: []float64{1}}}})
			return err
		}, ErrInput, "baseline 0: "},
		{"baseline kind", func() error {
			_, err := IntegratedGradients(ctx, f, x, 0, IGOptions{Baselines: []Baseline{{Kind: "gray"}}})
			return err
		}, ErrOptions, `baseline kind "gray"`},
		{"nil model", func() error { _, err := Gradient(ctx, nil, x, 0, GradientOptions{}); return err }, ErrModel, "nil model"},
		{"empty shape", func() error { _, err := Gradient(ctx, &Func{Outputs: 1}, x, 0, GradientOptions{}); return err }, ErrModel, "input shape is empty"},
		{"no outputs", func() error { _, err := Gradient(ctx, &Func{Shape: []int{3}}, x, 0, GradientOptions{}); return err }, ErrModel, "0 outputs"},
		{"short forward", func() error { _, err := Gradient(ctx, &badModel{*f, "short"}, x, 0, GradientOptions{}); return err }, ErrModel, "returned 0 values for 1 samples, want 1"},
		{"forward panic", func() error {
			_, err := Gradient(ctx, &badModel{*f, "panic-forward"}, x, 0, GradientOptions{})
			return err
		}, ErrModel, "forward broke"},
		{"NaN gradient", func() error {
			_, err := IntegratedGradients(ctx, &badModel{*f, "nan"}, x, 0, IGOptions{})
			return err
		}, ErrModel, "returned NaN at sample 16, value 2"}, // the last of the first pass's 17 points
		{"short gradient", func() error {
			_, err := Gradient(ctx, &badModel{*f, "short-grad"}, x, 0, GradientOptions{})
			return err
		}, ErrModel, "returned 2 values"},
		{"model error", func() error { _, err := SmoothGrad(ctx, &badModel{*f, "error"}, x, 0, SmoothGradOptions{}); return err }, ErrModel, "device lost"},
		{"model panic", func() error { _, err := SmoothGrad(ctx, &badModel{*f, "panic"}, x, 0, SmoothGradOptions{}); return err }, ErrModel, "index out of range"},
		{"Func panic", func() error {
			p := &Func{Shape: []int{3}, Outputs: 1, F: func(out, x []float64) { out[1] = 0 }, Grad: f.Grad}
			_, err := Gradient(ctx, p, x, 0, GradientOptions{})
			return err
		}, ErrModel, "panicked"},
	}
	for _, c := range cases {
		var err error
		require.NotPanics(t, func() { err = c.run() }, c.name)
		require.Error(t, err, c.name)
		assert.ErrorIs(t, err, c.sentinel, c.name)
		assert.ErrorContains(t, err, c.says, c.name)
	}
}

func TestResultJSON(t *testing.T) {
	// The documented JSON keys (snake_case, see Result).
	r, err := IntegratedGradients(context.Background(), product(), []float64{2, 3}, 0, IGOptions{Rule: RuleMidpoint, Points: 3})
	require.NoError(t, err)
	b, err := json.Marshal(r)
	require.NoError(t, err)
	var m map[string]any
	require.NoError(t, json.Unmarshal(b, &m))
	for _, k := range []string{"attributions", "shape", "target", "output", "outputs", "baseline_output", "completeness", "cost", "settings"} {
		assert.Contains(t, m, k)
	}
	comp := m["completeness"].(map[string]any)
	for _, k := range []string{"sum", "expected", "gap", "relative_gap", "tolerance", "judged", "ok"} {
		assert.Contains(t, comp, k)
	}
	cost := m["cost"].(map[string]any)
	for _, k := range []string{"gradient_evals", "forward_passes", "elapsed_ns"} {
		assert.Contains(t, cost, k)
	}
	s := m["settings"].(map[string]any)
	assert.Equal(t, "integrated-gradients", s["method"])
	assert.Equal(t, "midpoint", s["rule"])
	assert.EqualValues(t, 3, s["points"])
	assert.Equal(t, []any{map[string]any{"kind": "zero"}}, s["baselines"])
	// Gradient has no completeness key.
	g, err := Gradient(context.Background(), product(), []float64{2, 3}, 0, GradientOptions{})
	require.NoError(t, err)
	b, err = json.Marshal(g)
	require.NoError(t, err)
	assert.NotContains(t, string(b), "completeness")
}

func TestCompletenessJSON(t *testing.T) {
	// A judged check writes its verdict; an unjudged one (gradient × input)
	// has none: "ok" is null (RFC 8259 §3: null is the JSON value for no
	// value).
	for _, c := range []struct {
		cp   Completeness
		want string
	}{
		{Completeness{Sum: 1, Expected: 1, Tolerance: 0.005, Judged: true, OK: true}, `"judged":true,"ok":true`},
		{Completeness{Sum: 2, Expected: 1, Gap: 1, RelativeGap: 1, Tolerance: 0.005, Judged: true}, `"judged":true,"ok":false`},
		{Completeness{Sum: 2, Expected: 1, Gap: 1, RelativeGap: 1}, `"judged":false,"ok":null`},
	} {
		raw, err := json.Marshal(c.cp)
		require.NoError(t, err)
		assert.Contains(t, string(raw), c.want)
		assert.Contains(t, string(raw), `"sum":`)
		var back Completeness
		require.NoError(t, json.Unmarshal(raw, &back))
		assert.Equal(t, c.cp, back, "reads back")
	}
}
