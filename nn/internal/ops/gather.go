package ops

import (
	"fmt"
	"hash"
	"math"
	"slices"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// Gather is ONNX Gather with indices computed at run time (an embedding
// lookup): out = x[:axis] + indices.shape + x[axis+1:], out[…, j, …] =
// x[…, indices[j], …], negative indices counting from the end. The indices
// are held as floating-point values of the engine's type; each must be a
// whole number in [−d, d), or the run fails naming it. The gradient adds
// dL/dy onto the rows gathered (a row gathered twice gets both); the
// indices get none.
func Gather(x, indices *G.Node, axis int) (*G.Node, error) {
	dt, err := dtypeOf("Gather", x)
	if err != nil {
		return nil, err
	}
	if dti, err := dtypeOf("Gather", indices); err != nil {
		return nil, err
	} else if dti != dt {
		return nil, fmt.Errorf("nn: Gather: indices of element type %v, data %v", dti, dt)
	}
	xs, is := []int(x.Shape()), []int(indices.Shape())
	if axis < 0 || axis >= len(xs) {
		return nil, fmt.Errorf("nn: Gather: %w: axis %d for data %v", ErrShape, axis, xs)
	}
	out := slices.Concat(xs[:axis], is, xs[axis+1:])
	if shapeSize(out) > maxElems {
		return nil, fmt.Errorf("nn: Gather: %w", errTooLarge)
	}
	op := &gatherOp{axis: axis, dt: dt, xShape: xs, iShape: is, outShape: out,
		xType: x.Type(), iType: indices.Type(), outType: nodeType(dt, len(out)), constX: fixed(x)}
	return G.ApplyOp(op, x, indices)
}

// gatherOp is the forward op of Gather.
type gatherOp struct {
	axis                  int
	dt                    tensor.Dtype
	xShape, iShape        []int
	outShape              []int
	xType, iType, outType hm.Type
	constX                bool
}

func (op *gatherOp) Arity() int           { return 2 }
func (op *gatherOp) Type() hm.Type        { return hm.NewFnType(op.xType, op.iType, op.outType) }
func (op *gatherOp) ReturnsPtr() bool     { return false }
func (op *gatherOp) CallsExtern() bool    { return false }
func (op *gatherOp) OverwritesInput() int { return -1 }
func (op *gatherOp) String() string       { return fmt.Sprintf("Gather{axis=%d}", op.axis) }
func (op *gatherOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "gather%d%v%v%v%t", op.axis, op.dt, op.xShape, op.iShape, op.constX)
}
func (op *gatherOp) Hashcode() uint32 { return hashOp(op) }
func (op *gatherOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return tensor.Shape(op.outShape).Clone(), nil
}
func (op *gatherOp) DiffWRT(int) []bool { return []bool{!op.constX, false} }

func (op *gatherOp) SymDiff(inputs G.Nodes, _, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 2 {
		return nil, fmt.Errorf("nn: Gather gradient: got %d inputs, want 2", len(inputs))
	}
	if op.constX {
		return G.Nodes{nil, nil}, nil
	}
	d, err := G.ApplyOp(&gatherBackOp{op}, inputs[1], grad)
	if err != nil {
		return nil, fmt.Errorf("nn: Gather gradient: %w", err)
	}
	return G.Nodes{d, nil}, nil
}

// IndexError is a Gather index outside the axis it selects from: a value
// of the run's data (a token id beyond an embedding's rows, say), not a
// fault of the engine.
type IndexError struct {
	Value    float64 // the index as given
	Position int     // its position in the indices, row-major
	Size     int     // the length d of the gathered axis
}

func (e *IndexError) Error() string {
	return fmt.Sprintf("Gather index %v at position %d of its indices is out of range: expected a whole number from %d to %d (the axis gathered from has %d entries)",
		e.Value, e.Position, -e.Size, e.Size-1, e.Size)
}

