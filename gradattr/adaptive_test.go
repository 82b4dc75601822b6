package gradattr

import (
	"context"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// reluLayer is f(x) = Σ_k c_k·relu(w_k·x + b_k), one hidden ReLU layer and
// a linear head, with relu′(0) = 0 (common practice in the frameworks). Its
// integrated gradients have a closed form: along x′ + αΔ the unit's input
// is u_k(α) = u_k(0) + α·(w_k·Δ), on for the part L_k of [0, 1] where
// u_k > 0, so IG_i = Δ_i·Σ_k c_k·w_ki·L_k (Sundararajan et al. 2017, eq. 1,
// with the step derivative of each unit integrated exactly).
type reluLayer struct {
	w    [][]float64
	b, c []float64
}

func newReluLayer(in, hid int, seed uint64, spread float64) *reluLayer {
	rng := rand.New(rand.NewPCG(seed, 11))
	l := &reluLayer{w: make([][]float64, hid), b: make([]float64, hid), c: make([]float64, hid)}
	for k := range l.w {
		l.w[k] = make([]float64, in)
		for i := range l.w[k] {
			l.w[k][i] = rng.NormFloat64() / math.Sqrt(float64(in))
		}
		l.b[k] = 0.5 * rng.NormFloat64()
		// Output weights over several orders of magnitude when spread > 0:
		// a few units make most of the jumps' size.
		l.c[k] = rng.NormFloat64() * math.Exp(spread*rng.NormFloat64()) / float64(hid)
	}
	return l
}

func (l *reluLayer) pre(k int, x []float64) float64 {
	u := l.b[k]
	for i, v := range x {
		u += l.w[k][i] * v
	}
	return u
}

func (l *reluLayer) model() *Func {
	return &Func{
		Shape: []int{len(l.w[0])}, Outputs: 1,
		F: func(out, x []float64) {
			out[0] = 0
			for k := range l.w {
				out[0] += l.c[k] * math.Max(l.pre(k, x), 0)
			}
		},
		Grad: func(g, x []float64, _ int) {
			clear(g)
			for k := range l.w {
				if l.pre(k, x) > 0 {
					for i := range g {
						g[i] += l.c[k] * l.w[k][i]
					}
				}
			}
		},
	}
}

// ig is the closed form above from base to x.
func (l *reluLayer) ig(base, x []float64) []float64 {
	out := make([]float64, len(x))
	for k := range l.w {
		u0, u1 := l.pre(k, base), l.pre(k, x)
		var on float64
		switch {
		case u0 > 0 && u1 > 0:
			on = 1
		case u0 > 0 || u1 > 0:
			r := u0 / (u0 - u1) // root of u0 + α(u1 − u0)
			on = r
			if u1 > 0 {
				on = 1 - r
			}
		}
		for i := range out {
			out[i] += l.c[k] * l.w[k][i] * on
		}
	}
	for i := range out {
		out[i] *= x[i] - base[i]
	}
	return out
}

func randomPoint(n int, seed uint64) []float64 {
	rng := rand.New(rand.NewPCG(seed, 3))
	x := make([]float64, n)
	for i := range x {
		x[i] = rng.NormFloat64()
	}
	return x
}

func TestIGAdaptive(t *testing.T) {
	ctx := context.Background()
	const tol = 1e-3
	for _, c := range []struct {
		name   string
		seed   uint64
		spread float64
	}{{"even jumps", 1, 0}, {"uneven jumps", 2, 1.5}, {"very uneven jumps", 3, 2.5}} {
		t.Run(c.name, func(t *testing.T) {
			l := newReluLayer(20, 400, c.seed, c.spread)
			x := randomPoint(20, c.seed)
			base := randomPoint(20, c.seed+100)
			want := l.ig(base, x)
			r, err := IntegratedGradients(ctx, l.model(), x, 0, IGOptions{Tolerance: tol,
				Baselines: []Baseline{{Kind: BaselineValues, Values: base}}})
			require.NoError(t, err)
			got := relativeL1(r.Attributions, want)
			t.Logf("%d points, error %.2g, estimate %.2g", r.Settings.Points, got, r.Settings.ErrorEstimate)
			// Against the closed form: within the tolerance asked for, and
			// the estimate within a factor of two either way of the error.
			assert.LessOrEqual(t, got, tol)
			assert.LessOrEqual(t, r.Settings.ErrorEstimate, tol)
			assert.InDelta(t, 0, math.Log2(r.Settings.ErrorEstimate/got), 1)
			assert.True(t, r.Settings.Auto)
			assert.Equal(t, r.Settings.Points, r.Cost.GradientEvals, "every point is evaluated once")

			// The uniform trapezoid rule with as many points is less
			// accurate: the points went where the jumps are largest.
			u, err := IntegratedGradients(ctx, l.model(), x, 0, IGOptions{Points: r.Settings.Points,
				Baselines: []Baseline{{Kind: BaselineValues, Values: base}}})
			require.NoError(t, err)
			assert.Greater(t, relativeL1(u.Attributions, want), got)

			// Deterministic: the same nodes and sums on a second run.
			again, err := IntegratedGradients(ctx, l.model(), x, 0, IGOptions{Tolerance: tol,
				Baselines: []Baseline{{Kind: BaselineValues, Values: base}}})
			require.NoError(t, err)
			assert.Equal(t, r.Attributions, again.Attributions)
		})
	}
}

func TestIGAdaptiveEnds(t *testing.T) {
	// With zero biases every unit's input is 0 at the zero baseline, where
	// relu′(0) = 0 turns every unit off, and u_k(α) = α·(w_k·x) keeps its
	// sign on all of (0, 1]: the integrand is constant past α = 0 and the
	// closed form is IG_i = x_i·Σ_{k: w_k·x > 0} c_k·w_ki. A rule that
	// evaluates α = 0 itself weighs the wrong gradient there (1/32 of the
	// total with 17 trapezoid points); the adaptive rule evaluates just
	// inside the path and is exact.
	l := newReluLayer(6, 30, 4, 0)
	clear(l.b)
	x := randomPoint(6, 4)
	want := l.ig(make([]float64, 6), x)
	r, err := IntegratedGradients(context.Background(), l.model(), x, 0, IGOptions{})
	require.NoError(t, err)
	assert.InDeltaSlice(t, want, r.Attributions, 1e-12)
	assert.Equal(t, adaptiveStart+1, r.Settings.Points, "exact after the first pass")
	u, err := IntegratedGradients(context.Background(), l.model(), x, 0, IGOptions{Points: adaptiveStart + 1})
	require.NoError(t, err)
	assert.InDelta(t, 1.0/32, relativeL1(want, u.Attributions), 1e-12, "the node at α = 0 weighs h/2 = 1/32")
}

func TestIGAdaptiveCap(t *testing.T) {
	// A tolerance out of reach stops at MaxPoints with the estimate above
	// it, which the result reports.
	l := newReluLayer(20, 400, 5, 1)
	x := randomPoint(20, 5)
	r, err := IntegratedGradients(context.Background(), l.model(), x, 0, IGOptions{Tolerance: 1e-9, MaxPoints: 100})
	require.NoError(t, err)
	assert.Equal(t, 100, r.Settings.Points)
	assert.Greater(t, r.Settings.ErrorEstimate, 1e-9)
	assert.Equal(t, 100, r.Cost.GradientEvals)
}
