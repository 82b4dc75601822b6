package gradattr

import (
	"context"
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// gameFunc is a model whose output, at a point z between x = 1 and the
// reference row 0, is table[mask], bit i of mask set when z_i is 1: the
// Shapley value function with that one reference row is v(S) = table[S],
// any game at all.
func gameFunc(table []float64, d int) *Func {
	return &Func{
		Shape: []int{d}, Outputs: 1,
		F: func(out, z []float64) {
			mask := 0
			for i, v := range z {
				if v > 0.5 {
					mask |= 1 << i
				}
			}
			out[0] = table[mask]
		},
	}
}

// bruteShapley is the Shapley value of the game table over d players from
// its definition (Shapley 1953): the mean, over all d! orderings of the
// players, of each player's marginal contribution when it joins.
func bruteShapley(table []float64, d int) []float64 {
	phi := make([]float64, d)
	order := make([]int, d)
	for i := range order {
		order[i] = i
	}
	count := 0
	var visit func(k int)
	visit = func(k int) {
		if k == d {
			count++
			mask := 0
			for _, i := range order {
				phi[i] += table[mask|1<<i] - table[mask]
				mask |= 1 << i
			}
			return
		}
		for j := k; j < d; j++ {
			order[k], order[j] = order[j], order[k]
			visit(k + 1)
			order[k], order[j] = order[j], order[k]
		}
	}
	visit(0)
	for i := range phi {
		phi[i] /= float64(count)
	}
	return phi
}

func ones(d int) []float64 {
	x := make([]float64, d)
	for i := range x {
		x[i] = 1
	}
	return x
}

// sampled are the sampled estimators, estimators all of them.
var (
	sampled    = []Estimator{EstimatorRegression, EstimatorPermutation}
	estimators = append([]Estimator{EstimatorExact}, sampled...)
)

func TestShapleyRandomGamesAgainstDefinition(t *testing.T) {
	// Random games of 2 to 7 players: the exact estimator against the
	// definition by orderings (Shapley 1953), and the axioms on the same
	// games: efficiency Σφ = v(N) − v(∅), symmetry (two players whose
	// contributions to every coalition are equal get equal values), dummy
	// (a player that adds nothing gets 0) and additivity (φ of v + w is
	// φ of v plus φ of w).
	rng := rand.New(rand.NewPCG(17, 1))
	ctx := context.Background()
	ref := [][]float64{make([]float64, 7)}
	run := func(table []float64, d int) *Result {
		r, err := Shapley(ctx, gameFunc(table, d), ones(d), 0, ShapleyOptions{Reference: [][]float64{ref[0][:d]}, Estimator: EstimatorExact})
		require.NoError(t, err)
		return r
	}
	for d := 2; d <= 7; d++ {
		for rep := 0; rep < 5; rep++ {
			v, w := make([]float64, 1<<d), make([]float64, 1<<d)
			for i := range v {
				v[i], w[i] = rng.NormFloat64(), rng.NormFloat64()
			}
			// Player 0 is a dummy of w; players 0 and 1 are symmetric in v.
			for mask := range w {
				if mask&1 != 0 {
					w[mask] = w[mask&^1]
				}
				if mask&3 == 2 {
					v[mask] = v[mask^3]
				}
			}
			rv, rw := run(v, d), run(w, d)
			assert.InDeltaSlice(t, bruteShapley(v, d), rv.Attributions, 1e-12, "d=%d", d)
			assert.InDeltaSlice(t, bruteShapley(w, d), rw.Attributions, 1e-12, "d=%d", d)

			assert.True(t, rv.Completeness.Judged && rv.Completeness.OK)
			assert.InDelta(t, v[1<<d-1]-v[0], rv.Completeness.Sum, 1e-12, "efficiency")
			assert.InDelta(t, rv.Attributions[0], rv.Attributions[1], 1e-12, "symmetry")
			assert.Equal(t, 0.0, math.Abs(rw.Attributions[0]), "dummy")

			sum := make([]float64, len(v))
			for i := range v {
				sum[i] = v[i] + w[i]
			}
			rs := run(sum, d)
			for i := range rs.Attributions {
				assert.InDelta(t, rv.Attributions[i]+rw.Attributions[i], rs.Attributions[i], 1e-12, "additivity")
			}
		}
	}
}

func TestShapleyLinearModel(t *testing.T) {
	// For f(x) = w·x + b the interventional Shapley values over a
	// reference set are φ_i = w_i (x_i − mean_r r_i) (Lundberg & Lee 2017,
	// the linear case): every estimator finds them, since every marginal
	// contribution of player i is w_i (x_i − r_i) and the regression is
	// exact.
	w := []float64{2, -1, 0.5, 3, -0.25, 1}
	f := linear(w, 0.7)
	x := []float64{1, 3, -2, 0.5, 4, -1}
	rng := rand.New(rand.NewPCG(5, 5))
	ref := make([][]float64, 9)
	mean := make([]float64, len(w))
	for k := range ref {
		ref[k] = make([]float64, len(w))
		for i := range ref[k] {
			ref[k][i] = rng.NormFloat64()
			mean[i] += ref[k][i] / float64(len(ref))
		}
	}
	want := make([]float64, len(w))
	for i := range w {
		want[i] = w[i] * (x[i] - mean[i])
	}
	for _, est := range estimators {
		r, err := Shapley(context.Background(), f, x, 0, ShapleyOptions{Reference: ref, Estimator: est, Coalitions: 64})
		require.NoError(t, err, est)
		assert.InDeltaSlice(t, want, r.Attributions, 1e-12, est)
		assert.True(t, r.Completeness.OK, est)
		if est != EstimatorExact {
			require.Len(t, r.StandardErrors, len(w))
			for i, se := range r.StandardErrors {
				assert.Less(t, se, 1e-12, "%s: a linear game has no sampling error (feature %d)", est, i)
			}
		} else {
			assert.Nil(t, r.StandardErrors)
		}
	}
}

func TestShapleyProduct(t *testing.T) {
	// f = x₁x₂ over reference rows r: a game of two players, whose Shapley
	// values are φ₁ = ½(v({1}) − v(∅)) + ½(v(N) − v({2})) (Shapley 1953),
	// with v({1}) = x₁ r̄₂, v({2}) = r̄₁ x₂, v(∅) = mean r₁r₂, v(N) = x₁x₂.
	x := []float64{3, -2}
	ref := [][]float64{{1, 2}, {-0.5, 4}, {2, -1}}
	var r1, r2, r12 float64
	for _, r := range ref {
		r1 += r[0] / 3
		r2 += r[1] / 3
		r12 += r[0] * r[1] / 3
	}
	phi1 := 0.5*(x[0]*r2-r12) + 0.5*(x[0]*x[1]-r1*x[1])
	phi2 := 0.5*(r1*x[1]-r12) + 0.5*(x[0]*x[1]-x[0]*r2)
	for _, est := range estimators {
		r, err := Shapley(context.Background(), product(), x, 0, ShapleyOptions{Reference: ref, Estimator: est, Coalitions: 16})
		require.NoError(t, err, est)
		assert.InDeltaSlice(t, []float64{phi1, phi2}, r.Attributions, 1e-12, est)
		assert.InDelta(t, r12, r.BaselineOutput, 1e-15, est)
		assert.Equal(t, []float64{r.BaselineOutput}, r.BaselineOutputs)
	}
}

// coverage runs est over seeds and returns the mean absolute error
// against exact and the share of errors within z standard errors.
func coverage(t *testing.T, f *Func, x []float64, ref [][]float64, exact []float64, est Estimator, n int, seeds int, z float64) (meanErr, within float64) {
	t.Helper()
	hits, total := 0, 0
	for seed := 0; seed < seeds; seed++ {
		r, err := Shapley(context.Background(), f, x, 0, ShapleyOptions{Reference: ref, Estimator: est, Coalitions: n, Seed: uint64(seed)})
		require.NoError(t, err)
		for i, a := range r.Attributions {
			d := math.Abs(a - exact[i])
			meanErr += d
			if d <= z*r.StandardErrors[i] {
				hits++
			}
			total++
		}
	}
	return meanErr / float64(total), float64(hits) / float64(total)
}

func TestShapleySampledConverge(t *testing.T) {
	// The sampled estimators converge to exact enumeration as the budget
	// grows (their error falls as 1/√N: by about 4× from N to 16N, checked
	// loosely as 2.5×), and the standard errors they report cover the
	// error: about 95% of the errors of a normal estimate are within 1.96
	// standard errors and 99.7% within 3 (common practice). Over 40 seeds
	// at N = 768 (64 pairs of orderings), checked as at least 88% and 97%:
	// the variance is itself estimated, and marginal contributions are
	// skewed, so coverage approaches the normal one from below as N grows
	// (at N = 96 the permutation estimator's 3-SE coverage is about 91%,
	// at N = 3072 99.5%).
	tn := newTanhNet(7, 5, 2, 3)
	f := tn.model()
	rng := rand.New(rand.NewPCG(9, 9))
	x := make([]float64, 7)
	for i := range x {
		x[i] = rng.NormFloat64()
	}
	ref := make([][]float64, 4)
	for k := range ref {
		ref[k] = make([]float64, 7)
		for i := range ref[k] {
			ref[k][i] = rng.NormFloat64()
		}
	}
	ex, err := Shapley(context.Background(), f, x, 0, ShapleyOptions{Reference: ref, Estimator: EstimatorExact})
	require.NoError(t, err)
	const n = 768
	for _, est := range sampled {
		small, cov := coverage(t, f, x, ref, ex.Attributions, est, n, 40, 1.96)
		assert.GreaterOrEqual(t, cov, 0.88, "%s: share within 1.96 SE", est)
		_, cov3 := coverage(t, f, x, ref, ex.Attributions, est, n, 40, 3)
		assert.GreaterOrEqual(t, cov3, 0.97, "%s: share within 3 SE", est)
		large, _ := coverage(t, f, x, ref, ex.Attributions, est, 16*n, 10, 2)
		assert.Less(t, large*2.5, small, "%s: error at N=%d %g, at 16N %g", est, n, small, large)
		t.Logf("%s: mean |error| %.3g at N=%d (%.0f%% within 1.96 SE, %.0f%% within 3), %.3g at 16N", est, small, n, 100*cov, 100*cov3, large)
	}
}

func TestShapleyGroupsArePlayers(t *testing.T) {
	// With groups, a group is one player: its value is the Shapley value
	// of the game over groups, which the definition gives by moving all of
	// a group's features together (Shapley 1953 on the coarser game),
	// spread evenly over its features.
	tn := newTanhNet(5, 4, 2, 8)
	f := tn.model()
	x := []float64{0.3, -1.2, 0.8, 2, -0.4}
	ref := [][]float64{{0, 0.5, -0.2, 1, 0.1}, {1, -1, 0.4, 0.2, 0.3}}
	groups := []Group{{Name: "a", Indices: []int{0, 3}}, {Name: "b", Indices: []int{1}}, {Name: "c", Indices: []int{2, 4}}}
	// The grouped game: v(S) over 3 players, by brute force.
	table := make([]float64, 8)
	for mask := range table {
		for _, r := range ref {
			p := slices.Clone(r)
			for g, grp := range groups {
				if mask&(1<<g) != 0 {
					for _, i := range grp.Indices {
						p[i] = x[i]
					}
				}
			}
			table[mask] += eval(f, p, 1) / float64(len(ref))
		}
	}
	want := bruteShapley(table, 3)
	r, err := Shapley(context.Background(), f, x, 1, ShapleyOptions{Reference: ref, Groups: groups})
	require.NoError(t, err)
	require.NotNil(t, r.Groups)
	assert.Equal(t, EstimatorExact, Estimator(r.Settings.Estimator))
	assert.InDeltaSlice(t, want, r.Groups.Attributions, 1e-12)
	assert.Equal(t, []string{"a", "b", "c"}, r.Groups.Names)
	assert.InDeltaSlice(t, []float64{want[0] / 2, want[1], want[2] / 2, want[0] / 2, want[2] / 2}, r.Attributions, 1e-12)
	assert.True(t, r.Completeness.OK)
	assert.True(t, r.Groups.Completeness.OK)

	_, err = Shapley(context.Background(), f, x, 1, ShapleyOptions{Reference: ref, Groups: groups[:2]})
	assert.ErrorIs(t, err, ErrInput)
	assert.ErrorContains(t, err, "features [2 4] are in no group")
}

func TestShapleySeedsAndBatches(t *testing.T) {
	// Same seed, same bits, whatever the batch size; another seed draws
	// other reference rows and coalitions (common practice: a seeded
	// generator is a reproducible one).
	tn := newTanhNet(6, 4, 2, 4)
	f := tn.model()
	x := []float64{1, -1, 0.5, 2, 0, -0.3}
	rng := rand.New(rand.NewPCG(2, 2))
	ref := make([][]float64, 30)
	for k := range ref {
		ref[k] = make([]float64, 6)
		for i := range ref[k] {
			ref[k][i] = rng.NormFloat64()
		}
	}
	for _, est := range estimators {
		var first *Result
		for _, batch := range []int{1, 7, 0, 4096} {
			r, err := Shapley(context.Background(), f, x, 0, ShapleyOptions{Reference: ref, ReferenceRows: 10, Estimator: est, Coalitions: 100, Seed: 3, BatchSize: batch})
			require.NoError(t, err)
			if first == nil {
				first = r
				continue
			}
			assert.Equal(t, bits(first.Attributions), bits(r.Attributions), "%s batch %d", est, batch)
			assert.Equal(t, bits(first.StandardErrors), bits(r.StandardErrors), "%s batch %d", est, batch)
		}
		other, err := Shapley(context.Background(), f, x, 0, ShapleyOptions{Reference: ref, ReferenceRows: 10, Estimator: est, Coalitions: 100, Seed: 4})
		require.NoError(t, err)
		assert.NotEqual(t, bits(first.Attributions), bits(other.Attributions), est)
	}
	// K ≥ the rows: all of them, in order, whatever the seed.
	a, err := Shapley(context.Background(), f, x, 0, ShapleyOptions{Reference: ref, ReferenceRows: 30, Seed: 1})
	require.NoError(t, err)
	b, err := Shapley(context.Background(), f, x, 0, ShapleyOptions{Reference: ref, ReferenceRows: 100, Seed: 2})
	require.NoError(t, err)
	assert.Equal(t, bits(a.Attributions), bits(b.Attributions))
}

func TestShapleyCost(t *testing.T) {
	// The exact estimator runs (2^d − 2)·K coalition rows, K rows for
	// v(∅) and one for f(x); Options.Estimate says so before the call.
	f := linear([]float64{1, 2, 3, 4, 5}, 0)
	ref := [][]float64{{0, 0, 0, 0, 0}, {1, 1, 1, 1, 1}, {2, 2, 2, 2, 2}}
	o := Options{Method: MethodShapley, Reference: ref}
	r, err := Attribute(context.Background(), f, []float64{1, 1, 1, 1, 1}, 0, o)
	require.NoError(t, err)
	assert.Equal(t, 30*3+3+1, r.Cost.ForwardPasses)
	est, err := o.Estimate([]int{5})
	require.NoError(t, err)
	assert.Equal(t, Cost{ForwardPasses: r.Cost.ForwardPasses}, est, "auto picks exact enumeration for 5 players")
	o.Estimator = EstimatorExact
	est, err = o.Estimate([]int{5})
	require.NoError(t, err)
	assert.Equal(t, r.Cost.ForwardPasses, est.ForwardPasses)
	for _, e := range sampled {
		o.Estimator = e
		o.Coalitions = 203 // the permutation estimator spends whole antithetic pairs of 4 coalitions each
		r, err := Attribute(context.Background(), f, []float64{1, 1, 1, 1, 1}, 0, o)
		require.NoError(t, err)
		est, err := o.Estimate([]int{5})
		require.NoError(t, err)
		assert.Equal(t, r.Cost.ForwardPasses, est.ForwardPasses, e)
		assert.LessOrEqual(t, r.Cost.ForwardPasses, 1+3+3*203, e)
	}
	// With superpixels the number of players is the image's to decide;
	// auto is bounded by the larger of its two estimators.
	o = Options{Method: MethodShapley, Reference: ref, Superpixels: 8}
	est, err = o.Estimate([]int{1, 8, 8})
	require.NoError(t, err)
	assert.Equal(t, Cost{ForwardPasses: 1 + 3 + 3*(1<<AutoExactPlayers-2)}, est)
}

func TestShapleyErrors(t *testing.T) {
	f := linear([]float64{1, 2, 3}, 0)
	x := []float64{1, 2, 3}
	ref := [][]float64{{0, 0, 0}}
	ctx := context.Background()
	for _, c := range []struct {
		opt  ShapleyOptions
		kind error
		msg  string
	}{
		{ShapleyOptions{}, ErrInput, "need a reference set"},
		{ShapleyOptions{Reference: [][]float64{{0, 0}}}, ErrInput, "reference row 0 has 2 values, model expects 3"},
		{ShapleyOptions{Reference: [][]float64{{0, math.NaN(), 0}}}, ErrInput, "is NaN"},
		{ShapleyOptions{Reference: ref, Estimator: "kernel"}, ErrOptions, `estimator "kernel", want auto, exact, regression or permutation`},
		{ShapleyOptions{Reference: ref, Coalitions: -1}, ErrOptions, "coalitions -1"},
		{ShapleyOptions{Reference: ref, ReferenceRows: -2}, ErrOptions, "reference rows -2"},
		{ShapleyOptions{Reference: ref, Estimator: EstimatorPermutation, Coalitions: 7}, ErrOptions, "at least 4·(players − 1) = 8 coalitions"},
		{ShapleyOptions{Reference: ref, Estimator: EstimatorRegression, Coalitions: 3}, ErrOptions, "at least 4 coalitions"},
	} {
		_, err := Shapley(ctx, f, x, 0, c.opt)
		assert.ErrorIs(t, err, c.kind, c.msg)
		assert.ErrorContains(t, err, c.msg)
	}
	big := linear(make([]float64, 21), 0)
	_, err := Shapley(ctx, big, make([]float64, 21), 0, ShapleyOptions{Reference: [][]float64{make([]float64, 21)}, Estimator: EstimatorExact})
	assert.ErrorIs(t, err, ErrOptions)
	assert.ErrorContains(t, err, "at most 20 players")
}
