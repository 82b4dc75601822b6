package gradattr

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"

	"gonum.org/v1/gonum/mat"
)

// Estimator names how Shapley computes the Shapley values.
type Estimator string

// The estimators. The empty Estimator is EstimatorAuto.
const (
	// EstimatorAuto is EstimatorExact for at most AutoExactPlayers players
	// and EstimatorRegression for more.
	EstimatorAuto Estimator = "auto"
	// EstimatorExact enumerates all 2^d coalitions of d players.
	EstimatorExact Estimator = "exact"
	// EstimatorRegression solves the Shapley-kernel weighted least squares
	// over sampled coalitions.
	EstimatorRegression Estimator = "regression"
	// EstimatorPermutation averages marginal contributions over sampled
	// permutations.
	EstimatorPermutation Estimator = "permutation"
)

// ParseEstimator reads an estimator by name: auto, exact, regression or
// permutation. Errors wrap ErrOptions.
func ParseEstimator(s string) (Estimator, error) {
	switch e := Estimator(s); e {
	case EstimatorAuto, EstimatorExact, EstimatorRegression, EstimatorPermutation:
		return e, nil
	}
	return "", fmt.Errorf("%w: estimator %q, want auto, exact, regression or permutation", ErrOptions, s)
}

// Shapley-value defaults and limits.
const (
	// DefaultReferenceRows is K, the number of reference rows the value
	// function averages over.
	DefaultReferenceRows = 100
	// DefaultCoalitions is the coalition budget of the sampled estimators
	// (and of the surrogate).
	DefaultCoalitions = 2048
	// AutoExactPlayers is the largest number of players EstimatorAuto
	// enumerates exactly (2^12 coalitions).
	AutoExactPlayers = 12
	// MaxExactPlayers bounds EstimatorExact: 2^20 coalitions.
	MaxExactPlayers = 20
	// MaxCoalitions bounds the coalition budget.
	MaxCoalitions = 1 << 24
	// EfficiencyTolerance is the relative gap by which the efficiency of
	// Shapley values, Σ φ_i = v(N) − v(∅), is judged. Every estimator
	// here meets it by construction, so the check guards the arithmetic,
	// not the sampling: a gap beyond rounding is a defect.
	EfficiencyTolerance = 1e-6
)

// ShapleyOptions configures Shapley. The zero value (with a Reference,
// which is required) means: K = 100 reference rows, the automatic
// estimator, 2048 coalitions, seed 0, every feature a player, batches of
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
	// Coalitions is the coalition budget of the sampled estimators; 0
	// means DefaultCoalitions.
	Coalitions int
	// Seed seeds the choice of reference rows and the sampled coalitions.
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
// Estimators (every coalition costs K forward rows):
//
//   - exact: all 2^d − 2 coalitions besides ∅ and N, and the sum above.
//   - regression: the Shapley kernel weighted least squares
//     min Σ_S k(S) (v(S) − v(∅) − Σ_{i∈S} φ_i)² subject to Σ φ_i = v(N) − v(∅),
//     k(S) = (d − 1) / (C(d, |S|) |S| (d − |S|))  (Lundberg & Lee 2017,
//     Theorem 2), over coalitions drawn with probability ∝ k(S), each with
//     its complement (paired sampling), solved in the closed form of Covert
//     & Lee 2021 (§3): φ = Â⁻¹(b̂ − 1 (1ᵀÂ⁻¹b̂ − v(N) + v(∅)) / 1ᵀÂ⁻¹1),
//     Â = mean z zᵀ, b̂ = mean z (v(z) − v(∅)). Standard errors by the
//     sandwich (delta-method) estimate over the pairs: Cov φ ≈ C Σ_u C / P,
//     C = Â⁻¹ − Â⁻¹11ᵀÂ⁻¹ / 1ᵀÂ⁻¹1, u = z (v(z) − v(∅) − zᵀφ) averaged per
//     pair, P pairs.
//   - permutation: marginal contributions along random orderings of the
//     players (Štrumbelj & Kononenko 2014), each ordering with its reverse
//     (antithetic sampling, Mitchell et al. 2022); Coalitions / (d − 1)
//     orderings, rounded down to pairs; standard errors from the spread of
//     the pair means.
//
// The reference rows are drawn from math/rand/v2's PCG seeded by (Seed, 3),
// the regression's coalitions by (Seed, 5), the orderings by (Seed, 4).
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
	n, err := countOption("coalitions", opt.Coalitions, DefaultCoalitions, 1, MaxCoalitions)
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
	est = est.choose(d)
	bg := sampleRows(opt.Reference, k, opt.Seed)
	s := Settings{Method: MethodShapley, Estimator: string(est), ReferenceRows: k, Coalitions: n,
		References: len(opt.Reference), Seed: opt.Seed, BatchSize: e.batch}
	if opt.Groups != nil {
		s.Groups = len(opt.Groups)
	}
	coalitions, err := shapleyCoalitions(est, d, n)
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
	var phi, se []float64
	switch est {
	case EstimatorExact:
		phi, err = g.exact()
	case EstimatorRegression:
		phi, se, err = g.regression(n/2, opt.Seed)
	case EstimatorPermutation:
		phi, se, err = g.permutation(coalitions/(d-1), opt.Seed)
	}
	if err != nil {
		return nil, err
	}
	attr := p.spread(phi, e.size)
	r := e.result(attr, s)
	r.BaselineOutput = g.empty
	r.BaselineOutputs = base
	r.StandardErrors = p.spread(se, e.size)
	r.Completeness = completeness(attr, g.full, g.empty, EfficiencyTolerance, true)
	r.Groups = p.grouped(phi, se, r.Completeness)
	return r, nil
}

