package gradattr

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"

	"gonum.org/v1/gonum/mat"
)

// Surrogate defaults.
const (
	// DefaultKernelWidth is the width W of the surrogate's proximity
	// kernel on the normalised distance (see Surrogate): 0.75, which is
	// the common width 0.75·√d on the unnormalised distance (common
	// practice, a value from memory).
	DefaultKernelWidth = 0.75
	// DefaultRidge is the surrogate's ridge penalty λ on the kernel-weighted
	// mean squared error (see Surrogate): light, so that it mostly keeps the
	// system solvable when few coalitions are drawn. It shrinks a
	// coefficient by about λ / Var_π(z_i), well under a percent for
	// players switched on about half the time (Hoerl & Kennard 1970 for
	// the shrinkage; the value is a choice, not a published one).
	DefaultRidge = 1e-3
)

// SurrogateOptions configures Surrogate. The zero value means: one zero
// baseline, 2048 coalitions, kernel width 0.75, ridge 0.001, seed 0,
// every feature a player, batches of DefaultForwardBatch rows.
type SurrogateOptions struct {
	// Baselines are where a player that is switched off takes its values
	// from; nil means one zero baseline. With several, a coalition's value
	// is the mean over them.
	Baselines []Baseline
	// Coalitions is the number of coalitions the surrogate is fitted to,
	// the sample itself and the all-off coalition included; 0 means
	// DefaultCoalitions.
	Coalitions int
	// KernelWidth is W; 0 means DefaultKernelWidth.
	KernelWidth float64
	// Ridge is λ; 0 means DefaultRidge.
	Ridge float64
	// Seed seeds the sampled coalitions.
	Seed uint64
	// Groups, when set, are the players: they must partition the
	// features. Each group's coefficient is spread evenly over its
	// features in Result.Attributions and reported whole in
	// Result.Groups.
	Groups []Group
	// BatchSize is the number of rows per model call; 0 means
	// DefaultForwardBatch.
	BatchSize int
}

// SurrogateFit describes the local surrogate model behind a Result.
type SurrogateFit struct {
	// Intercept is β₀, the surrogate's value with every player off.
	Intercept float64 `json:"intercept"`
	// Fidelity is the kernel-weighted R² of the surrogate on the
	// coalitions it was fitted to: 1 − Σπ(v − ŷ)² / Σπ(v − v̄)² (1 when
	// the model's value does not vary).
	Fidelity float64 `json:"fidelity"`
}

// Surrogate attributes output target of m at x by a local linear surrogate
// (Ribeiro, Singh & Guestrin 2016, "Why should I trust you?", §3):
// interpretable binary features z ∈ {0, 1}^d, one per player (a feature,
// or a group of opt.Groups), where z_i = 1 keeps the sample's values and
// z_i = 0 replaces them by the baseline's. The value of a coalition is
//
//	v(z) = (1/B) Σ_b f(x_z, x′_b,z̄)
//
// over the B baselines. The surrogate is fitted to the sample itself
// (z = 1), the all-off coalition (z = 0) and Coalitions − 2 coalitions
// drawn around the sample as in §3.3 (the number of players kept uniform
// in 1..d−1, then which ones uniformly; math/rand/v2's PCG seeded by
// (Seed, 6)), each weighted by the exponential kernel of §3.4 on its
// distance from the sample,
//
//	π(z) = exp(−D(z)² / W²),  D(z) = ‖1 − z‖₂ / √d = √((d − |z|) / d),
//
// by weighted ridge regression with an unpenalised intercept, the squared
// error averaged with the kernel's weights so that λ means the same
// whatever the number of coalitions and the kernel width:
//
//	min_β Σ π(z) (v(z) − β₀ − Σ_i β_i z_i)² / Σ π(z) + λ Σ_i β_i²
//
// The attributions are the coefficients β_i; Result.Surrogate has β₀ and
// the fidelity. As λ → 0 the coefficients of a linear model are
// w_i(x_i − x′_i) exactly. Completeness, Σ β_i against f(x) − v(0), is
// reported but not judged: the surrogate does not promise it.
func Surrogate(ctx context.Context, m Model, x []float64, target int, opt SurrogateOptions) (*Result, error) {
	n, err := countOption("coalitions", opt.Coalitions, DefaultCoalitions, 4, MaxCoalitions)
	if err != nil {
		return nil, err
	}
	width := opt.KernelWidth
	if width == 0 {
		width = DefaultKernelWidth
	}
	if !(width > 0) || math.IsInf(width, 0) {
		return nil, fmt.Errorf("%w: kernel width %v, want a finite value > 0", ErrOptions, width)
	}
	ridge := opt.Ridge
	if ridge == 0 {
		ridge = DefaultRidge
	}
	if !(ridge > 0) || math.IsInf(ridge, 0) {
		return nil, fmt.Errorf("%w: ridge %v, want a finite value > 0", ErrOptions, ridge)
	}
	e, err := newEngine(ctx, m, x, target, forwardBatch(opt.BatchSize))
	if err != nil {
		return nil, err
	}
	p, err := newPlayers(e.size, opt.Groups)
	if err != nil {
		return nil, err
	}
	bg, specs, err := e.baselines(opt.Baselines)
	if err != nil {
		return nil, err
	}
	if err := e.checkRows("surrogate", (n-2)*len(bg)+len(bg)); err != nil {
		return nil, err
	}
	d := p.n()
	s := Settings{Method: MethodSurrogate, Coalitions: n, KernelWidth: width, Ridge: ridge, Seed: opt.Seed,
		BatchSize: e.batch, Baselines: describe(specs)}
	if opt.Groups != nil {
		s.Groups = len(opt.Groups)
	}

	base, err := e.meanOutputs(bg)
	if err != nil {
		return nil, err
	}
	if d == 1 {
		n = 2 // every coalition is one of the two
	}
	z := surroundings(n, d, opt.Seed)
	drawn, err := e.coalitionValues(p, bg, n-2, func(c int, on []bool) { copy(on, z[(c+2)*d:(c+3)*d]) })
	if err != nil {
		return nil, err
	}
	vals := append([]float64{e.outputs[e.target], base[e.target]}, drawn...)
	weights := make([]float64, n)
	for c := range weights {
		kept := 0
		for _, in := range z[c*d : (c+1)*d] {
			if in {
				kept++
			}
		}
		dist2 := float64(d-kept) / float64(d)
		weights[c] = math.Exp(-dist2 / (width * width))
	}
	beta, fit, err := weightedRidge(z, vals, weights, d, ridge)
	if err != nil {
		return nil, err
	}
	attr := p.spread(beta, e.size)
	r := e.result(attr, s)
	r.BaselineOutput = base[e.target]
	r.BaselineOutputs = base
	r.Surrogate = fit
	r.Completeness = completeness(attr, r.Output, r.BaselineOutput, 0, false)
	r.Groups = p.grouped(beta, nil, r.Completeness)
	return r, nil
}

