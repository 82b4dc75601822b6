package ops

import (
	"fmt"
	"hash"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// Pad pads x with ONNX Pad semantics (opsets 2–25) over all of its axes.
// pads is [x1_begin, x2_begin, ..., x1_end, x2_end] with one begin and one
// end entry per axis; a negative entry crops that many elements, before
// the padding is taken from what remains (n elements). The mode says what
// the new elements hold:
//
//	constant: value
//	reflect:  the mirror image without the edge, x[−i] = x[i] and x[n−1+i] = x[n−1−i]
//	edge:     the nearest edge element, x[clamp(i, 0, n−1)]
//	wrap:     the elements from the other end, x[i mod n] (Pad-19)
//
// (numpy.pad modes "constant", "reflect", "edge" and "wrap", which the ONNX
// Pad doc refers to). reflect needs every positive pad to be at most n−1.
// The gradient adds each output gradient onto the input element it was
// copied from, so reflect, edge and wrap gradients accumulate on the
// elements copied more than once; constant elements get none.
func Pad(x *G.Node, pads []int, mode string, value float64) (y *G.Node, err error) {
	if x == nil {
		return nil, fmt.Errorf("nn: Pad: %w: input is required", ErrShape)
	}
	if err := convCheckDtype("Pad", x); err != nil {
		return nil, err
	}
	switch mode {
	case "", "constant":
		mode = "constant"
	case "reflect", "edge", "wrap":
	default:
		return nil, fmt.Errorf("nn: Pad: %w: expected mode constant, reflect, edge or wrap, got %q", ErrShape, mode)
	}
	op := &padOp{rank: x.Dims(), pads: append([]int(nil), pads...), mode: mode, value: value, constX: fixed(x)}
	if op.rank < 1 {
		return nil, fmt.Errorf("nn: Pad: %w: expected a tensor of rank ≥ 1, got a scalar", ErrShape)
	}
	if len(pads) != 2*op.rank {
		return nil, fmt.Errorf("nn: Pad: %w: expected %d pads for input shape %v, got %v", ErrShape, 2*op.rank, x.Shape(), pads)
	}
	if _, _, err := op.maps(x.Shape()); err != nil {
		return nil, err
	}
	return G.ApplyOp(op, x)
}

// padOp is the Pad op.
type padOp struct {
	rank   int
	pads   []int
	mode   string
	value  float64
	constX bool
}

// maps returns the output shape and, per axis, the input index each output
// index reads (−1: the constant value).
func (op *padOp) maps(xs tensor.Shape) (tensor.Shape, [][]int, error) {
	if len(xs) != op.rank {
		return nil, nil, fmt.Errorf("nn: Pad: %w: expected input of rank %d, got %v", ErrShape, op.rank, xs)
	}
	oshp := make(tensor.Shape, op.rank)
	m := make([][]int, op.rank)
	total := 1
	for a, n := range xs {
		b, e := op.pads[a], op.pads[a+op.rank]
		o := n + b + e
		// The crop: the elements [lo, lo+k) of the axis remain.
		lo, k := max(-b, 0), n-max(-b, 0)-max(-e, 0)
		if n < 1 || o < 1 || (k < 1 && op.mode != "constant") {
			return nil, nil, fmt.Errorf("nn: Pad: %w: axis %d of size %d with pads (%d, %d) leaves %d elements, expected at least 1", ErrShape, a, n, b, e, min(o, k))
		}
		if op.mode == "reflect" && (b > k-1 || e > k-1) {
			return nil, nil, fmt.Errorf("nn: Pad: %w: reflect pads (%d, %d) on axis %d of size %d, expected at most %d", ErrShape, b, e, a, k, k-1)
		}
		if total > maxElems/o {
			return nil, nil, fmt.Errorf("nn: Pad: %w: output exceeds %d elements", errTooLarge, maxElems)
		}
		total *= o
		oshp[a] = o
		m[a] = make([]int, o)
		for j := range m[a] {
			i := j - max(b, 0)
			switch {
			case i >= 0 && i < k:
			case op.mode == "edge":
				i = min(max(i, 0), k-1)
			case op.mode == "wrap":
				i = (i%k + k) % k
			case op.mode == "reflect":
				if i < 0 {
					i = -i
				} else {
					i = 2*(k-1) - i
				}
			default:
				m[a][j] = -1
				continue
			}
			m[a][j] = lo + i
		}
	}
	return oshp, m, nil
}

// padWalk visits every output element: f(outIndex, inIndex) with inIndex
// −1 for constant padding.
func padWalk(xs, oshp tensor.Shape, m [][]int, f func(o, i int)) {
	r := len(xs)
	inStride := make([]int, r)
	s := 1
	for a := r - 1; a >= 0; a-- {
		inStride[a] = s
		s *= xs[a]
	}
	idx := make([]int, r)
	last := oshp[r-1]
	o := 0
	for {
		base := 0
		for a := 0; a < r-1; a++ {
			src := m[a][idx[a]]
			if src < 0 {
				base = -1
				break
			}
			base += src * inStride[a]
		}
		for j := 0; j < last; j++ {
			if base < 0 || m[r-1][j] < 0 {
				f(o, -1)
			} else {
				f(o, base+m[r-1][j])
			}
			o++
		}
		a := r - 2
		for ; a >= 0; a-- {
			idx[a]++
			if idx[a] < oshp[a] {
				break
			}
			idx[a] = 0
		}
		if a < 0 {
			return
		}
	}
}

func padForward[T float](xs, oshp tensor.Shape, m [][]int, value T, x, y []T) {
	padWalk(xs, oshp, m, func(o, i int) {
		if i < 0 {
			y[o] = value
		} else {
			y[o] = x[i]
		}
	})
}

func padBackward[T float](xs, oshp tensor.Shape, m [][]int, dy, dx []T) {
	padWalk(xs, oshp, m, func(o, i int) {
		if i >= 0 {
			dx[i] += dy[o]
		}
	})
}

func (op *padOp) Arity() int { return 1 }

func (op *padOp) Type() hm.Type {
	t := &G.TensorType{Dims: op.rank, Of: hm.TypeVariable('a')}
	return hm.NewFnType(t, t)
}

func (op *padOp) InferShape(ds ...G.DimSizer) (tensor.Shape, error) {
	shapes, err := convShapes(1, ds)
	if err != nil {
		return nil, err
	}
	s, _, err := op.maps(shapes[0])
	return s, err
}

func (op *padOp) Do(vals ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vals...) }