// choose returns the estimator that runs for d players: the one asked
// for, or for EstimatorAuto, exact enumeration up to AutoExactPlayers and
// the regression above.
func (est Estimator) choose(d int) Estimator {
	switch {
	case est != EstimatorAuto:
		return est
	case d <= AutoExactPlayers:
		return EstimatorExact
	}
	return EstimatorRegression
}

// shapleyCoalitions returns the number of coalitions est evaluates for d
// players with a budget of n, or why it cannot run.
func shapleyCoalitions(est Estimator, d, n int) (int, error) {
	if d == 1 {
		return 0, nil // φ = v(N) − v(∅)
	}
	switch est {
	case EstimatorExact:
		if d > MaxExactPlayers {
			return 0, fmt.Errorf("%w: exact Shapley values of %d players would take 2^%d coalitions; at most %d players, or use the regression or permutation estimator",
				ErrOptions, d, d, MaxExactPlayers)
		}
		return 1<<d - 2, nil
	case EstimatorRegression:
		if n < 4 {
			return 0, fmt.Errorf("%w: the regression estimator needs at least 4 coalitions (two pairs, for its standard errors), got %d", ErrOptions, n)
		}
		return n / 2 * 2, nil
	default:
		perms := n / (d - 1) / 2 * 2
		if perms < 4 {
			return 0, fmt.Errorf("%w: the permutation estimator needs at least 4·(players − 1) = %d coalitions for %d players (two antithetic pairs of orderings, for its standard errors), got %d",
				ErrOptions, 4*(d-1), d, n)
		}
		return perms * (d - 1), nil
	}
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

// regression is the paired-sampling Shapley-kernel regression over pairs
// pairs of coalitions.
func (g *game) regression(pairs int, seed uint64) (phi, se []float64, err error) {
	d := g.p.n()
	if d == 1 {
		return []float64{g.full - g.empty}, []float64{0}, nil
	}
	// Sizes s = 1..d−1 with probability ∝ 1/(s(d−s)), which is the Shapley
	// kernel summed over the C(d, s) coalitions of size s.
	cdf := make([]float64, d)
	for s := 1; s < d; s++ {
		cdf[s] = cdf[s-1] + 1/float64(s*(d-s))
	}
	for s := range cdf {
		cdf[s] /= cdf[d-1]
	}
	rng := rand.New(rand.NewPCG(seed, 5))
	n := 2 * pairs
	z := make([]bool, n*d)
	perm := make([]int, d)
	for j := 0; j < pairs; j++ {
		u := rng.Float64()
		s := 1
		for s < d-1 && cdf[s] <= u {
			s++
		}
		for i := range perm {
			perm[i] = i
		}
		for i := 0; i < s; i++ {
			k := i + rng.IntN(d-i)
			perm[i], perm[k] = perm[k], perm[i]
		}
		row, comp := z[2*j*d:(2*j+1)*d], z[(2*j+1)*d:(2*j+2)*d]
		for _, i := range perm[:s] {
			row[i] = true
		}
		for i := range comp {
			comp[i] = !row[i]
		}
	}
	vals, err := g.e.coalitionValues(g.p, g.bg, n, func(c int, on []bool) { copy(on, z[c*d:(c+1)*d]) })
	if err != nil {
		return nil, nil, err
	}

	zm := mat.NewDense(n, d, nil)
	b := mat.NewVecDense(d, nil)
	for c := 0; c < n; c++ {
		dv := vals[c] - g.empty
		for i, in := range z[c*d : (c+1)*d] {
			if in {
				zm.Set(c, i, 1)
				b.SetVec(i, b.AtVec(i)+dv)
			}
		}
	}
	b.ScaleVec(1/float64(n), b)
	a := mat.NewSymDense(d, nil)
	a.SymOuterK(1/float64(n), zm.T())
	var chol mat.Cholesky
	if !chol.Factorize(a) {
		return nil, nil, fmt.Errorf("%w: the regression estimator's %d coalitions do not determine %d players (a singular system); give more coalitions", ErrOptions, n, d)
	}
	ones := mat.NewVecDense(d, nil)
	for i := 0; i < d; i++ {
		ones.SetVec(i, 1)
	}
	var ainv1, ainvb mat.VecDense
	if err := chol.SolveVecTo(&ainv1, ones); err != nil {
		return nil, nil, fmt.Errorf("%w: the regression estimator's system is singular; give more coalitions", ErrOptions)
	}
	if err := chol.SolveVecTo(&ainvb, b); err != nil {
		return nil, nil, fmt.Errorf("%w: the regression estimator's system is singular; give more coalitions", ErrOptions)
	}
	s1 := mat.Sum(&ainv1)
	lambda := (mat.Sum(&ainvb) - (g.full - g.empty)) / s1
	phi = make([]float64, d)
	for i := range phi {
		phi[i] = ainvb.AtVec(i) - lambda*ainv1.AtVec(i)
	}

	// Sandwich standard errors: u_j = ½ Σ_{z in pair j} z (v(z) − v(∅) − zᵀφ),
	// centred; Cov φ ≈ C U Uᵀ C / (P (P − 1)).
	um := mat.NewDense(d, pairs, nil)
	mean := make([]float64, d)
	for j := 0; j < pairs; j++ {
		for c := 2 * j; c < 2*j+2; c++ {
			row := z[c*d : (c+1)*d]
			res := vals[c] - g.empty
			for i, in := range row {
				if in {
					res -= phi[i]
				}
			}
			for i, in := range row {
				if in {
					um.Set(i, j, um.At(i, j)+res/2)
				}
			}
		}
		for i := range mean {
			mean[i] += um.At(i, j)
		}
	}
	for i := range mean {
		mean[i] /= float64(pairs)
		for j := 0; j < pairs; j++ {
			um.Set(i, j, um.At(i, j)-mean[i])
		}
	}
	// C = Â⁻¹ − Â⁻¹1 1ᵀÂ⁻¹ / 1ᵀÂ⁻¹1
	var ainv mat.SymDense
	if err := chol.InverseTo(&ainv); err != nil {
		return nil, nil, fmt.Errorf("%w: the regression estimator's system is singular; give more coalitions", ErrOptions)
	}
	cm := mat.NewSymDense(d, nil)
	cm.CopySym(&ainv)
	cm.SymRankOne(cm, -1/s1, &ainv1)
	var cu mat.Dense
	cu.Mul(cm, um)
	se = make([]float64, d)
	scale := 1 / float64(pairs*(pairs-1))
	for i := range se {
		ss := 0.0
		for j := 0; j < pairs; j++ {
			v := cu.At(i, j)
			ss += v * v
		}
		se[i] = math.Sqrt(ss * scale)
	}
	return phi, se, nil
}

// permutation averages marginal contributions over perms orderings: pairs
// of a random ordering and its reverse.
func (g *game) permutation(perms int, seed uint64) (phi, se []float64, err error) {
	d := g.p.n()
	if d == 1 {
		return []float64{g.full - g.empty}, []float64{0}, nil
	}
	rng := rand.New(rand.NewPCG(seed, 4))
	order := make([]int, perms*d)
	for q := 0; q < perms; q += 2 {
		o, rev := order[q*d:(q+1)*d], order[(q+1)*d:(q+2)*d]
		for i := range o {
			o[i] = i
		}
		rng.Shuffle(d, func(i, j int) { o[i], o[j] = o[j], o[i] })
		for i := range rev {
			rev[i] = o[d-1-i]
		}
	}
	// Coalition (q, t), t = 1..d−1, holds the first t players of ordering q.
	vals, err := g.e.coalitionValues(g.p, g.bg, perms*(d-1), func(c int, on []bool) {
		q, t := c/(d-1), c%(d-1)+1
		for _, i := range order[q*d : q*d+t] {
			on[i] = true
		}
	})
	if err != nil {
		return nil, nil, err
	}
	// psi[j] holds the marginal contributions of pair j, the mean of an
	// ordering's and its reverse's.
	pairs := perms / 2
	psi := make([]float64, pairs*d)
	phi = make([]float64, d)
	for j := 0; j < pairs; j++ {
		pj := psi[j*d : (j+1)*d]
		for q := 2 * j; q < 2*j+2; q++ {
			prev := g.empty
			for t := 1; t <= d; t++ {
				cur := g.full
				if t < d {
					cur = vals[q*(d-1)+t-1]
				}
				pj[order[q*d+t-1]] += (cur - prev) / 2
				prev = cur
			}
		}
		for i, v := range pj {
			phi[i] += v
		}
	}
	se = make([]float64, d)
	for i := range phi {
		phi[i] /= float64(pairs)
		ss := 0.0
		for j := 0; j < pairs; j++ {
			dv := psi[j*d+i] - phi[i]
			ss += dv * dv
		}
		se[i] = math.Sqrt(ss / float64(pairs-1) / float64(pairs))
	}
	return phi, se, nil
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
