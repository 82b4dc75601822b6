package gradattr

import (
	"context"
	"fmt"
	"math"
)

// Estimator names how Shapley computes the Shapley values.
type Estimator string

// The estimators. The empty Estimator is EstimatorAuto.
const (
	// EstimatorAuto is EstimatorExact.
	EstimatorAuto Estimator = "auto"
	// EstimatorExact enumerates all 2^d coalitions of d players.
	EstimatorExact Estimator = "exact"
)

// ParseEstimator reads an estimator by name: auto or exact. Errors wrap
// ErrOptions.
func ParseEstimator(s string) (Estimator, error) {
	switch e := Estimator(s); e {
	case EstimatorAuto, EstimatorExact:
		return e, nil
	}
	return "", fmt.Errorf("%w: estimator %q, want auto or exact", ErrOptions, s)
}

// Shapley-value defaults and limits.
const (
	// DefaultReferenceRows is K, the number of reference rows the value
	// function averages over.
	DefaultReferenceRows = 100
	// MaxExactPlayers bounds EstimatorExact: 2^20 coalitions.
	MaxExactPlayers = 20
	// EfficiencyTolerance is the relative gap by which the efficiency of
	// Shapley values, Σ φ_i = v(N) − v(∅), is judged. Every estimator
	// here meets it by construction, so the check guards the arithmetic,
	// not the sampling: a gap beyond rounding is a defect.
	EfficiencyTolerance = 1e-6
)

// ShapleyOptions configures Shapley. The zero value (with a Reference,
// which is required) means: K = 100 reference rows, the automatic
// estimator, seed 0, every feature a player, batches of
// DefaultForwardBatch rows.
type ShapleyOptions struct {
	// Reference is the reference set, one sample per row. Required.
	Reference [][]float64
	// ReferenceRows is K; 0 means DefaultReferenceRows. With more rows in
	// Reference, K of them are drawn (seeded); with K or fewer, all are
	// used in order.
	ReferenceRows int
	// Estimator selects the estimator; "" means EstimatorAuto.
	Estimator Estimator
	// Seed seeds the choice of reference rows.
	Seed uint64
	// Groups, when set, are the players: they must partition the features.
	// Each group's value is spread evenly over its features in
	// Result.Attributions and reported whole in Result.Groups.
	Groups []Group
	// BatchSize is the number of rows per model call; 0 means
	// DefaultForwardBatch.
	BatchSize int
}

