package gradattr

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
)

// SmoothGrad defaults (Smilkov et al. 2017 recommend a noise level of
// 10%–20% and report that n = 50 copies suffice).
const (
	DefaultNoise   = 0.15
	DefaultSamples = 50
)

// Variant selects how SmoothGrad aggregates the gradients of the noisy
// copies.
type Variant int

// The SmoothGrad aggregates. The zero value is the paper's mean.
const (
	// VariantMean is the mean gradient (Smilkov et al. 2017).
	VariantMean Variant = iota
	// VariantSquared is the mean of the squared gradients, SmoothGrad-Squared
	// (Hooker et al. 2019, "A benchmark for interpretability methods in deep
	// neural networks").
	VariantSquared
	// VariantVariance is the variance of the gradients over the copies,
	// VarGrad (Adebayo et al. 2018, "Local explanation methods for deep
	// neural networks lack sensitivity to parameter values"), with the
	// population normalisation 1/n.
	VariantVariance
)

// String returns "mean", "squared" or "variance".
func (v Variant) String() string {
	switch v {
	case VariantMean:
		return "mean"
	case VariantSquared:
		return "squared"
	case VariantVariance:
		return "variance"
	}
	return fmt.Sprintf("Variant(%d)", int(v))
}

// ParseVariant is the inverse of Variant.String.
func ParseVariant(s string) (Variant, error) {
	for v := VariantMean; v <= VariantVariance; v++ {
		if v.String() == s {
			return v, nil
		}
	}
	return 0, fmt.Errorf("%w: SmoothGrad variant %q, want mean, squared or variance", ErrOptions, s)
}

// SmoothGradOptions configures SmoothGrad. The zero value means 50 copies
// with noise level 0.15, the mean variant, seed 0, batches of 64.
type SmoothGradOptions struct {
	// Samples is the number n of noisy copies; 0 means DefaultSamples.
	Samples int
	// Noise is the noise level σ/(max_i x_i − min_i x_i); 0 means
	// DefaultNoise. Ignored when Sigma is set.
	Noise float64
	// Sigma, when set, gives σ per feature (len = features, each ≥ 0)
	// instead of deriving one σ from Noise.
	Sigma []float64
	// Variant selects the aggregate; the zero value is the mean.
	Variant Variant
	// TimesInput multiplies the aggregate by x element-wise (Smilkov et al.
	// 2017 combine SmoothGrad with gradient×input this way).
	TimesInput bool
	// Seed seeds the PCG generator that draws ε. The same seed gives the
	// same bits.
	Seed uint64
	// Perturbations, when set, are the ε of the copies, one row of
	// len = features per copy, used as they are (already scaled by σ).
	// Samples then defaults to len(Perturbations) and may not exceed it.
	Perturbations [][]float64
	// NoiseFunc, when set, writes the ε of copy i into eps (already scaled);
	// it is called once per copy, in order. Perturbations takes precedence.
	NoiseFunc func(i int, eps []float64)
	// BatchSize is the number of copies per model call; 0 means
	// DefaultBatchSize.
	BatchSize int
}