// geometry returns the sizes of the outer axes, the gathered axis and the
// inner axes.
func (op *gatherOp) geometry() (outer, d, inner int) {
	return shapeSize(op.xShape[:op.axis]), op.xShape[op.axis], shapeSize(op.xShape[op.axis+1:])
}

// eachGathered calls f(src, dst) for every row gathered: src is the offset in x
// of the row indices[j] selects within outer block o, dst the offset in y
// of output row (o, j); rows are inner elements long. An index that is not
// a whole number in [−d, d) stops the walk with an error naming it.
func eachGathered[T float](op *gatherOp, ind []T, f func(src, dst int)) error {
	outer, d, inner := op.geometry()
	for j, x := range ind {
		v := float64(x)
		if v != math.Trunc(v) || v < -float64(d) || v >= float64(d) {
			return &IndexError{Value: v, Position: j, Size: d}
		}
	}
	for o := 0; o < outer; o++ {
		for j, x := range ind {
			r := int(x)
			if r < 0 {
				r += d
			}
			f((o*d+r)*inner, (o*len(ind)+j)*inner)
		}
	}
	return nil
}

func (op *gatherOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *gatherOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 2 {
		return nil, fmt.Errorf("nn: Gather: got %d inputs, want 2", len(vs))
	}
	if op.dt == tensor.Float32 {
		return gatherRun[float32](op, p, vs)
	}
	return gatherRun[float64](op, p, vs)
}

func gatherRun[T float](op *gatherOp, p G.Value, vs []G.Value) (G.Value, error) {
	x, err := valuesOf[T]("Gather", vs[0], op.xShape)
	if err != nil {
		return nil, err
	}
	ind, err := valuesOf[T]("Gather", vs[1], op.iShape)
	if err != nil {
		return nil, err
	}
	v, y := allocOutput[T](p, op.dt, op.outShape, nil, spanOf(x), spanOf(ind))
	_, _, inner := op.geometry()
	err = eachGathered(op, ind, func(src, dst int) { copy(y[dst:dst+inner], x[src:src+inner]) })
	if err != nil {
		return nil, err
	}
	return wrap(v, y), nil
}

// gatherBackOp computes dL/dx from (indices, dL/dy).
type gatherBackOp struct{ *gatherOp }

func (op *gatherBackOp) Type() hm.Type  { return hm.NewFnType(op.iType, op.outType, op.xType) }
func (op *gatherBackOp) String() string { return "∂" + op.gatherOp.String() }
func (op *gatherBackOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "dgather%d%v%v%v", op.axis, op.dt, op.xShape, op.iShape)
}
func (op *gatherBackOp) Hashcode() uint32 { return hashOp(op) }
func (op *gatherBackOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return tensor.Shape(op.xShape).Clone(), nil
}
func (op *gatherBackOp) DiffWRT(int) []bool { return []bool{false, false} }
func (op *gatherBackOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("nn: %v: %w", op, errSecondOrder)
}
func (op *gatherBackOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *gatherBackOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 2 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 2", op, len(vs))
	}
	if op.dt == tensor.Float32 {
		return gatherBack[float32](op, p, vs)
	}
	return gatherBack[float64](op, p, vs)
}

func gatherBack[T float](op *gatherBackOp, p G.Value, vs []G.Value) (G.Value, error) {
	ind, err := valuesOf[T]("Gather gradient", vs[0], op.iShape)
	if err != nil {
		return nil, err
	}
	g, err := valuesOf[T]("Gather gradient", vs[1], op.outShape)
	if err != nil {
		return nil, err
	}
	v, dx := allocOutput[T](p, op.dt, op.xShape, nil, spanOf(ind), spanOf(g))
	clear(dx)
	_, _, inner := op.geometry()
	err = eachGathered(op.gatherOp, ind, func(src, dst int) {
		for k, gk := range g[dst : dst+inner] {
			dx[src+k] += gk
		}
	})
	if err != nil {
		return nil, err
	}
	return wrap(v, dx), nil
}
