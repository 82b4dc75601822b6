package ops

import (
	"fmt"
	"hash"
	"slices"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// reduce applies ONNX ReduceSum (mean false) or ReduceMean (mean true) over
// axes, which are already normalised (non-negative); empty axes means every
// axis. With keepdims the reduced axes stay as size 1, otherwise they are
// dropped (reducing every axis then gives a rank-0 scalar).
//
//	sum:  y_j = Σ_{i ∈ j} x_i        mean: y_j = (1/N) Σ_{i ∈ j} x_i
//
// where i ∈ j ranges over the N input elements that reduce into output j.
// The gradient broadcasts dL/dy back over the reduced axes (divided by N for
// the mean).
func Reduce(x *G.Node, axes []int, keepdims bool, mean bool) (out *G.Node, err error) {
	name := "ReduceSum"
	if mean {
		name = "ReduceMean"
	}
	if x == nil {
		return nil, fmt.Errorf("nn: %s: nil operand", name)
	}
	dt, err := dtypeOf(name, x)
	if err != nil {
		return nil, err
	}
	in := []int(x.Shape())
	red := make([]bool, len(in))
	if len(axes) == 0 {
		for i := range red {
			red[i] = true
		}
	}
	for _, a := range axes {
		if a < 0 || a >= len(in) {
			return nil, fmt.Errorf("nn: %s: axis %d out of range for input of shape %v (want 0..%d)", name, a, in, len(in)-1)
		}
		if red[a] {
			return nil, fmt.Errorf("nn: %s: axis %d repeated in %v", name, a, axes)
		}
		red[a] = true
	}
	kept := make([]int, len(in)) // the keepdims shape
	var outShape []int
	n := 1
	for i, d := range in {
		kept[i] = d
		if red[i] {
			kept[i] = 1
			n *= d
			if keepdims {
				outShape = append(outShape, 1)
			}
			continue
		}
		outShape = append(outShape, d)
	}
	if outShape == nil {
		outShape = []int{}
	}
	op := &reduceOp{name: name, mean: mean, dt: dt, inShape: in, kept: kept, outShape: outShape,
		count: n, inType: x.Type(), outType: nodeType(dt, len(outShape)), axes: slices.Clone(axes)}
	return G.ApplyOp(op, x)
}

// reduceOp is the forward op of reduce.
type reduceOp struct {
	name                    string
	mean                    bool
	dt                      tensor.Dtype
	inShape, kept, outShape []int
	axes                    []int
	count                   int // input elements per output element
	inType, outType         hm.Type
}

func (op *reduceOp) Arity() int           { return 1 }
func (op *reduceOp) Type() hm.Type        { return hm.NewFnType(op.inType, op.outType) }
func (op *reduceOp) ReturnsPtr() bool     { return false }
func (op *reduceOp) CallsExtern() bool    { return false }
func (op *reduceOp) OverwritesInput() int { return -1 }
func (op *reduceOp) String() string       { return fmt.Sprintf("%s%v", op.name, op.axes) }
func (op *reduceOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "elem.%s%v%v%v", op.name, op.dt, op.inShape, op.outShape)
}
func (op *reduceOp) Hashcode() uint32 { return hashOp(op) }
func (op *reduceOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return tensor.Shape(op.outShape).Clone(), nil
}
func (op *reduceOp) DiffWRT(int) []bool { return []bool{true} }
func (op *reduceOp) IsReduction() bool  { return true }

func (op *reduceOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 1 {
		return nil, fmt.Errorf("nn: %s gradient: got %d inputs, want 1", op.name, len(inputs))
	}
	d, err := G.ApplyOp(&reduceDiffOp{op}, grad)
	if err != nil {
		return nil, fmt.Errorf("nn: %s gradient: %w", op.name, err)
	}
	return G.Nodes{d}, nil
}

func (op *reduceOp) scale() float64 {
	if op.mean && op.count > 0 {
		return 1 / float64(op.count)
	}
	return 1
}

func (op *reduceOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *reduceOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 1 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 1", op.name, len(vs))
	}
	if op.dt == tensor.Float32 {
		return reduceRun[float32](op, p, vs[0])
	}
	return reduceRun[float64](op, p, vs[0])
}

func reduceRun[T float](op *reduceOp, p, xv G.Value) (G.Value, error) {
	x, err := valuesOf[T](op.name, xv, op.inShape)
	if err != nil {
		return nil, err
	}
	v, y := allocOutput[T](p, op.dt, op.outShape, nil, spanOf(x))
	// Sums run in float64 so float32 reductions over many elements keep
	// their precision.
	acc := make([]float64, len(y))
	sx := broadcastStrides(op.inShape, op.inShape)
	sy := broadcastStrides(op.kept, op.inShape)
	n, ly := 1, 0
	if r := len(op.inShape); r > 0 {
		n, ly = op.inShape[r-1], sy[r-1]
	}
	eachRow(op.inShape, sx, sy, func(o, _, iy int) {
		for j, xj := range x[o : o+n] {
			acc[iy+j*ly] += float64(xj)
		}
	})
	s := op.scale()
	for i, a := range acc {
		y[i] = T(a * s)
	}
	return wrap(v, y), nil
}

// reduceDiffOp broadcasts dL/dy back to the input shape.
type reduceDiffOp struct{ *reduceOp }

func (op *reduceDiffOp) Arity() int     { return 1 }
func (op *reduceDiffOp) Type() hm.Type  { return hm.NewFnType(op.outType, op.inType) }
func (op *reduceDiffOp) String() string { return "∂" + op.reduceOp.String() }
func (op *reduceDiffOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "elem.d%s%v%v%v", op.name, op.dt, op.inShape, op.outShape)
}
func (op *reduceDiffOp) Hashcode() uint32  { return hashOp(op) }
func (op *reduceDiffOp) IsReduction() bool { return false }
func (op *reduceDiffOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return tensor.Shape(op.inShape).Clone(), nil
}
func (op *reduceDiffOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *reduceDiffOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 1 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 1", op, len(vs))
	}
	if op.dt == tensor.Float32 {
		return reduceDiffRun[float32](op, p, vs[0])
	}
	return reduceDiffRun[float64](op, p, vs[0])
}

func reduceDiffRun[T float](op *reduceDiffOp, p, gv G.Value) (G.Value, error) {
	g, err := valuesOf[T](op.name, gv, op.outShape)
	if err != nil {
		return nil, err
	}
	v, d := allocOutput[T](p, op.dt, op.inShape, nil, spanOf(g))
	s := T(op.scale())
	sx := broadcastStrides(op.inShape, op.inShape)
	sg := broadcastStrides(op.kept, op.inShape)
	n, lg := 1, 0
	if r := len(op.inShape); r > 0 {
		n, lg = op.inShape[r-1], sg[r-1]
	}
	eachRow(op.inShape, sx, sg, func(o, _, ig int) {
		row := d[o : o+n]
		for j := range row {
			row[j] = g[ig+j*lg] * s
		}
	})
	return wrap(v, d), nil
}
