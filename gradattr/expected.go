package gradattr

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
)

// Expected-gradients defaults.
const (
	// DefaultDraws is the number of (baseline, α) draws.
	DefaultDraws = 200
	// DefaultExpectedTolerance is the relative completeness gap expected
	// gradients is judged by. Its attributions are complete only in
	// expectation, and the Monte Carlo error shrinks as 1/√draws, so the
	// default is looser than DefaultTolerance.
	DefaultExpectedTolerance = 0.05
)

// Draw is one term of expected gradients: the index of the reference sample
// used as baseline, and the position α ∈ [0, 1] on the path.
type Draw struct {
	Reference int     `json:"reference"`
	Alpha     float64 `json:"alpha"`
}

// ExpectedGradientsOptions configures ExpectedGradients. The zero value
// (with a Reference set, which is required) means 200 draws from seed 0,
// tolerance 0.05, batches of 64.
type ExpectedGradientsOptions struct {
	// Reference is the reference set the baselines are drawn from, one
	// sample per row. Required.
	Reference [][]float64
	// Samples is the number of draws; 0 means DefaultDraws (or len(Draws)).
	Samples int
	// Seed seeds the PCG generator of the draws.
	Seed uint64
	// Draws, when set, replaces the random draws: Samples defaults to
	// len(Draws) and may not exceed it.
	Draws []Draw
	// Tolerance judges completeness; 0 means DefaultExpectedTolerance.
	Tolerance float64
	// BatchSize is the number of draws per model call; 0 means
	// DefaultBatchSize.
	BatchSize int
}

// ExpectedGradients attributes output target of m at x by integrated
// gradients averaged over baselines drawn from a reference set D (Erion,
// Janizek, Sturmfels, Lundberg & Lee 2021, "Improving performance of deep
// learning models with axiomatic attribution priors and expected
// gradients": the definition and its Monte Carlo estimate):
//
//	φ_i = E_{x′~D, α~U(0,1)} [ (x_i − x′_i) · ∂F(x′ + α(x − x′))/∂x_i ]
//	    ≈ (1/k) Σ_{d=1..k} (x_i − x′_d,i) · ∂F(x′_d + α_d(x − x′_d))/∂x_i
//
// Each draw takes a reference sample uniformly with replacement
// (rand.IntN) and then α (rand.Float64) from math/rand/v2's PCG seeded by
// (Seed, 2). In expectation the attributions sum to F(x) − E_{x′~D} F(x′),
// so completeness is checked against the mean output over the whole
// reference set (one forward pass per reference sample), which is
// BaselineOutput.
func ExpectedGradients(ctx context.Context, m Model, x []float64, target int, opt ExpectedGradientsOptions) (*Result, error) {
	n := opt.Samples
	switch {
	case n < 0 || n > MaxSamplesLimit:
		return nil, fmt.Errorf("%w: expected gradients samples %d, want 0 (default) or 1..%d", ErrOptions, n, MaxSamplesLimit)
	case n == 0 && opt.Draws != nil:
		n = len(opt.Draws)
	case n == 0:
		n = DefaultDraws
	}
	if opt.Draws != nil && n > len(opt.Draws) {
		return nil, fmt.Errorf("%w: expected gradients asked for %d samples but %d draws were given", ErrOptions, n, len(opt.Draws))
	}
	if n == 0 {
		return nil, fmt.Errorf("%w: expected gradients needs at least one draw", ErrOptions)
	}
	tol := opt.Tolerance
	if tol == 0 {
		tol = DefaultExpectedTolerance
	}
	if _, err := tolerance(tol); err != nil {
		return nil, err
	}
	if len(opt.Reference) == 0 {
		return nil, fmt.Errorf("%w: expected gradients needs a reference set, got none", ErrInput)
	}
	e, err := newEngine(ctx, m, x, target, opt.BatchSize)
	if err != nil {
		return nil, err
	}
	if n > MaxEvaluations/e.size {
		return nil, fmt.Errorf("%w: expected gradients %d draws × %d features exceeds %d gradient values", ErrOptions, n, e.size, MaxEvaluations)
	}
	ref := opt.Reference
	for k, row := range ref {
		if err := checkSample(fmt.Sprintf("reference sample %d", k), row, e.shape, e.size); err != nil {
			return nil, err
		}
	}
	for k, d := range opt.Draws[:min(n, len(opt.Draws))] {
		if d.Reference < 0 || d.Reference >= len(ref) {
			return nil, fmt.Errorf("%w: draw %d uses reference sample %d, the set has %d", ErrInput, k, d.Reference, len(ref))
		}
		if !(d.Alpha >= 0 && d.Alpha <= 1) {
			return nil, fmt.Errorf("%w: draw %d has α = %v, want 0 ≤ α ≤ 1", ErrInput, k, d.Alpha)
		}
	}

	meanBase := 0.0
	err = e.forward(len(ref), func(k int, dst []float64) { copy(dst, ref[k]) },
		func(_ int, out []float64) { meanBase += out[e.target] })
	if err != nil {
		return nil, err
	}
	meanBase /= float64(len(ref))

	rng := rand.New(rand.NewPCG(opt.Seed, 2))
	draws := make([]Draw, e.batch) // the draws of the chunk in flight
	fill := func(k int, dst []float64) {
		d := Draw{}
		if opt.Draws != nil {
			d = opt.Draws[k]
		} else {
			d.Reference = rng.IntN(len(ref))
			d.Alpha = rng.Float64()
		}
		draws[k%e.batch] = d
		xb := ref[d.Reference]
		for i := range dst {
			dst[i] = xb[i] + d.Alpha*(x[i]-xb[i])
		}
	}
	attr := make([]float64, e.size)
	use := func(k int, _, grad []float64) {
		xb := ref[draws[k%e.batch].Reference]
		for i, g := range grad {
			attr[i] += (x[i] - xb[i]) * g
		}
	}
	if err := e.gradients(n, fill, use); err != nil {
		return nil, err
	}
	for i := range attr {
		attr[i] /= float64(n)
	}
	s := Settings{Method: MethodExpectedGradients, Samples: n, Seed: opt.Seed, Tolerance: tol,
		BatchSize: e.batch, References: len(ref), CallerNoise: opt.Draws != nil}
	if opt.Draws != nil {
		s.Seed = 0
	}
	r := e.result(attr, s)
	r.BaselineOutput = meanBase
	r.Completeness = completeness(attr, r.Output, meanBase, tol, true)
	if math.IsNaN(r.Completeness.RelativeGap) {
		r.Completeness.OK = false
	}
	return r, nil
}
