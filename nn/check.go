package nn

import (
	"context"
	"errors"
	"fmt"
	"slices"
)

// ErrUnchecked is wrapped by Check when the model cannot be compiled before
// it is given samples: a compile-time input needs its value, or an input's
// per-sample shape is fixed only by the samples.
var ErrUnchecked = errors.New("cannot be checked without samples")

// Check compiles nw as its first use would, at batch 1, without running
// it: the forward program of the graph outputs, and the gradient program
// of the first output with respect to the first floating-point input,
// each with one machine built. forward is nil when the model runs,
// gradient when it can be explained; an error wraps ErrUnchecked when
// there is no telling without samples.
func (nw *Network) Check() (forward, gradient error) {
	defer recoverEngine("nn: check", &forward)
	shapes, ok := nw.sampleShapes(1)
	switch {
	case len(nw.held) > 0:
		err := fmt.Errorf("%w: input %q is read when the model is compiled (a shape, axes or sizes), so each value compiles a program of its own", ErrUnchecked, nw.held[0].Name)
		return err, err
	case !ok:
		for i, d := range nw.declared {
			if d == nil || slices.Contains(d[1:], -1) {
				err := fmt.Errorf("%w: input %q has a shape %s whose dimensions after the batch are fixed only by the samples", ErrUnchecked, nw.feeds[i].Name, shapeString(d, true))
				return err, err
			}
		}
	}
	build := func(req request) error {
		p, err := nw.program(shapes, req)
		if err != nil {
			return err
		}
		if p.perSample {
			p = p.inner
		}
		m, err := p.pool.acquire(context.Background())
		if err != nil {
			return err
		}
		p.pool.release(m, true)
		return nil
	}
	if err := build(request{}); err != nil {
		return modelError("nn: check", err), modelError("nn: check", err)
	}
	h, err := nw.Head(Selection{})
	if err != nil {
		return nil, err
	}
	if err := build(request{outputs: h.outputs, grad: true, wrt: h.wrt}); err != nil {
		return nil, modelError("nn: check", err)
	}
	return nil, nil
}
