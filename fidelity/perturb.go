package fidelity

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"

	"github.com/apportion/apportion/gradattr"
)

// Perturbation names the distribution of the perturbations I of
// infidelity.
type Perturbation string

// The perturbations.
const (
	// PerturbGaussian draws I_i ~ N(0, σ_i²) feature by feature (the
	// Gaussian perturbations of Yeh et al. 2019).
	PerturbGaussian Perturbation = "gaussian"
	// PerturbBaseline replaces a random subset S of the units (each in S
	// with probability ½) by the baseline: I = (x − x′) ⊙ 1_S. With S
	// every unit it is the completeness case of Yeh et al. 2019, where an
	// attribution that sums to f(x) − f(x′) has infidelity 0; subsets are
	// their square removal, for any units.
	PerturbBaseline Perturbation = "baseline"
)

// InfidelityOptions set the perturbations of Infidelity.
type InfidelityOptions struct {
	// Perturbation is the distribution of I; "" is PerturbGaussian.
	Perturbation Perturbation
	// Sigma is σ_i of PerturbGaussian, one per feature.
	Sigma []float64
	// Baseline is x′ of PerturbBaseline and of Shares; nil is zero.
	Baseline []float64
	// Shares says that the attribution apportions the output's change
	// f(x) − f(x′) among the features, in the output's units (integrated
	// gradients, gradient × input, Shapley values), rather than giving
	// the output's change per unit of each feature (a gradient). Its
	// first-order account of a perturbation I is then Σ_i I_i·Φ_i/(x_i −
	// x′_i), 0 for the features at the baseline: removing a set S of
	// features (I = (x − x′) ⊙ 1_S) predicts Σ_{i∈S} Φ_i.
	Shares bool
	// Groups are the units PerturbBaseline replaces; nil is one per
	// feature.
	Groups []gradattr.Group
	// Draws is the number of perturbations drawn (> 0).
	Draws int
	// Seed and Stream seed the PCG generator of the draws.
	Seed, Stream uint64
}

// Infidelity returns the Monte Carlo estimate, over opt.Draws
// perturbations I, of the infidelity of Yeh, Hsieh, Suggala, Inouye &
// Ravikumar 2019 ("On the (in)fidelity and sensitivity of explanations",
// §2),
//
//	INFD(Φ, f, x) = E_I[(Iᵀ Φ(x) − (f(x) − f(x − I)))²],
//
// with the attribution scaled by its best factor β and divided by the
// infidelity of the zero attribution:
//
//	min_β E[(β Iᵀ Φ − Δ)²] / E[Δ²] = 1 − E[Iᵀ Φ · Δ]² / (E[(Iᵀ Φ)²] E[Δ²]),  Δ = f(x) − f(x − I).
//
// β makes methods whose attributions differ only in scale compare (Yeh et
// al. scale the explanations so in their experiments; from memory), and the
// division makes it a share: 0 when the attribution's first-order account
// predicts every change, 1 when it predicts none better than nothing. It
// is 0 when every Δ is 0 and the account is too, 1 when only one of them
// is. With opt.Shares, Φ is read per unit of each feature (see
// InfidelityOptions.Shares).
func Infidelity(ctx context.Context, m gradattr.Model, x []float64, target int, attr []float64, opt InfidelityOptions) (float64, error) {
	if err := checkVector("the attribution", attr, len(x)); err != nil {
		return 0, err
	}
	if opt.Draws < 1 {
		return 0, fmt.Errorf("%w: %d draws, want at least 1", ErrOptions, opt.Draws)
	}
	e, err := newEvaluator(ctx, m, target)
	if err != nil {
		return 0, err
	}
	if e.size != len(x) {
		return 0, fmt.Errorf("%w: the sample has %d values, the model expects %d", ErrInput, len(x), e.size)
	}
	perturbations, err := drawPerturbations(x, opt)
	if err != nil {
		return 0, err
	}
	if opt.Shares {
		attr = perUnit(x, attr, opt.Baseline)
	}
	fx, err := e.one(x)
	if err != nil {
		return 0, err
	}
	out := make([]float64, opt.Draws)
	fill := func(k int, dst []float64) {
		for i, v := range x {
			dst[i] = v - perturbations[k][i]
		}
	}
	if err := e.outputs(opt.Draws, fill, out); err != nil {
		return 0, err
	}
	var pp, pd, dd float64 // Σ (IᵀΦ)², Σ IᵀΦ·Δ, Σ Δ²
	for k, in := range perturbations {
		p := dot(in, attr)
		d := fx - out[k]
		pp += p * p
		pd += p * d
		dd += d * d
	}
	switch {
	case dd == 0 && pp == 0:
		return 0, nil
	case dd == 0 || pp == 0:
		return 1, nil
	}
	return math.Max(0, 1-pd*pd/(pp*dd)), nil
}

