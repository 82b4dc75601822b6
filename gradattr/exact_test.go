package gradattr

import (
	"context"
	"errors"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// hinge is f(x) = relu(x₀) − 2·relu(x₁ − 1), a piecewise-linear closed form
// that integrates its gradient along a path in closed form too: on the path
// u(α) = u(0) + α(u(1) − u(0)) of a unit's input, relu′ is 1 on the part of
// [0, 1] where u > 0, whose length follows from the root u(0)/(u(0) − u(1)).
type hinge struct {
	*Func
	notPL error // what PiecewiseLinear reports
	calls int
}

func newHinge() *hinge {
	return &hinge{Func: &Func{
		Shape: []int{2}, Outputs: 1,
		F: func(out, x []float64) { out[0] = math.Max(x[0], 0) - 2*math.Max(x[1]-1, 0) },
		Grad: func(g, x []float64, _ int) {
			g[0], g[1] = boolF(x[0] > 0), -2*boolF(x[1] > 1)
		},
	}}
}

func (h *hinge) PiecewiseLinear() error { return h.notPL }

func (h *hinge) IntegratePath(_ context.Context, from, to []float64, _ int, maxPieces int) ([]float64, int, error) {
	h.calls++
	pieces := 1
	positive := func(u0, u1 float64) float64 { // the length of {α ∈ [0, 1] : u(α) > 0}
		if u0 == u1 {
			return boolF(u0 > 0)
		}
		r := math.Min(math.Max(u0/(u0-u1), 0), 1)
		if r > 0 && r < 1 {
			pieces++
		}
		if u1 > u0 {
			return 1 - r
		}
		return r
	}
	g := []float64{positive(from[0], to[0]), -2 * positive(from[1]-1, to[1]-1)}
	if pieces > maxPieces {
		return nil, pieces, nil
	}
	return g, pieces, nil
}

func TestExactIGClosedForm(t *testing.T) {
	// From x′ = 0 to x = (2, 3): x₀ = 2α > 0 on all of (0, 1], and
	// x₁ − 1 = 3α − 1 > 0 on (1/3, 1], so IG = (2·1, 3·(−2)·(2/3)) = (2, −4),
	// summing to f(x) − f(0) = 2 − 2·2 = −2 (Sundararajan et al. 2017, eq. 1
	// and Proposition 1), in two pieces.
	h := newHinge()
	x := []float64{2, 3}
	r, err := IntegratedGradients(context.Background(), h, x, 0, IGOptions{})
	require.NoError(t, err)
	assert.InDeltaSlice(t, []float64{2, -4}, r.Attributions, 1e-15)
	assert.True(t, r.Settings.Exact)
	assert.Equal(t, 2, r.Settings.Pieces)
	assert.Equal(t, DefaultMaxPieces, r.Settings.MaxPieces)
	assert.Empty(t, r.Settings.Rule, "no quadrature rule")
	assert.Zero(t, r.Cost.GradientEvals)
	assert.Equal(t, 2, r.Cost.ForwardPasses, "f(x) and f(x′)")
	assert.True(t, r.Completeness.OK)
	assert.InDelta(t, -2, r.Completeness.Expected, 1e-15)
	assert.InDelta(t, 0, r.Completeness.Gap, 1e-15)

	// Two baselines: the mean of (2, −4) and, from x′ = (1, 0) (x₁ − 1 =
	// 3α − 1 again, x₀ = 1 + α > 0), IG = (1, −4); completeness against the
	// mean baseline output (f(0) + f(1, 0))/2 = 1/2.
	r, err = IntegratedGradients(context.Background(), h, x, 0, IGOptions{Exact: ExactAlways,
		Baselines: []Baseline{{}, {Kind: BaselineValues, Values: []float64{1, 0}}}})
	require.NoError(t, err)
	assert.InDeltaSlice(t, []float64{1.5, -4}, r.Attributions, 1e-15)
	assert.InDelta(t, 0.5, r.BaselineOutput, 1e-15)
	assert.True(t, r.Completeness.OK)
	assert.False(t, r.Settings.Auto, "ExactAlways never refines a quadrature rule")
	assert.Equal(t, MaxPiecesLimit, r.Settings.MaxPieces)
}

func TestExactIGModes(t *testing.T) {
	ctx := context.Background()
	x := []float64{2, 3}
	quadrature := func(t *testing.T, r *Result, skipped string) {
		t.Helper()
		assert.False(t, r.Settings.Exact)
		assert.Positive(t, r.Cost.GradientEvals)
		assert.Equal(t, skipped, r.Settings.ExactSkipped)
	}
	t.Run("a model without the exact integral", func(t *testing.T) {
		r, err := IntegratedGradients(ctx, newHinge().Func, x, 0, IGOptions{})
		require.NoError(t, err)
		quadrature(t, r, "")
		_, err = IntegratedGradients(ctx, newHinge().Func, x, 0, IGOptions{Exact: ExactAlways})
		assert.ErrorIs(t, err, ErrOptions)
		assert.ErrorContains(t, err, "need a model that integrates its gradient along a path")
	})
	t.Run("a fixed point count", func(t *testing.T) {
		h := newHinge()
		r, err := IntegratedGradients(ctx, h, x, 0, IGOptions{Points: 8})
		require.NoError(t, err)
		quadrature(t, r, "")
		assert.Zero(t, h.calls)
		_, err = IntegratedGradients(ctx, h, x, 0, IGOptions{Points: 8, Exact: ExactAlways})
		assert.ErrorIs(t, err, ErrOptions)
		assert.ErrorContains(t, err, "take no point count, got 8 points")
	})
	t.Run("never", func(t *testing.T) {
		h := newHinge()
		r, err := IntegratedGradients(ctx, h, x, 0, IGOptions{Exact: ExactNever})
		require.NoError(t, err)
		quadrature(t, r, "")
		assert.Zero(t, h.calls)
	})
	t.Run("not piecewise-linear", func(t *testing.T) {
		h := newHinge()
		h.notPL = errors.New(`operator Tanh (node "h1") is not piecewise-linear`)
		r, err := IntegratedGradients(ctx, h, x, 0, IGOptions{})
		require.NoError(t, err)
		quadrature(t, r, `operator Tanh (node "h1") is not piecewise-linear`)
		_, err = IntegratedGradients(ctx, h, x, 0, IGOptions{Exact: ExactAlways})
		assert.ErrorIs(t, err, ErrOptions)
		assert.ErrorContains(t, err, `exact integrated gradients need a piecewise-linear network: operator Tanh (node "h1")`)
		assert.Zero(t, h.calls)
	})
	t.Run("too many pieces", func(t *testing.T) {
		h := newHinge()
		r, err := IntegratedGradients(ctx, h, x, 0, IGOptions{MaxPieces: 1})
		require.NoError(t, err)
		quadrature(t, r, "the path from baseline 0 has more than 1 pieces")
		_, err = IntegratedGradients(ctx, h, x, 0, IGOptions{MaxPieces: 1, Exact: ExactAlways})
		assert.ErrorIs(t, err, ErrOptions)
		assert.ErrorContains(t, err, "the path from baseline 0 has more than 1 pieces")
	})
	t.Run("bad options", func(t *testing.T) {
		for _, o := range []IGOptions{{Exact: ExactMode(7)}, {MaxPieces: -1}, {MaxPieces: MaxPiecesLimit + 1}} {
			_, err := IntegratedGradients(ctx, newHinge(), x, 0, o)
			assert.ErrorIs(t, err, ErrOptions, "%+v", o)
		}
	})
}

func TestExactIGSettingsRecord(t *testing.T) {
	// The record of a request names what was asked: automatic (exact with
	// its piece limit, else quadrature with its point limit), always exact,
	// never exact.
	s := Options{Method: MethodIntegratedGradients}.Settings()
	assert.True(t, s.Auto)
	assert.Equal(t, DefaultMaxPoints, s.MaxPoints)
	assert.Equal(t, DefaultMaxPieces, s.MaxPieces)
	assert.False(t, s.Exact)
	s = Options{Method: MethodIntegratedGradients, Exact: ExactAlways}.Settings()
	assert.True(t, s.Exact)
	assert.False(t, s.Auto)
	assert.Equal(t, MaxPiecesLimit, s.MaxPieces)
	s = Options{Method: MethodIntegratedGradients, Exact: ExactNever}.Settings()
	assert.True(t, s.Auto)
	assert.Zero(t, s.MaxPieces)
	r, err := Attribute(context.Background(), newHinge(), []float64{2, 3}, 0, Options{Method: MethodIntegratedGradients, Exact: ExactAlways})
	require.NoError(t, err)
	assert.True(t, r.Settings.Exact, "Attribute passes the mode on")
	assert.Equal(t, "always", ExactAlways.String())
}
