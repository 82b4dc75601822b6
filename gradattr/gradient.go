package gradattr

import (
	"context"
	"math"
)

// GradientOptions configures Gradient. The zero value is the plain
// gradient.
type GradientOptions struct {
	// Absolute takes |∂F/∂x_i|, the saliency map of Simonyan et al. 2013
	// (§3), instead of the signed gradient.
	Absolute bool
}

// Gradient attributes output target of m at x by its gradient,
//
//	a_i = ∂F_target(x)/∂x_i          (Simonyan, Vedaldi & Zisserman 2013, §3)
//
// or its absolute value with opt.Absolute. target may be TargetTop. The
// gradient is a local sensitivity, not a share of the output, so the result
// has no Completeness.
func Gradient(ctx context.Context, m Model, x []float64, target int, opt GradientOptions) (*Result, error) {
	e, err := newEngine(ctx, m, x, target, 1)
	if err != nil {
		return nil, err
	}
	attr, err := e.gradientAt(x)
	if err != nil {
		return nil, err
	}
	if opt.Absolute {
		for i, g := range attr {
			attr[i] = math.Abs(g)
		}
	}
	return e.result(attr, Settings{Method: MethodGradient, Absolute: opt.Absolute}), nil
}

// GradientTimesInput attributes output target of m at x by
//
//	a_i = x_i · ∂F_target(x)/∂x_i    (Shrikumar et al. 2016, "Not just a black box")
//
// Completeness against the zero baseline, Σ a_i vs f(x) − f(0), is reported
// (one extra forward pass for f(0)) but not judged: it holds for linear
// models and, in general, not otherwise, so Completeness.Judged and
// Completeness.OK are false.
func GradientTimesInput(ctx context.Context, m Model, x []float64, target int) (*Result, error) {
	e, err := newEngine(ctx, m, x, target, 1)
	if err != nil {
		return nil, err
	}
	attr, err := e.gradientAt(x)
	if err != nil {
		return nil, err
	}
	for i := range attr {
		attr[i] *= x[i]
	}
	zero, err := e.forwardOne(make([]float64, e.size))
	if err != nil {
		return nil, err
	}
	r := e.result(attr, Settings{Method: MethodGradientTimesInput})
	r.BaselineOutput = zero[e.target]
	r.Completeness = completeness(attr, r.Output, r.BaselineOutput, 0, false)
	return r, nil
}

// gradientAt returns a fresh copy of the target gradient at one point.
func (e *engine) gradientAt(p []float64) ([]float64, error) {
	g := make([]float64, e.size)
	err := e.gradients(1, func(_ int, dst []float64) { copy(dst, p) },
		func(_ int, _, grad []float64) { copy(g, grad) })
	if err != nil {
		return nil, err
	}
	return g, nil
}
