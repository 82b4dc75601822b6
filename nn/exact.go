package nn

import (
	"context"
	"errors"
	"fmt"
	"sync"

	"github.com/apportion/apportion/onnxlite"
)

// pathPlans holds a Head's path plan, built on first use.
type pathPlans struct {
	once sync.Once
	p32  *pathPlan[float32]
	p64  *pathPlan[float64]
	err  error
}

// plans builds the Head's path plan in the Network's element type.
func (h *Head) plans() *pathPlans {
	pp := h.path
	pp.once.Do(func() {
		defer recoverEngine("nn: piecewise-linear plan", &pp.err)
		if !h.single() {
			pp.err = fmt.Errorf("the exact path integral is not available for a model of several inputs (inputs: %s)", portNames(h.nw.inputs))
			return
		}
		shapes := [][]int{append([]int{1}, h.inShape...)}
		st, err := onnxlite.Infer(h.nw.model, h.nw.inputMap(shapes))
		if err != nil {
			pp.err = err
			return
		}
		if h.nw.opts.DType == Float64 {
			pp.p64, pp.err = newPathPlan[float64](st, h.nw.model, h.value)
		} else {
			pp.p32, pp.err = newPathPlan[float32](st, h.nw.model, h.value)
		}
	})
	return pp
}

// single reports whether the Head's input is the model's only input: the
// exact path integral and the gradient sums are offered for those models
// only (with other run-time or compile-time inputs the methods integrate
// point by point).
func (h *Head) single() bool {
	return len(h.nw.feeds) == 1 && len(h.nw.held) == 0
}

// PiecewiseLinear returns nil when the Head's value is a piecewise-linear
// function of the input, optionally passed through one final Softmax,
// LogSoftmax or Sigmoid (the head), so that IntegratePath integrates its
// gradient exactly. The piecewise-linear operators are Relu, LeakyRelu,
// PRelu, Clip, Abs, MaxPool and GlobalMaxPool between the affine ones: Gemm
// and MatMul with constant weights, Conv, BatchNormalization (inference),
// AveragePool, GlobalAveragePool, Pad, Add and Sub, Mul and Div by
// constants, Neg, Concat, Transpose, ReduceSum, ReduceMean and the
// operators that only reshape (Reshape, Flatten, Squeeze, Unsqueeze,
// Identity, Dropout, Cast). Otherwise it returns an error wrapping
// ErrNotPiecewiseLinear that names the first node of another operator
// (or of one of these used otherwise, such as a product of two run-time
// values); an operator added to the engine later is refused until it is
// added here. For a model of several inputs (other run-time inputs or
// compile-time ones) it returns an error that says so, not wrapping
// ErrNotPiecewiseLinear: there the methods integrate point by point.
func (h *Head) PiecewiseLinear() error {
	return h.plans().err
}

// IntegratePath returns, for x(α) = from + α(to − from),
//
//	∫₀¹ ∂F_target(x(α))/∂x dα
//
// integrated exactly, up to rounding: the path is cut into the P pieces on
// which the network before its head is affine (Sotoudeh & Thakur 2019,
// ExactLine), so that the input gradient is J_jᵀ·∇h on piece j with J_j
// constant, and
//
//	∫₀¹ ∇F dα = Σ_j J_jᵀ ∫_{piece j} ∇h(z(α)) dα
//
// where the head's input z is affine along each piece: without a head the
// inner integral is the piece's length times e_target; with Softmax,
// LogSoftmax or Sigmoid it is integrated by adaptive Gauss–Legendre to
// 1e-12 per unit of α, without a network pass. The pieces are found and
// the gradients pulled back in the Network's element type. When the path
// has more than maxPieces pieces (maxPieces > 0) it stops and returns a nil
// integral and a count above maxPieces (a lower bound on the path's): as
// soon as the pieces integrated and the crossings of one piecewise-linear
// operation on the rest of the run show more, so a CNN's path stops at its
// first ReLU. It fails with ErrNotPiecewiseLinear
// when PiecewiseLinear does.
func (h *Head) IntegratePath(ctx context.Context, from, to []float64, target, maxPieces int) (integral []float64, pieces int, err error) {
	integral, pieces, _, err = h.integratePath(ctx, from, to, target, maxPieces, false)
	return integral, pieces, err
}

// integratePath is IntegratePath, also returning the pieces' ends (the
// breaks inside (0, 1), increasing) when keep is set.
func (h *Head) integratePath(ctx context.Context, from, to []float64, target, maxPieces int, keep bool) (integral []float64, pieces int, breaks []float64, err error) {
	defer recoverEngine("nn: exact path integral", &err)
	pp := h.plans()
	if pp.err != nil {
		return nil, 0, nil, fmt.Errorf("nn: exact path integral: %w", pp.err)
	}
	for _, v := range [][]float64{from, to} {
		if err := h.check(v, 1); err != nil {
			return nil, 0, nil, fmt.Errorf("nn: exact path integral: %w", err)
		}
	}
	if target < 0 || target >= h.outSize {
		return nil, 0, nil, fmt.Errorf("nn: exact path integral: %w: target %d, expected 0 ≤ target < %d", ErrBadRequest, target, h.outSize)
	}
	run := func(integrate func() ([]float64, error), count func() (int, []float64)) {
		integral, err = integrate()
		pieces, breaks = count()
	}
	if pp.p64 != nil {
		r := newPathRun(ctx, pp.p64, target, maxPieces)
		r.keep = keep
		run(func() ([]float64, error) { return r.integrate(from, to) }, func() (int, []float64) { return r.pieces, r.breaks })
		r.release()
	} else {
		r := newPathRun(ctx, pp.p32, target, maxPieces)
		r.keep = keep
		run(func() ([]float64, error) { return r.integrate(from, to) }, func() (int, []float64) { return r.pieces, r.breaks })
		r.release()
	}
	if errors.Is(err, errTooManyPieces) {
		return nil, pieces, nil, nil
	}
	if err != nil {
		return nil, 0, nil, fmt.Errorf("nn: exact path integral: %w", err)
	}
	return integral, pieces, breaks, nil
}
