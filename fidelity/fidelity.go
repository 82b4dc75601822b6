// Package fidelity scores attribution methods on a model and samples: how
// faithfully an attribution points at what the model uses (deletion and
// insertion curves against random orders, infidelity), how stable it is
// (max-sensitivity), whether it depends on the model at all (the
// model-parameter randomization test) and how often its completeness check
// passes. Every random draw comes from a PCG generator seeded by the
// caller, so the same seed gives the same bits.
//
// The metrics work on any gradattr.Model and any attribution, given as an
// Attributor; Assess runs them for the methods of gradattr's method table
// over many samples and reports each with its interval across samples.
package fidelity

import (
	"context"
	"errors"
	"fmt"
	"math"

	"github.com/apportion/apportion/gradattr"
)

// Sentinel errors. Every error the package returns wraps one of them or
// one of gradattr's.
var (
	// ErrInput reports a bad sample, attribution, baseline or group.
	ErrInput = errors.New("fidelity: invalid input")
	// ErrOptions reports a bad option value.
	ErrOptions = errors.New("fidelity: invalid options")
	// ErrModel reports a model that failed, panicked or returned values of
	// the wrong length or non-finite values.
	ErrModel = errors.New("fidelity: model failed")
)

// Attributor computes the attributions of output target of m at x, one
// value per feature. Method makes one from gradattr's method table; a test
// control (the input itself, a constant) is a function of its own.
type Attributor func(ctx context.Context, m gradattr.Model, x []float64, target int) ([]float64, error)

// Method returns the Attributor that runs o with gradattr.Attribute.
func Method(o gradattr.Options) Attributor {
	return func(ctx context.Context, m gradattr.Model, x []float64, target int) ([]float64, error) {
		r, err := gradattr.Attribute(ctx, m, x, target, o)
		if err != nil {
			return nil, err
		}
		return r.Attributions, nil
	}
}

// maxBatch is the number of points per model call.
const maxBatch = 64

// evaluator sends points to a model in batches and reads one output per
// point, recovering a panic of the model.
type evaluator struct {
	ctx    context.Context
	m      gradattr.Model
	size   int // features per sample
	nout   int // outputs per sample
	target int
}

func newEvaluator(ctx context.Context, m gradattr.Model, target int) (*evaluator, error) {
	if m == nil {
		return nil, fmt.Errorf("%w: nil model", ErrModel)
	}
	e := &evaluator{ctx: ctx, m: m, target: target}
	err := safe("describing the model", func() error {
		e.size, e.nout = 1, m.OutputSize()
		for _, d := range m.InputShape() {
			e.size *= d
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	if e.nout <= 0 || target < 0 || target >= e.nout {
		return nil, fmt.Errorf("%w: target %d, the model has outputs 0..%d", ErrInput, target, e.nout-1)
	}
	return e, nil
}

// outputs evaluates the target output at n points, fill(i, dst) writing
// point i, into dst[0:n].
func (e *evaluator) outputs(n int, fill func(i int, dst []float64), dst []float64) error {
	buf := make([]float64, min(n, maxBatch)*e.size)
	for lo := 0; lo < n; lo += maxBatch {
		k := min(maxBatch, n-lo)
		pts := buf[:k*e.size]
		for j := 0; j < k; j++ {
			fill(lo+j, pts[j*e.size:(j+1)*e.size])
		}
		var out []float64
		if err := e.ctx.Err(); err != nil {
			return err
		}
		err := safe("running the model", func() (err error) {
			out, err = e.m.Forward(e.ctx, pts, k)
			return err
		})
		if err != nil {
			if cerr := e.ctx.Err(); cerr != nil {
				return cerr
			}
			if !errors.Is(err, ErrModel) {
				err = fmt.Errorf("%w: %w", ErrModel, err)
			}
			return err
		}
		if len(out) != k*e.nout {
			return fmt.Errorf("%w: the model returned %d values for %d samples, want %d", ErrModel, len(out), k, k*e.nout)
		}
		for j := 0; j < k; j++ {
			v := out[j*e.nout+e.target]
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return fmt.Errorf("%w: the model returned %v", ErrModel, v)
			}
			dst[lo+j] = v
		}
	}
	return nil
}

// one evaluates the target output at x.
func (e *evaluator) one(x []float64) (float64, error) {
	var v [1]float64
	err := e.outputs(1, func(_ int, dst []float64) { copy(dst, x) }, v[:])
	return v[0], err
}

// safe runs f, the package's one recovery point around code it does not
// own (the caller's model and attributors), turning a panic into an error
// wrapping ErrModel.
func safe(what string, f func() error) (err error) {
	defer func() {
		if p := recover(); p != nil {
			err = fmt.Errorf("%w: %s: panic: %v", ErrModel, what, p)
		}
	}()
	return f()
}

// attribute runs a on m at x and checks that it returns one finite value per
// feature.
func attribute(ctx context.Context, a Attributor, m gradattr.Model, x []float64, target int) ([]float64, error) {
	var attr []float64
	err := safe("computing the attribution", func() (err error) {
		attr, err = a(ctx, m, x, target)
		return err
	})
	if err != nil {
		return nil, err
	}
	if err := checkVector("the attribution", attr, len(x)); err != nil {
		return nil, err
	}
	return attr, nil
}

// checkVector checks that v has n finite values.
func checkVector(what string, v []float64, n int) error {
	if len(v) != n {
		return fmt.Errorf("%w: %s has %d values, want %d", ErrInput, what, len(v), n)
	}
	for i, f := range v {
		if math.IsNaN(f) || math.IsInf(f, 0) {
			return fmt.Errorf("%w: %s has %v at feature %d, want a finite number", ErrInput, what, f, i)
		}
	}
	return nil
}

// units returns the groups' indices, or one unit per feature for none,
// checking that every index is a feature.
func units(n int, groups []gradattr.Group) ([][]int, error) {
	if groups == nil {
		u := make([][]int, n)
		for i := range u {
			u[i] = []int{i}
		}
		return u, nil
	}
	if len(groups) == 0 {
		return nil, fmt.Errorf("%w: an empty list of groups", ErrInput)
	}
	if _, err := gradattr.Cover(n, groups); err != nil {
		return nil, fmt.Errorf("%w: %w", ErrInput, err)
	}
	u := make([][]int, len(groups))
	for g, grp := range groups {
		u[g] = grp.Indices
	}
	return u, nil
}