// perUnit returns attr_i/(x_i − x′_i), 0 where x_i = x′_i.
func perUnit(x, attr, base []float64) []float64 {
	out := make([]float64, len(x))
	for i, a := range attr {
		d := x[i]
		if base != nil {
			d -= base[i]
		}
		if d != 0 {
			out[i] = a / d
		}
	}
	return out
}

// drawPerturbations draws the opt.Draws perturbations I of x.
func drawPerturbations(x []float64, opt InfidelityOptions) ([][]float64, error) {
	rng := rand.New(rand.NewPCG(opt.Seed, opt.Stream))
	out := make([][]float64, opt.Draws)
	switch opt.Perturbation {
	case "", PerturbGaussian:
		if err := checkVector("sigma", opt.Sigma, len(x)); err != nil {
			return nil, err
		}
		for k := range out {
			in := make([]float64, len(x))
			for i := range in {
				in[i] = opt.Sigma[i] * rng.NormFloat64()
			}
			out[k] = in
		}
	case PerturbBaseline:
		base := opt.Baseline
		if base == nil {
			base = make([]float64, len(x))
		}
		if err := checkVector("the baseline", base, len(x)); err != nil {
			return nil, err
		}
		u, err := units(len(x), opt.Groups)
		if err != nil {
			return nil, err
		}
		for k := range out {
			in := make([]float64, len(x))
			for _, idx := range u {
				if rng.Uint64()&1 == 0 {
					continue
				}
				for _, i := range idx {
					in[i] = x[i] - base[i]
				}
			}
			out[k] = in
		}
	default:
		return nil, fmt.Errorf("%w: perturbation %q, want gaussian or baseline", ErrOptions, opt.Perturbation)
	}
	return out, nil
}

// SensitivityOptions set the draws of MaxSensitivity.
type SensitivityOptions struct {
	// Radius is r_i, the half-width of the box around x the points are
	// drawn from, per feature.
	Radius []float64
	// Draws is the number of points drawn (> 0).
	Draws int
	// Seed and Stream seed the PCG generator of the draws.
	Seed, Stream uint64
}

// MaxSensitivity returns the Monte Carlo estimate of
//
//	SENS_max(Φ, f, x, r) = max_{‖y − x‖∞ ≤ r} ‖Φ(y) − Φ(x)‖₂ / ‖Φ(x)‖₂
//
// over opt.Draws points y drawn uniformly in the box |y_i − x_i| ≤ r_i:
// Yeh et al. 2019's max-sensitivity (§3), divided by ‖Φ(x)‖₂ so that methods
// whose attributions differ in scale compare. 0 is an attribution that
// does not move; 1 is a change as large as the attribution itself. attr
// is Φ(x); the attributions at y explain the same target.
func MaxSensitivity(ctx context.Context, a Attributor, m gradattr.Model, x []float64, target int, attr []float64, opt SensitivityOptions) (float64, error) {
	if err := checkVector("the attribution", attr, len(x)); err != nil {
		return 0, err
	}
	if err := checkVector("the radius", opt.Radius, len(x)); err != nil {
		return 0, err
	}
	if opt.Draws < 1 {
		return 0, fmt.Errorf("%w: %d draws, want at least 1", ErrOptions, opt.Draws)
	}
	norm := math.Sqrt(dot(attr, attr))
	rng := rand.New(rand.NewPCG(opt.Seed, opt.Stream))
	y := make([]float64, len(x))
	worst := 0.0
	for k := 0; k < opt.Draws; k++ {
		for i, v := range x {
			y[i] = v + opt.Radius[i]*(2*rng.Float64()-1)
		}
		ay, err := attribute(ctx, a, m, y, target)
		if err != nil {
			return 0, err
		}
		d := 0.0
		for i, v := range ay {
			d += (v - attr[i]) * (v - attr[i])
		}
		worst = math.Max(worst, math.Sqrt(d))
	}
	if norm == 0 {
		if worst == 0 {
			return 0, nil
		}
		return math.Inf(1), nil
	}
	return worst / norm, nil
}

func dot(a, b []float64) float64 {
	s := 0.0
	for i, v := range a {
		s += v * b[i]
	}
	return s
}
