package ops

import (
	"fmt"

	"gorgonia.org/tensor"
)

// Numeric entry points: the kernels of Conv and of the matrix products, on
// plain slices of n samples, for code that computes outside a graph (nn's
// path evaluator).

// ConvPlan is the geometry of one Conv over samples of one shape, with
// the scratch of its float32 kernels (packed weights, buffers), which
// concurrent callers do not share (see convSlot).
type ConvPlan struct {
	g     convGeom
	c, m  int
	group int
	fwd   *convOp
	back  *convBackOp
	// Out is the per-sample output shape (M, spatial...).
	Out []int
}

// NewConvPlan checks a Conv of one sample of shape x (C, spatial...) with
// weights of shape w (M, C/group, kernel...) and returns its geometry.
func NewConvPlan(x, w []int, s ConvSpec) (*ConvPlan, error) {
	rank := len(x) - 1
	if (rank != 1 && rank != 2) || len(w) != rank+2 {
		return nil, fmt.Errorf("nn: Conv: %w: expected a sample of rank 2 or 3 and weights of rank %d, got %v and %v", ErrShape, rank+2, x, w)
	}
	op := &convOp{rank: rank, group: s.Group, constW: true, slot: new(convSlot)}
	if op.group == 0 {
		op.group = 1
	}
	if op.group < 0 {
		return nil, fmt.Errorf("nn: Conv: %w: expected group ≥ 1, got %d", ErrShape, s.Group)
	}
	var err error
	if op.pads, op.strides, op.dils, err = convNormalize(rank, s.Pads, s.Strides, s.Dilations); err != nil {
		return nil, fmt.Errorf("nn: Conv: %w", err)
	}
	oshp, g, err := op.geometry(append(tensor.Shape{1}, x...), tensor.Shape(w))
	if err != nil {
		return nil, err
	}
	back := &convBackOp{convOp: *op}
	back.slot = new(convSlot)
	return &ConvPlan{g: g, c: x[0], m: w[0], group: op.group, fwd: op, back: back, Out: append([]int(nil), oshp[1:]...)}, nil
}

// ConvForward computes y = Conv(x, w) + b for n samples (b may be nil). The
// weights must be the same slice on every call with the plan.
func ConvForward[T float](p *ConvPlan, n int, x, w, b, y []T) {
	if x32, ok := any(x).([]float32); ok && convFast(p.c/p.group*p.g.kh*p.g.kw) {
		s := p.fwd.scratch()
		p.fwd.forward32(s, &p.g, n, p.c, p.m, x32, any(w).([]float32), any(b).([]float32), any(y).([]float32))
		p.fwd.release(s)
		return
	}
	convForward(&p.g, n, p.c, p.m, p.group, x, w, b, y)
}

// ConvInputGrad writes into dx the gradient of Σ dy·Conv(x, w) with respect
// to x, for n samples. The weights must be the same slice on every call
// with the plan.
func ConvInputGrad[T float](p *ConvPlan, n int, w, dy, dx []T) {
	if dy32, ok := any(dy).([]float32); ok && convBackwardDirect(&p.g) && convFast(p.m/p.group*p.g.kh*p.g.kw) {
		s := p.back.scratch()
		p.back.inputGrad32(s, &p.g, n, p.c, p.m, any(w).([]float32), dy32, nil, any(dx).([]float32))
		p.back.release(s)
		return
	}
	clear(dx)
	convBackward(&p.g, 0, n, p.c, p.m, p.group, nil, w, dy, dx)
}

// Product computes C = op(A)·op(B) + beta·C for row-major matrices (op(X) is
// X or Xᵀ as tA, tB say; op(A) is m×k, op(B) k×n): float32 on the packed
// kernels where they run, float64 with gonum's BLAS.
func Product[T float](tA, tB bool, m, n, k int, a []T, lda int, b []T, ldb int, beta T, c []T, ldc int) {
	convGemm(tA, tB, m, n, k, a, lda, b, ldb, beta, c, ldc)
}
