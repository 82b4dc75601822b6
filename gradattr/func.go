package gradattr

import (
	"context"
	"fmt"
)

// Func is a Model built from plain Go functions, for closed forms: a known
// function with a known gradient, so that attribution methods can be checked
// against their analytic values.
//
// F writes the Outputs outputs of one sample x into out; Grad writes the
// gradient ∂F_k/∂x of output k at x into grad. Both get slices of exactly
// the right length, which they must not keep. A panic in either is turned
// into an error wrapping ErrModel.
type Func struct {
	// Shape is the shape of one sample.
	Shape []int
	// Outputs is the number of outputs per sample.
	Outputs int
	// F evaluates the outputs of one sample.
	F func(out, x []float64)
	// Grad evaluates the gradient of output k at one sample.
	Grad func(grad, x []float64, k int)
}

// InputShape returns a copy of f.Shape.
func (f *Func) InputShape() []int { return append([]int(nil), f.Shape...) }

// OutputSize returns f.Outputs.
func (f *Func) OutputSize() int { return f.Outputs }

func (f *Func) check(x []float64, n int) (size int, err error) {
	if f.F == nil {
		return 0, fmt.Errorf("%w: Func has no F", ErrModel)
	}
	if f.Outputs <= 0 {
		return 0, fmt.Errorf("%w: Func.Outputs is %d, want > 0", ErrModel, f.Outputs)
	}
	size, err = shapeSize(f.Shape)
	if err != nil {
		return 0, err
	}
	if n < 0 || len(x) != n*size {
		return 0, fmt.Errorf("%w: Func got %d values for %d samples of %d", ErrInput, len(x), n, size)
	}
	return size, nil
}

// Forward evaluates F on each of the n samples in x.
func (f *Func) Forward(ctx context.Context, x []float64, n int) (out []float64, err error) {
	size, err := f.check(x, n)
	if err != nil {
		return nil, err
	}
	defer recovered(&err, ErrModel, "Func.F", "")
	out = make([]float64, n*f.Outputs)
	for i := 0; i < n; i++ {
		if err := ctx.Err(); err != nil {
			return nil, err
		}
		f.F(out[i*f.Outputs:(i+1)*f.Outputs], x[i*size:(i+1)*size])
	}
	return out, nil
}

// Gradient evaluates F and the gradient of output target[i] of each sample.
func (f *Func) Gradient(ctx context.Context, x []float64, n int, target []int) (out, grad []float64, err error) {
	size, err := f.check(x, n)
	if err != nil {
		return nil, nil, err
	}
	if f.Grad == nil {
		return nil, nil, fmt.Errorf("%w: Func has no Grad", ErrModel)
	}
	if len(target) != n {
		return nil, nil, fmt.Errorf("%w: Func got %d targets for %d samples", ErrInput, len(target), n)
	}
	defer recovered(&err, ErrModel, "Func", "")
	out = make([]float64, n*f.Outputs)
	grad = make([]float64, n*size)
	for i := 0; i < n; i++ {
		if err := ctx.Err(); err != nil {
			return nil, nil, err
		}
		if target[i] < 0 || target[i] >= f.Outputs {
			return nil, nil, fmt.Errorf("%w: target %d out of range [0,%d)", ErrInput, target[i], f.Outputs)
		}
		xi := x[i*size : (i+1)*size]
		f.F(out[i*f.Outputs:(i+1)*f.Outputs], xi)
		f.Grad(grad[i*size:(i+1)*size], xi, target[i])
	}
	return out, grad, nil
}

// recovered is the package's one recovery point: deferred at every call
// into code the caller supplied (a Model, Func's functions, a NoiseFunc),
// it turns a panic there into an error wrapping kind that names who
// panicked and, when where is not empty, on what.
func recovered(err *error, kind error, who, where string) {
	if r := recover(); r != nil {
		if where != "" {
			where = " " + where
		}
		*err = fmt.Errorf("%w: %s panicked%s: %v", kind, who, where, r)
	}
}

// shapeSize returns ∏shape, or an ErrModel error for an empty shape or a
// non-positive or oversized dimension.
func shapeSize(shape []int) (int, error) {
	if len(shape) == 0 {
		return 0, fmt.Errorf("%w: input shape is empty", ErrModel)
	}
	size := 1
	for _, d := range shape {
		if d <= 0 {
			return 0, fmt.Errorf("%w: input shape %v has a dimension ≤ 0", ErrModel, shape)
		}
		if size > MaxEvaluations/d {
			return 0, fmt.Errorf("%w: input shape %v has more than %d values", ErrModel, shape, MaxEvaluations)
		}
		size *= d
	}
	return size, nil
}
