package ops

import (
	"fmt"
	"hash"
	"math"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// clipBoundsOp is Clip with bounds that are run-time values (one element
// each): y = min(max(x, lo), hi), as numpy.clip and the ONNX Clip-11
// reference define it. Constant bounds, the usual case in exported models,
// go to the clip kernel instead. With grad set the op computes the input
// gradient instead, ∂L/∂x = ∂L/∂y where lo < x < hi and 0 elsewhere (the
// one-sided convention at the bounds); its inputs are then x, lo, hi, ∂L/∂y.
type clipBoundsOp struct {
	grad        bool
	t, tlo, thi hm.Type
}

func ClipBounds(x, lo, hi *G.Node) (*G.Node, error) {
	for _, b := range []*G.Node{lo, hi} {
		if b.Shape().TotalSize() != 1 {
			return nil, fmt.Errorf("Clip: expected one-element bounds, got shape %v", b.Shape())
		}
		if b.Dtype() != x.Dtype() {
			return nil, fmt.Errorf("Clip: bound type %v differs from input type %v", b.Dtype(), x.Dtype())
		}
	}
	return G.ApplyOp(clipBoundsOp{t: x.Type(), tlo: lo.Type(), thi: hi.Type()}, x, lo, hi)
}

func (op clipBoundsOp) Arity() int {
	if op.grad {
		return 4
	}
	return 3
}

func (op clipBoundsOp) Type() hm.Type {
	if op.grad {
		return hm.NewFnType(op.t, op.tlo, op.thi, op.t, op.t)
	}
	return hm.NewFnType(op.t, op.tlo, op.thi, op.t)
}

func (op clipBoundsOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	s, ok := in[0].(tensor.Shape)
	if !ok {
		return nil, fmt.Errorf("Clip: input has no shape")
	}
	return s.Clone(), nil
}

func (op clipBoundsOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

// UsePreallocDo stores the result in prealloc when writable allows it. The bounds are
// applied in float64 and rounded to the element type once, as Do does.
func (op clipBoundsOp) UsePreallocDo(prealloc G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != op.Arity() {
		return nil, fmt.Errorf("Clip: expected %d inputs, got %d", op.Arity(), len(vs))
	}
	var d [4][]float64
	for i, v := range vs {
		f, err := Floats(v)
		if err != nil {
			return nil, fmt.Errorf("Clip: input %d: %w", i, err)
		}
		d[i] = f
	}
	x, lo, hi := d[0], d[1][0], d[2][0]
	out := make([]float64, len(x))
	for i, v := range x {
		switch {
		case op.grad:
			if v > lo && v < hi {
				out[i] = d[3][i]
			}
		default:
			out[i] = math.Min(math.Max(v, lo), hi)
			if math.IsNaN(v) {
				out[i] = v
			}
		}
	}
	dt := vs[0].Dtype()
	var ins [4]span
	for i, v := range vs {
		if t, ok := v.(*tensor.Dense); ok {
			ins[i] = denseSpan(t)
		}
	}
	if t := writable(prealloc, dt, vs[0].Shape(), nil, ins[:len(vs)]...); t != nil {
		if err := Fill(t, out); err == nil {
			return t, nil
		}
	}
	return Dense(dt, vs[0].Shape(), out), nil
}

func (op clipBoundsOp) ReturnsPtr() bool     { return false }
func (op clipBoundsOp) CallsExtern() bool    { return false }
func (op clipBoundsOp) OverwritesInput() int { return -1 }
func (op clipBoundsOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "ClipBounds{%v}", op.grad)
}
func (op clipBoundsOp) Hashcode() uint32 { return hashOp(op) }
func (op clipBoundsOp) String() string   { return fmt.Sprintf("ClipBounds{grad=%v}", op.grad) }

// DiffWRT: only x is differentiated; run-time bounds belong to models with
// more than one run-time input, whose gradients Head does not take.
func (op clipBoundsOp) DiffWRT(int) []bool { return []bool{true, false, false} }

func (op clipBoundsOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 3 {
		return nil, fmt.Errorf("Clip: expected 3 inputs, got %d", len(inputs))
	}
	dx, err := G.ApplyOp(clipBoundsOp{grad: true, t: op.t, tlo: op.tlo, thi: op.thi}, inputs[0], inputs[1], inputs[2], grad)
	if err != nil {
		return nil, err
	}
	return G.Nodes{dx, nil, nil}, nil
}
