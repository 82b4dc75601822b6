package ops

import (
	"fmt"
	"hash"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// Where is ONNX Where: y = cond ≠ 0 ? a : b elementwise, the three operands
// broadcast together (numpy rules). cond holds 1 (true) and 0 (false), as
// Equal, Less and Greater leave them. The gradient goes to a where cond
// holds and to b elsewhere, summed over broadcast axes; cond gets none.
func Where(cond, a, b *G.Node) (*G.Node, error) {
	dt, err := dtypeOf("Where", a)
	if err != nil {
		return nil, err
	}
	for _, n := range []*G.Node{cond, b} {
		d, err := dtypeOf("Where", n)
		if err != nil {
			return nil, err
		}
		if d != dt {
			return nil, fmt.Errorf("nn: Where: operands of element types %v and %v, want one", d, dt)
		}
	}
	cs, as, bs := []int(cond.Shape()), []int(a.Shape()), []int(b.Shape())
	out, err := broadcastShape(cs, as)
	if err == nil {
		out, err = broadcastShape(out, bs)
	}
	if err != nil {
		return nil, fmt.Errorf("nn: Where: %w", err)
	}
	op := &whereOp{dt: dt, shapes: [3][]int{cs, as, bs}, outShape: out,
		types: [3]hm.Type{cond.Type(), a.Type(), b.Type()}, outType: nodeType(dt, len(out)),
		fixed: [2]bool{fixed(a), fixed(b)}}
	return G.ApplyOp(op, cond, a, b)
}

// whereOp is the forward op of Where.
type whereOp struct {
	dt       tensor.Dtype
	shapes   [3][]int // cond, a, b
	outShape []int
	types    [3]hm.Type
	outType  hm.Type
	fixed    [2]bool // a, b
}

func (op *whereOp) Arity() int { return 3 }
func (op *whereOp) Type() hm.Type {
	return hm.NewFnType(op.types[0], op.types[1], op.types[2], op.outType)
}
func (op *whereOp) ReturnsPtr() bool     { return false }
func (op *whereOp) CallsExtern() bool    { return false }
func (op *whereOp) OverwritesInput() int { return -1 }
func (op *whereOp) String() string       { return "Where" }
func (op *whereOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "where%v%v%v", op.dt, op.shapes, op.fixed)
}
func (op *whereOp) Hashcode() uint32 { return hashOp(op) }
func (op *whereOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return tensor.Shape(op.outShape).Clone(), nil
}
func (op *whereOp) DiffWRT(int) []bool { return []bool{false, !op.fixed[0], !op.fixed[1]} }

func (op *whereOp) SymDiff(inputs G.Nodes, _, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 3 {
		return nil, fmt.Errorf("nn: Where gradient: got %d inputs, want 3", len(inputs))
	}
	out := make(G.Nodes, 3)
	for w := 0; w < 2; w++ {
		if op.fixed[w] {
			continue
		}
		d, err := G.ApplyOp(&whereDiffOp{whereOp: op, which: w}, inputs[0], grad)
		if err != nil {
			return nil, fmt.Errorf("nn: Where gradient: %w", err)
		}
		out[w+1] = d
	}
	return out, nil
}

// walk calls f(k, ic, ia, ib) for every output element k with the offsets
// of the elements of cond, a and b it reads.
func (op *whereOp) walk(f func(k, ic, ia, ib int)) {
	out := op.outShape
	var st [3][]int
	for i, s := range op.shapes {
		st[i] = broadcastStrides(s, out)
	}
	idx := make([]int, len(out))
	var off [3]int
	for k := 0; k < shapeSize(out); k++ {
		f(k, off[0], off[1], off[2])
		for a := len(out) - 1; a >= 0; a-- {
			idx[a]++
			for i := range off {
				off[i] += st[i][a]
			}
			if idx[a] < out[a] {
				break
			}
			for i := range off {
				off[i] -= st[i][a] * out[a]
			}
			idx[a] = 0
		}
	}
}

func (op *whereOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *whereOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 3 {
		return nil, fmt.Errorf("nn: Where: got %d inputs, want 3", len(vs))
	}
	if op.dt == tensor.Float32 {
		return whereRun[float32](op, p, vs)
	}
	return whereRun[float64](op, p, vs)
}

func whereRun[T float](op *whereOp, p G.Value, vs []G.Value) (G.Value, error) {
	var in [3][]T
	for i, v := range vs {
		d, err := valuesOf[T]("Where", v, op.shapes[i])
		if err != nil {
			return nil, err
		}
		in[i] = d
	}
	v, y := allocOutput[T](p, op.dt, op.outShape, nil, spanOf(in[0]), spanOf(in[1]), spanOf(in[2]))
	op.walk(func(k, ic, ia, ib int) {
		if in[0][ic] != 0 {
			y[k] = in[1][ia]
		} else {
			y[k] = in[2][ib]
		}
	})
	return wrap(v, y), nil
}

// whereDiffOp computes the gradient of operand a (which 0) or b (which 1)
// from (cond, dL/dy).
type whereDiffOp struct {
	*whereOp
	which int
}

func (op *whereDiffOp) Arity() int { return 2 }
func (op *whereDiffOp) Type() hm.Type {
	return hm.NewFnType(op.types[0], op.outType, op.types[op.which+1])
}
func (op *whereDiffOp) String() string { return fmt.Sprintf("∂Where/∂x%d", op.which+1) }
func (op *whereDiffOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "dwhere%d%v%v", op.which, op.dt, op.shapes)
}
func (op *whereDiffOp) Hashcode() uint32 { return hashOp(op) }
func (op *whereDiffOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return tensor.Shape(op.shapes[op.which+1]).Clone(), nil
}
func (op *whereDiffOp) DiffWRT(int) []bool { return []bool{false, false} }
func (op *whereDiffOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("nn: %v: %w", op, errSecondOrder)
}
func (op *whereDiffOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *whereDiffOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 2 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 2", op, len(vs))
	}
	if op.dt == tensor.Float32 {
		return whereDiff[float32](op, p, vs)
	}
	return whereDiff[float64](op, p, vs)
}

func whereDiff[T float](op *whereDiffOp, p G.Value, vs []G.Value) (G.Value, error) {
	cond, err := valuesOf[T]("Where gradient", vs[0], op.shapes[0])
	if err != nil {
		return nil, err
	}
	g, err := valuesOf[T]("Where gradient", vs[1], op.outShape)
	if err != nil {
		return nil, err
	}
	v, d := allocOutput[T](p, op.dt, op.shapes[op.which+1], nil, spanOf(cond), spanOf(g))
	clear(d)
	take := op.which == 0
	op.walk(func(k, ic, ia, ib int) {
		if (cond[ic] != 0) != take {
			return
		}
		if take {
			d[ia] += g[k]
		} else {
			d[ib] += g[k]
		}
	})
	return wrap(v, d), nil
}