// UsePreallocDo writes the padded tensor into prealloc when it is a dense
// tensor of the output's element type and shape (see the package doc), and
// allocates otherwise.
func (op *padOp) UsePreallocDo(prealloc G.Value, vals ...G.Value) (ret G.Value, err error) {
	if len(vals) != 1 {
		return nil, fmt.Errorf("nn: Pad: expected 1 input, got %d", len(vals))
	}
	x, err := convDense(vals[0], "Pad")
	if err != nil {
		return nil, err
	}
	oshp, m, err := op.maps(x.Shape())
	if err != nil {
		return nil, err
	}
	out, err := denseOutput(prealloc, x.Dtype(), oshp, x)
	if err != nil {
		return nil, fmt.Errorf("nn: Pad: %w", err)
	}
	switch xd := x.Data().(type) {
	case []float64:
		padForward(x.Shape(), oshp, m, op.value, xd, out.Data().([]float64))
	case []float32:
		padForward(x.Shape(), oshp, m, float32(op.value), xd, out.Data().([]float32))
	}
	return out, nil
}

func (op *padOp) ReturnsPtr() bool      { return false }
func (op *padOp) CallsExtern() bool     { return false }
func (op *padOp) OverwritesInput() int  { return -1 }
func (op *padOp) WriteHash(h hash.Hash) { fmt.Fprint(h, op.String()) }
func (op *padOp) Hashcode() uint32      { return hashOp(op) }
func (op *padOp) String() string {
	return fmt.Sprintf("Pad{pads:%v mode:%s value:%v const:%t}", op.pads, op.mode, op.value, op.constX)
}

func (op *padOp) DiffWRT(inputs int) []bool { return []bool{!op.constX}[:inputs] }

func (op *padOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 1 {
		return nil, fmt.Errorf("nn: Pad: expected 1 input, got %d", len(inputs))
	}
	if op.constX {
		return G.Nodes{nil}, nil
	}
	n, err := G.ApplyOp(&padBackOp{padOp: *op}, inputs[0], grad)
	if err != nil {
		return nil, fmt.Errorf("nn: Pad gradient: %w", err)
	}
	return G.Nodes{n}, nil
}

// padBackOp computes the input gradient of Pad from (x, dy).
type padBackOp struct{ padOp }

func (op *padBackOp) Arity() int { return 2 }

func (op *padBackOp) Type() hm.Type {
	t := &G.TensorType{Dims: op.rank, Of: hm.TypeVariable('a')}
	return hm.NewFnType(t, t, t)
}

func (op *padBackOp) InferShape(ds ...G.DimSizer) (tensor.Shape, error) {
	shapes, err := convShapes(2, ds)
	if err != nil {
		return nil, err
	}
	return shapes[0].Clone(), nil
}

func (op *padBackOp) Do(vals ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vals...) }

// UsePreallocDo writes the input gradient into prealloc when it fits, as
// padOp's does; the gradient accumulates, so the buffer is cleared first.
func (op *padBackOp) UsePreallocDo(prealloc G.Value, vals ...G.Value) (ret G.Value, err error) {
	if len(vals) != 2 {
		return nil, fmt.Errorf("nn: Pad gradient: expected 2 inputs, got %d", len(vals))
	}
	x, err := convDense(vals[0], "Pad gradient")
	if err != nil {
		return nil, err
	}
	dy, err := convDense(vals[1], "Pad gradient")
	if err != nil {
		return nil, err
	}
	oshp, m, err := op.maps(x.Shape())
	if err != nil {
		return nil, err
	}
	if !dy.Shape().Eq(oshp) {
		return nil, fmt.Errorf("nn: Pad gradient: %w: expected output gradient of shape %v, got %v", ErrShape, oshp, dy.Shape())
	}
	out, err := denseOutput(prealloc, x.Dtype(), x.Shape(), x, dy)
	if err != nil {
		return nil, fmt.Errorf("nn: Pad gradient: %w", err)
	}
	switch xd := dy.Data().(type) {
	case []float64:
		o := out.Float64s()
		clear(o)
		padBackward(x.Shape(), oshp, m, xd, o)
	case []float32:
		o := out.Float32s()
		clear(o)
		padBackward(x.Shape(), oshp, m, xd, o)
	}
	return out, nil
}

func (op *padBackOp) WriteHash(h hash.Hash) { fmt.Fprint(h, op.String()) }
func (op *padBackOp) Hashcode() uint32      { return hashOp(op) }
func (op *padBackOp) String() string        { return op.padOp.String() + "Grad" }

// DiffWRT reports the gradient op as not differentiable.
func (op *padBackOp) DiffWRT(inputs int) []bool { return make([]bool, inputs) }

// SymDiff refuses second derivatives with errSecondOrder.
func (op *padBackOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("nn: %v: %w", op, errSecondOrder)
}

var _ G.SDOp = (*padOp)(nil)