// surroundings returns the n coalitions of d players the surrogate is
// fitted to, row-major: the sample (all on), the all-off coalition, and
// n − 2 drawn around the sample (see Surrogate).
func surroundings(n, d int, seed uint64) []bool {
	z := make([]bool, n*d)
	for i := 0; i < d; i++ {
		z[i] = true
	}
	rng := rand.New(rand.NewPCG(seed, 6))
	perm := make([]int, d)
	for c := 2; c < n; c++ {
		k := 1 + rng.IntN(d-1)
		for i := range perm {
			perm[i] = i
		}
		for i := 0; i < k; i++ {
			j := i + rng.IntN(d-i)
			perm[i], perm[j] = perm[j], perm[i]
		}
		row := z[c*d : (c+1)*d]
		for _, i := range perm[:k] {
			row[i] = true
		}
	}
	return z
}

// baselines builds the baselines of specs (one zero baseline for none) for
// the engine's sample.
func (e *engine) baselines(specs []Baseline) ([][]float64, []Baseline, error) {
	if len(specs) == 0 {
		specs = []Baseline{{}}
	}
	if len(specs) > MaxSamplesLimit {
		return nil, nil, fmt.Errorf("%w: %d baselines, at most %d", ErrOptions, len(specs), MaxSamplesLimit)
	}
	rows := make([][]float64, len(specs))
	for b, spec := range specs {
		var err error
		if rows[b], err = spec.Build(e.x, e.shape); err != nil {
			return nil, nil, fmt.Errorf("baseline %d: %w", b, err)
		}
	}
	return rows, specs, nil
}

// weightedRidge fits v ≈ β₀ + zᵀβ to n rows of d binary regressors z
// (row-major) with weights π, minimising Σπ(v − β₀ − zᵀβ)²/Σπ + λ‖β‖²
// (β₀ unpenalised): with weighted means z̄ and v̄,
//
//	(Σ π (z − z̄)(z − z̄)ᵀ + λ Σπ I) β = Σ π (z − z̄)(v − v̄),  β₀ = v̄ − z̄ᵀβ
func weightedRidge(z []bool, v, w []float64, d int, lambda float64) ([]float64, *SurrogateFit, error) {
	n := len(v)
	total, vbar := 0.0, 0.0
	zbar := make([]float64, d)
	for c := 0; c < n; c++ {
		total += w[c]
		vbar += w[c] * v[c]
		for i, in := range z[c*d : (c+1)*d] {
			if in {
				zbar[i] += w[c]
			}
		}
	}
	vbar /= total
	for i := range zbar {
		zbar[i] /= total
	}
	// Rows √π (z − z̄), so that XᵀX is the weighted scatter.
	xm := mat.NewDense(n, d, nil)
	rhs := mat.NewVecDense(d, nil)
	for c := 0; c < n; c++ {
		sw := math.Sqrt(w[c])
		for i, in := range z[c*d : (c+1)*d] {
			zc := -zbar[i]
			if in {
				zc++
			}
			xm.Set(c, i, sw*zc)
			rhs.SetVec(i, rhs.AtVec(i)+w[c]*zc*(v[c]-vbar))
		}
	}
	a := mat.NewSymDense(d, nil)
	a.SymOuterK(1, xm.T())
	for i := 0; i < d; i++ {
		a.SetSym(i, i, a.At(i, i)+lambda*total)
	}
	var chol mat.Cholesky
	if !chol.Factorize(a) {
		return nil, nil, fmt.Errorf("%w: the surrogate's ridge system is not positive definite (ridge %v)", ErrOptions, lambda)
	}
	var sol mat.VecDense
	if err := chol.SolveVecTo(&sol, rhs); err != nil {
		return nil, nil, fmt.Errorf("%w: the surrogate's ridge system is singular (ridge %v)", ErrOptions, lambda)
	}
	beta := make([]float64, d)
	b0 := vbar
	for i := range beta {
		beta[i] = sol.AtVec(i)
		b0 -= zbar[i] * beta[i]
	}
	res, tot := 0.0, 0.0
	for c := 0; c < n; c++ {
		pred := b0
		for i, in := range z[c*d : (c+1)*d] {
			if in {
				pred += beta[i]
			}
		}
		res += w[c] * (v[c] - pred) * (v[c] - pred)
		tot += w[c] * (v[c] - vbar) * (v[c] - vbar)
	}
	fid := 1.0
	if tot > 0 {
		fid = 1 - res/tot
	}
	return beta, &SurrogateFit{Intercept: b0, Fidelity: fid}, nil
}
