package ops

import (
	"fmt"
	"hash"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// lossOp is the loss that a gradient program differentiates,
// L = Σ_k out[k]·mask[k] with mask a one-hot selection per sample, as one op:
// its derivative ∂L/∂out = mask·∂L/∂L is the seed of the backward pass, so
// the backward starts from the mask itself instead of from the nodes that
// gorgonia's sum and elementwise product would differentiate into (a
// constant, a size, a repeat and a product over the whole output).
type lossOp struct {
	dt    tensor.Dtype
	shape tensor.Shape // of out and mask
	t     hm.Type      // of out and mask
}

// SelectionLoss returns the node L = Σ out ⊙ mask; out and mask have one shape.
func SelectionLoss(out, mask *G.Node) (n *G.Node, err error) {
	if !out.Shape().Eq(mask.Shape()) {
		return nil, fmt.Errorf("nn: selection loss: %w: output shape %v, mask shape %v", ErrShape, out.Shape(), mask.Shape())
	}
	dt, err := dtypeOf("selection loss", out)
	if err != nil {
		return nil, err
	}
	return G.ApplyOp(&lossOp{dt: dt, shape: out.Shape().Clone(), t: out.Type()}, out, mask)
}

func (op *lossOp) Arity() int { return 2 }

// Type is out → mask → scalar.
func (op *lossOp) Type() hm.Type { return hm.NewFnType(op.t, op.t, op.dt) }
func (op *lossOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return tensor.ScalarShape(), nil
}
func (op *lossOp) ReturnsPtr() bool      { return false }
func (op *lossOp) CallsExtern() bool     { return false }
func (op *lossOp) OverwritesInput() int  { return -1 }
func (op *lossOp) String() string        { return "Σ(out⊙mask)" }
func (op *lossOp) WriteHash(h hash.Hash) { fmt.Fprintf(h, "loss%v%v", op.dt, op.shape) }
func (op *lossOp) Hashcode() uint32      { return hashOp(op) }

// DiffWRT: the loss is differentiated w.r.t. the output, never the mask.
func (op *lossOp) DiffWRT(int) []bool { return []bool{true, false} }

// SymDiff returns ∂L/∂out = mask·g, g = ∂(cost)/∂L (1 when L is the cost).
func (op *lossOp) SymDiff(inputs G.Nodes, _, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 2 {
		return nil, fmt.Errorf("nn: selection loss gradient: got %d inputs, want 2", len(inputs))
	}
	d, err := G.ApplyOp(&lossDiffOp{op}, inputs[1], grad)
	if err != nil {
		return nil, fmt.Errorf("nn: selection loss gradient: %w", err)
	}
	return G.Nodes{d, nil}, nil
}

func (op *lossOp) Do(vs ...G.Value) (G.Value, error) {
	if len(vs) != 2 {
		return nil, fmt.Errorf("nn: selection loss: got %d inputs, want 2", len(vs))
	}
	if op.dt == tensor.Float32 {
		return lossSum[float32](op, vs)
	}
	return lossSum[float64](op, vs)
}

func lossSum[T float](op *lossOp, vs []G.Value) (G.Value, error) {
	out, err := valuesOf[T]("selection loss", vs[0], op.shape)
	if err != nil {
		return nil, err
	}
	mask, err := valuesOf[T]("selection loss", vs[1], op.shape)
	if err != nil {
		return nil, err
	}
	var s T
	for i, o := range out {
		s += o * mask[i]
	}
	return wrap[T](nil, []T{s}), nil
}

// lossDiffOp computes mask·g from (mask, g) with g a scalar, shaped like
// the output of lossOp's first input.
type lossDiffOp struct{ *lossOp }

// Type is mask → scalar → out.
func (op *lossDiffOp) Type() hm.Type { return hm.NewFnType(op.t, op.dt, op.t) }
func (op *lossDiffOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return op.shape.Clone(), nil
}
func (op *lossDiffOp) String() string        { return "∂Σ(out⊙mask)" }
func (op *lossDiffOp) WriteHash(h hash.Hash) { fmt.Fprintf(h, "dloss%v%v", op.dt, op.shape) }
func (op *lossDiffOp) Hashcode() uint32      { return hashOp(op) }

// DiffWRT: no second derivatives.
func (op *lossDiffOp) DiffWRT(int) []bool { return []bool{false, false} }
func (op *lossDiffOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("nn: %v: no second derivative", op)
}

func (op *lossDiffOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

// UsePreallocDo writes mask·g into p when p fits (see the package doc).
func (op *lossDiffOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 2 {
		return nil, fmt.Errorf("nn: %v: got %d inputs, want 2", op, len(vs))
	}
	if op.dt == tensor.Float32 {
		return lossGrad[float32](op, p, vs)
	}
	return lossGrad[float64](op, p, vs)
}

func lossGrad[T float](op *lossDiffOp, p G.Value, vs []G.Value) (G.Value, error) {
	mask, err := valuesOf[T]("selection loss gradient", vs[0], op.shape)
	if err != nil {
		return nil, err
	}
	g, err := valuesOf[T]("selection loss gradient", vs[1], nil)
	if err != nil {
		return nil, err
	}
	v, d := allocOutput[T](p, op.dt, op.shape, nil, spanOf(mask), spanOf(g))
	for i, mi := range mask {
		d[i] = g[0] * mi
	}
	return wrap(v, d), nil
}