// SmoothGrad averages the gradient over n noisy copies of the sample
// (Smilkov, Thorat, Kim, Viégas & Wattenberg 2017):
//
//	M̂_i(x) = (1/n) Σ_{k=1..n} ∂F(x + ε_k)/∂x_i,   ε_k ~ N(0, σ²I)
//	σ = noise · (max_j x_j − min_j x_j)              (noise level)
//
// The squared variant averages (∂F/∂x_i)² (Hooker et al. 2019), the
// variance variant takes (1/n) Σ_k (∂F(x+ε_k)/∂x_i − M̂_i)² (Adebayo et al.
// 2018, VarGrad; Welford's update, in copy order). ε is drawn with
// math/rand/v2's PCG seeded by (Seed, 0) and NormFloat64, copy by copy,
// feature by feature, or taken from Perturbations or NoiseFunc. The result
// has no Completeness.
func SmoothGrad(ctx context.Context, m Model, x []float64, target int, opt SmoothGradOptions) (*Result, error) {
	if opt.Variant < VariantMean || opt.Variant > VariantVariance {
		return nil, fmt.Errorf("%w: SmoothGrad variant %d, want mean (0), squared (1) or variance (2)", ErrOptions, int(opt.Variant))
	}
	if opt.Noise < 0 || math.IsNaN(opt.Noise) || math.IsInf(opt.Noise, 0) {
		return nil, fmt.Errorf("%w: SmoothGrad noise %v, want a finite level ≥ 0 (0 means %v)", ErrOptions, opt.Noise, DefaultNoise)
	}
	n := opt.Samples
	switch {
	case n < 0 || n > MaxSamplesLimit:
		return nil, fmt.Errorf("%w: SmoothGrad samples %d, want 0 (default) or 1..%d", ErrOptions, n, MaxSamplesLimit)
	case n == 0 && opt.Perturbations != nil:
		n = len(opt.Perturbations)
	case n == 0:
		n = DefaultSamples
	}
	if opt.Perturbations != nil && n > len(opt.Perturbations) {
		return nil, fmt.Errorf("%w: SmoothGrad asked for %d samples but %d perturbations were given", ErrOptions, n, len(opt.Perturbations))
	}
	if n == 0 {
		return nil, fmt.Errorf("%w: SmoothGrad needs at least one sample", ErrOptions)
	}
	e, err := newEngine(ctx, m, x, target, opt.BatchSize)
	if err != nil {
		return nil, err
	}
	if n > MaxEvaluations/e.size {
		return nil, fmt.Errorf("%w: SmoothGrad %d samples × %d features exceeds %d gradient values", ErrOptions, n, e.size, MaxEvaluations)
	}
	for k, row := range opt.Perturbations[:min(n, len(opt.Perturbations))] {
		if err := checkSample(fmt.Sprintf("perturbation %d", k), row, e.shape, e.size); err != nil {
			return nil, err
		}
	}

	s := Settings{Method: MethodSmoothGrad, Samples: n, Variant: opt.Variant.String(),
		TimesInput: opt.TimesInput, BatchSize: e.batch, Seed: opt.Seed}
	sigma := make([]float64, e.size)
	callerNoise := opt.Perturbations != nil || opt.NoiseFunc != nil
	switch {
	case callerNoise:
		s.CallerNoise = true
		s.Seed = 0
	case opt.Sigma != nil:
		if len(opt.Sigma) != e.size {
			return nil, fmt.Errorf("%w: SmoothGrad sigma has %d values, want one per feature (%d)", ErrOptions, len(opt.Sigma), e.size)
		}
		for i, v := range opt.Sigma {
			if v < 0 || math.IsNaN(v) || math.IsInf(v, 0) {
				return nil, fmt.Errorf("%w: SmoothGrad sigma[%d] = %v, want a finite σ ≥ 0", ErrOptions, i, v)
			}
		}
		copy(sigma, opt.Sigma)
		s.Sigma = append([]float64(nil), opt.Sigma...)
	default:
		noise := opt.Noise
		if noise == 0 {
			noise = DefaultNoise
		}
		s.Noise = noise
		lo, hi := x[0], x[0]
		for _, v := range x {
			lo, hi = math.Min(lo, v), math.Max(hi, v)
		}
		for i := range sigma {
			sigma[i] = noise * (hi - lo)
		}
	}

	rng := rand.New(rand.NewPCG(opt.Seed, 0))
	var fillErr error
	fill := func(k int, dst []float64) {
		switch {
		case opt.Perturbations != nil:
			for i, eps := range opt.Perturbations[k] {
				dst[i] = x[i] + eps
			}
		case opt.NoiseFunc != nil:
			clear(dst)
			if fillErr == nil {
				fillErr = callNoise(opt.NoiseFunc, k, dst)
			}
			for i := range dst {
				if math.IsNaN(dst[i]) || math.IsInf(dst[i], 0) {
					if fillErr == nil {
						fillErr = fmt.Errorf("%w: NoiseFunc gave %v for copy %d, feature %d", ErrInput, dst[i], k, i)
					}
					dst[i] = 0
				}
				dst[i] += x[i]
			}
		default:
			for i := range dst {
				dst[i] = x[i] + sigma[i]*rng.NormFloat64()
			}
		}
	}
	mean := make([]float64, e.size)
	var m2 []float64
	if opt.Variant == VariantVariance {
		m2 = make([]float64, e.size)
	}
	use := func(k int, _, grad []float64) {
		switch opt.Variant {
		case VariantMean:
			for i, g := range grad {
				mean[i] += g
			}
		case VariantSquared:
			for i, g := range grad {
				mean[i] += g * g
			}
		case VariantVariance:
			// Welford 1962: running mean and sum of squared deviations.
			c := float64(k + 1)
			for i, g := range grad {
				d := g - mean[i]
				mean[i] += d / c
				m2[i] += d * (g - mean[i])
			}
		}
	}
	if err := e.gradients(n, fill, use); err != nil {
		return nil, err
	}
	if fillErr != nil {
		return nil, fillErr
	}
	attr := mean
	switch opt.Variant {
	case VariantMean, VariantSquared:
		for i := range attr {
			attr[i] /= float64(n)
		}
	case VariantVariance:
		for i := range attr {
			attr[i] = m2[i] / float64(n)
		}
	}
	if opt.TimesInput {
		for i := range attr {
			attr[i] *= x[i]
		}
	}
	return e.result(attr, s), nil
}

// callNoise runs the caller's noise function, turning a panic into an
// ErrInput error.
func callNoise(f func(int, []float64), k int, eps []float64) (err error) {
	defer recovered(&err, ErrInput, "NoiseFunc", fmt.Sprintf("on copy %d", k))
	f(k, eps)
	return nil
}