// Shapley attributes output target of m at x by Shapley values (Shapley
// 1953) of the game whose players are the features (or the groups of
// opt.Groups) and whose value function is the interventional (marginal)
// expectation over K reference rows r_k (Lundberg & Lee 2017; Janzing,
// Minorics & Blöbaum 2020):
//
//	v(S) = (1/K) Σ_k f(x_S, r_k,S̄)
//	φ_i  = Σ_{S ⊆ N∖{i}} |S|! (d − |S| − 1)! / d! · (v(S ∪ {i}) − v(S))
//
// so that Σ_i φ_i = v(N) − v(∅) = f(x) − (1/K) Σ_k f(r_k) (efficiency),
// which Result.Completeness reports, judged at EfficiencyTolerance.
// BaselineOutput is (1/K) Σ_k f(r_k)[target] and BaselineOutputs the
// mean of every output.
//
// The exact estimator enumerates all 2^d − 2 coalitions besides ∅ and N,
// each of K forward rows, and takes the sum above. The reference rows are
// drawn from math/rand/v2's PCG seeded by (Seed, 3).
func Shapley(ctx context.Context, m Model, x []float64, target int, opt ShapleyOptions) (*Result, error) {
	est := opt.Estimator
	if est == "" {
		est = EstimatorAuto
	}
	if _, err := ParseEstimator(string(est)); err != nil {
		return nil, err
	}
	k, err := countOption("reference rows", opt.ReferenceRows, DefaultReferenceRows, 1, MaxSamplesLimit)
	if err != nil {
		return nil, err
	}
	if len(opt.Reference) == 0 {
		return nil, fmt.Errorf("%w: Shapley values need a reference set, got none", ErrInput)
	}
	e, err := newEngine(ctx, m, x, target, forwardBatch(opt.BatchSize))
	if err != nil {
		return nil, err
	}
	if err := e.checkBackground("reference", opt.Reference); err != nil {
		return nil, err
	}
	p, err := newPlayers(e.size, opt.Groups)
	if err != nil {
		return nil, err
	}
	d := p.n()
	if est == EstimatorAuto {
		est = EstimatorExact
	}
	bg := sampleRows(opt.Reference, k, opt.Seed)
	s := Settings{Method: MethodShapley, Estimator: string(est), ReferenceRows: k,
		References: len(opt.Reference), Seed: opt.Seed, BatchSize: e.batch}
	if opt.Groups != nil {
		s.Groups = len(opt.Groups)
	}
	coalitions, err := shapleyCoalitions(d)
	if err != nil {
		return nil, err
	}
	if coalitions > MaxEvaluations/len(bg) {
		return nil, fmt.Errorf("%w: Shapley values: %d coalitions × %d reference rows exceeds %d model rows", ErrOptions, coalitions, len(bg), MaxEvaluations)
	}
	if err := e.checkRows("Shapley values", coalitions*len(bg)+len(bg)); err != nil {
		return nil, err
	}

	base, err := e.meanOutputs(bg)
	if err != nil {
		return nil, err
	}
	g := game{e: e, p: p, bg: bg, empty: base[e.target], full: e.outputs[e.target]}
	phi, err := g.exact()
	if err != nil {
		return nil, err
	}
	attr := p.spread(phi, e.size)
	r := e.result(attr, s)
	r.BaselineOutput = g.empty
	r.BaselineOutputs = base
	r.Completeness = completeness(attr, g.full, g.empty, EfficiencyTolerance, true)
	r.Groups = p.grouped(phi, r.Completeness)
	return r, nil
}

// shapleyCoalitions returns the number of coalitions the exact estimator
// evaluates for d players, or why it cannot run.
func shapleyCoalitions(d int) (int, error) {
	if d == 1 {
		return 0, nil // φ = v(N) − v(∅)
	}
	if d > MaxExactPlayers {
		return 0, fmt.Errorf("%w: exact Shapley values of %d players would take 2^%d coalitions; at most %d players",
			ErrOptions, d, d, MaxExactPlayers)
	}
	return 1<<d - 2, nil
}

// game is the cooperative game of one Shapley computation.
type game struct {
	e           *engine
	p           *players
	bg          [][]float64
	empty, full float64 // v(∅), v(N)
}

// exact enumerates every coalition (bit i of the mask is player i).
func (g *game) exact() ([]float64, error) {
	d := g.p.n()
	if d == 1 {
		return []float64{g.full - g.empty}, nil
	}
	all := 1<<d - 1
	inner, err := g.e.coalitionValues(g.p, g.bg, all-1, func(c int, on []bool) {
		mask := c + 1
		for i := range on {
			on[i] = mask&(1<<i) != 0
		}
	})
	if err != nil {
		return nil, err
	}
	v := make([]float64, all+1)
	v[0], v[all] = g.empty, g.full
	copy(v[1:all], inner)
	// w[s] = s!(d−s−1)!/d! = 1 / (d · C(d−1, s))
	w := make([]float64, d)
	for s := range w {
		w[s] = 1 / (float64(d) * binomial(d-1, s))
	}
	size := make([]uint8, all+1) // |S| of every mask
	for mask := 1; mask <= all; mask++ {
		size[mask] = size[mask>>1] + uint8(mask&1)
	}
	phi := make([]float64, d)
	for i := range phi {
		bit := 1 << i
		sum := 0.0
		for mask := 0; mask <= all; mask++ {
			if mask&bit != 0 {
				continue
			}
			sum += w[size[mask]] * (v[mask|bit] - v[mask])
		}
		phi[i] = sum
	}
	return phi, nil
}

// binomial returns C(n, k) in float64 (exact up to 2^53).
func binomial(n, k int) float64 {
	k = min(k, n-k)
	r := 1.0
	for j := 1; j <= k; j++ {
		r = r * float64(n-k+j) / float64(j)
	}
	return math.Round(r)
}
