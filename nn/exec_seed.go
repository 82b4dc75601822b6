package nn

import (
	"fmt"
	"hash"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// execSeedOp is the loss that a gradient program differentiates,
// L = Σ_k out[k]·mask[k] with mask a one-hot selection per sample, as one op:
// its derivative ∂L/∂out = mask·∂L/∂L is the seed of the backward pass, so
// the backward starts from the mask itself instead of from the nodes that
// gorgonia's sum and elementwise product would differentiate into (a
// constant, a size, a repeat and a product over the whole output).
type execSeedOp struct {
	dt    tensor.Dtype
	shape tensor.Shape // of out and mask
	t     hm.Type      // of out and mask
}

// execSeed returns the node L = Σ out ⊙ mask; out and mask have one shape.
func execSeed(out, mask *G.Node) (n *G.Node, err error) {
	defer elemRecover("selection loss", &err)
	if !out.Shape().Eq(mask.Shape()) {
		return nil, fmt.Errorf("nn: selection loss: %w: output shape %v, mask shape %v", errElemShape, out.Shape(), mask.Shape())
	}
	dt, err := elemDtype("selection loss", out)
	if err != nil {
		return nil, err
	}
	return G.ApplyOp(&execSeedOp{dt: dt, shape: out.Shape().Clone(), t: out.Type()}, out, mask)
}

func (op *execSeedOp) Arity() int { return 2 }

// Type is out → mask → scalar.
func (op *execSeedOp) Type() hm.Type { return hm.NewFnType(op.t, op.t, op.dt) }
func (op *execSeedOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return tensor.ScalarShape(), nil
}
func (op *execSeedOp) ReturnsPtr() bool      { return false }
func (op *execSeedOp) CallsExtern() bool     { return false }
func (op *execSeedOp) OverwritesInput() int  { return -1 }
func (op *execSeedOp) String() string        { return "Σ(out⊙mask)" }
func (op *execSeedOp) WriteHash(h hash.Hash) { fmt.Fprintf(h, "exec.seed%v%v", op.dt, op.shape) }
func (op *execSeedOp) Hashcode() uint32      { return elemHash(op) }

// DiffWRT: the loss is differentiated w.r.t. the output, never the mask.
func (op *execSeedOp) DiffWRT(int) []bool { return []bool{true, false} }

// SymDiff returns ∂L/∂out = mask·g, g = ∂(cost)/∂L (1 when L is the cost).
func (op *execSeedOp) SymDiff(inputs G.Nodes, _, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 2 {
		return nil, fmt.Errorf("nn: selection loss gradient: got %d inputs, want 2", len(inputs))
	}
	d, err := G.ApplyOp(&execSeedDiffOp{op}, inputs[1], grad)
	if err != nil {
		return nil, fmt.Errorf("nn: selection loss gradient: %w", err)
	}
	return G.Nodes{d, nil}, nil
}

func (op *execSeedOp) Do(vs ...G.Value) (G.Value, error) {
	if len(vs) != 2 {
		return nil, fmt.Errorf("nn: selection loss: got %d inputs, want 2", len(vs))
	}
	if op.dt == tensor.Float32 {
		return execSeedSum[float32](op, vs)
	}
	return execSeedSum[float64](op, vs)
}

func execSeedSum[T elemFloat](op *execSeedOp, vs []G.Value) (G.Value, error) {
	out, err := elemData[T]("selection loss", vs[0], op.shape)
	if err != nil {
		return nil, err
	}
	mask, err := elemData[T]("selection loss", vs[1], op.shape)
	if err != nil {
		return nil, err
	}
	var s T
	for i, o := range out {
		s += o * mask[i]
	}
	return elemWrap[T](nil, []T{s}), nil
}

// execSeedDiffOp computes mask·g from (mask, g) with g a scalar, shaped like
// the output of execSeedOp's first input.
type execSeedDiffOp struct{ *execSeedOp }

// Type is mask → scalar → out.
func (op *execSeedDiffOp) Type() hm.Type { return hm.NewFnType(op.t, op.dt, op.t) }
func (op *execSeedDiffOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return op.shape.Clone(), nil
}
func (op *execSeedDiffOp) String() string        { return "∂Σ(out⊙mask)" }
func (op *execSeedDiffOp) WriteHash(h hash.Hash) { fmt.Fprintf(h, "exec.dseed%v%v", op.dt, op.shape) }
func (op *execSeedDiffOp) Hashcode() uint32      { return elemHash(op) }

// DiffWRT: no second derivatives.
func (op *execSeedDiffOp) DiffWRT(int) []bool { return []bool{false, false} }
func (op *execSeedDiffOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("nn: %v: no second derivative", op)
}

func (op *execSeedDiffOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

// UsePreallocDo writes mask·g into p when p fits (see exec_buffers.go).
func (op *execSeedDiffOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 2 {
		return nil, fmt.Errorf("nn: %v: got %d inputs, want 2", op, len(vs))
	}
	if op.dt == tensor.Float32 {
		return execSeedGrad[float32](op, p, vs)
	}
	return execSeedGrad[float64](op, p, vs)
}

func execSeedGrad[T elemFloat](op *execSeedDiffOp, p G.Value, vs []G.Value) (G.Value, error) {
	mask, err := elemData[T]("selection loss gradient", vs[0], op.shape)
	if err != nil {
		return nil, err
	}
	g, err := elemData[T]("selection loss gradient", vs[1], nil)
	if err != nil {
		return nil, err
	}
	v, d := elemAlloc[T](p, op.dt, op.shape)
	if elemAliases(d, mask) {
		v, d = elemAlloc[T](nil, op.dt, op.shape)
	}
	for i, mi := range mask {
		d[i] = g[0] * mi
	}
	return elemWrap(v, d), nil
}
