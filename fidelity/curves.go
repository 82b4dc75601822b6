package fidelity

import (
	"context"
	"fmt"
	"math/rand/v2"
	"slices"

	"github.com/apportion/apportion/gradattr"
)

// CurveOptions set how deletion and insertion curves are drawn.
type CurveOptions struct {
	// Baseline is what a removed feature is replaced by; nil is zero.
	Baseline []float64
	// Groups, when given, are removed and inserted whole (image patches,
	// superpixels, the fields of a one-hot encoding), ordered by the sum of
	// their attributions; nil is one unit per feature.
	Groups []gradattr.Group
	// Steps is the number of steps from nothing removed to everything
	// removed; 0 or more than the number of units is one unit per step.
	Steps int
}

// Curve is the target output as units are removed (deletion) or inserted
// (insertion), Petsiuk, Das & Saenko 2018 ("RISE"), §4.
type Curve struct {
	// Fractions[k] is the share of units removed or inserted at step k,
	// from 0 to 1.
	Fractions []float64 `json:"fractions"`
	// Outputs[k] is the target output at step k.
	Outputs []float64 `json:"outputs"`
	// Area is the area under the curve over the fractions (trapezoid
	// rule).
	Area float64 `json:"area"`
}

// Order returns the units (groups, or features for nil groups) by
// decreasing attribution, summed over a group's features; ties keep the
// units' order.
func Order(attr []float64, groups []gradattr.Group) ([]int, error) {
	u, err := units(len(attr), groups)
	if err != nil {
		return nil, err
	}
	score := make([]float64, len(u))
	for g, idx := range u {
		for _, i := range idx {
			score[g] += attr[i]
		}
	}
	order := make([]int, len(u))
	for i := range order {
		order[i] = i
	}
	slices.SortStableFunc(order, func(a, b int) int {
		switch {
		case score[a] > score[b]:
			return -1
		case score[a] < score[b]:
			return 1
		}
		return 0
	})
	return order, nil
}

// Deletion returns the deletion curve of output target of m at x when the
// units are replaced by the baseline in the order of attr, most positive
// first: a faithful attribution makes the output fall fast, for a small
// area (Petsiuk et al. 2018).
func Deletion(ctx context.Context, m gradattr.Model, x []float64, target int, attr []float64, opt CurveOptions) (Curve, error) {
	order, err := Order(attr, opt.Groups)
	if err != nil {
		return Curve{}, err
	}
	return curve(ctx, m, x, target, order, opt, false)
}

// Insertion returns the insertion curve: starting from the baseline, the
// units of x are put back in the order of attr; a faithful attribution
// makes the output rise fast, for a large area (Petsiuk et al. 2018).
func Insertion(ctx context.Context, m gradattr.Model, x []float64, target int, attr []float64, opt CurveOptions) (Curve, error) {
	order, err := Order(attr, opt.Groups)
	if err != nil {
		return Curve{}, err
	}
	return curve(ctx, m, x, target, order, opt, true)
}

// RandomCurves draws n random orders of the units from a PCG generator
// seeded by (seed, stream) and returns the deletion and insertion curves
// of each: the reference a method's curves are read against.
func RandomCurves(ctx context.Context, m gradattr.Model, x []float64, target int, opt CurveOptions, n int, seed, stream uint64) (deletion, insertion []Curve, err error) {
	u, err := units(len(x), opt.Groups)
	if err != nil {
		return nil, nil, err
	}
	if n < 1 {
		return nil, nil, fmt.Errorf("%w: %d random orders, want at least 1", ErrOptions, n)
	}
	rng := rand.New(rand.NewPCG(seed, stream))
	for k := 0; k < n; k++ {
		order := rng.Perm(len(u))
		d, err := curve(ctx, m, x, target, order, opt, false)
		if err != nil {
			return nil, nil, err
		}
		in, err := curve(ctx, m, x, target, order, opt, true)
		if err != nil {
			return nil, nil, err
		}
		deletion, insertion = append(deletion, d), append(insertion, in)
	}
	return deletion, insertion, nil
}

// curve evaluates the target output as the units are removed (or, with
// insert, put back into the baseline) in order.
func curve(ctx context.Context, m gradattr.Model, x []float64, target int, order []int, opt CurveOptions, insert bool) (Curve, error) {
	u, err := units(len(x), opt.Groups)
	if err != nil {
		return Curve{}, err
	}
	base := opt.Baseline
	if base == nil {
		base = make([]float64, len(x))
	}
	if err := checkVector("the baseline", base, len(x)); err != nil {
		return Curve{}, err
	}
	e, err := newEvaluator(ctx, m, target)
	if err != nil {
		return Curve{}, err
	}
	if e.size != len(x) {
		return Curve{}, fmt.Errorf("%w: the sample has %d values, the model expects %d", ErrInput, len(x), e.size)
	}
	steps := opt.Steps
	if steps <= 0 || steps > len(u) {
		steps = len(u)
	}
	// counts[k] units are moved at step k: ⌊k·U/steps⌋, so every step
	// moves ⌊U/steps⌋ or ⌈U/steps⌉ of them.
	counts := make([]int, steps+1)
	c := Curve{Fractions: make([]float64, steps+1), Outputs: make([]float64, steps+1)}
	for k := range counts {
		counts[k] = k * len(u) / steps
		c.Fractions[k] = float64(counts[k]) / float64(len(u))
	}
	from, to := x, base
	if insert {
		from, to = base, x
	}
	fill := func(k int, dst []float64) {
		copy(dst, from)
		for _, g := range order[:counts[k]] {
			for _, i := range u[g] {
				dst[i] = to[i]
			}
		}
	}
	if err := e.outputs(steps+1, fill, c.Outputs); err != nil {
		return Curve{}, err
	}
	c.Area = area(c.Fractions, c.Outputs)
	return c, nil
}

// area integrates y over x by the trapezoid rule.
func area(x, y []float64) float64 {
	s := 0.0
	for k := 1; k < len(x); k++ {
		s += (x[k] - x[k-1]) * (y[k] + y[k-1]) / 2
	}
	return s
}
