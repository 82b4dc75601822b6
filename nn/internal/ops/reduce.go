package ops

import (
	"fmt"
	"hash"
	"slices"

	"math"

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
	return ReduceBy(x, axes, keepdims, name)
}

// reduceKinds are the reductions ReduceBy computes.
var reduceKinds = map[string]bool{"ReduceSum": true, "ReduceMean": true, "ReduceMax": true,
	"ReduceMin": true, "ReduceL2": true, "ReduceLogSumExp": true}

// ReduceBy applies the ONNX reduction name over axes, as Reduce does for
// ReduceSum and ReduceMean; it also computes
//
//	ReduceMax, ReduceMin:  y_j = max (min) over i ∈ j of x_i
//	ReduceL2:              y_j = √(Σ_{i ∈ j} x_i²)
//	ReduceLogSumExp:       y_j = m_j + log Σ_{i ∈ j} exp(x_i − m_j),  m_j = max_{i ∈ j} x_i
//
// (the max taken out first so that exp cannot overflow). Their gradients:
// dL/dx_i = dL/dy_j · [x_i = y_j]/(number of ties) for max and min (the
// gradient shared among tied maxima, as torch.amax does, from memory),
// dL/dy_j · x_i/y_j for L2 (0 where y_j = 0), and dL/dy_j · exp(x_i − y_j)
// for log-sum-exp.
func ReduceBy(x *G.Node, axes []int, keepdims bool, name string) (out *G.Node, err error) {
	if !reduceKinds[name] {
		return nil, fmt.Errorf("nn: reduction %q: %w", name, errUnknownOp)
	}
	mean := name == "ReduceMean"
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
	if op.name != "ReduceSum" && op.name != "ReduceMean" {
		d, err := G.ApplyOp(&reduceDiffXYOp{op}, inputs[0], output, grad)
		if err != nil {
			return nil, fmt.Errorf("nn: %s gradient: %w", op.name, err)
		}
		return G.Nodes{d}, nil
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
	each := func(f func(a *float64, x float64)) {
		eachRow(op.inShape, sx, sy, func(o, _, iy int) {
			for j, xj := range x[o : o+n] {
				f(&acc[iy+j*ly], float64(xj))
			}
		})
	}
	switch op.name {
	case "ReduceMax", "ReduceMin", "ReduceLogSumExp":
		sign := 1.0
		if op.name == "ReduceMin" {
			sign = -1
		}
		for i := range acc {
			acc[i] = math.Inf(-1)
		}
		each(func(a *float64, x float64) {
			if x != x || *a != *a {
				*a = math.NaN()
			} else if sign*x > *a {
				*a = sign * x
			}
		})
		for i := range acc {
			acc[i] *= sign
		}
		if op.name == "ReduceLogSumExp" {
			m := slices.Clone(acc)
			clear(acc)
			eachRow(op.inShape, sx, sy, func(o, _, iy int) {
				for j, xj := range x[o : o+n] {
					i := iy + j*ly
					if !math.IsInf(m[i], 0) {
						acc[i] += math.Exp(float64(xj) - m[i])
					}
				}
			})
			for i := range acc {
				if math.IsInf(m[i], 0) {
					acc[i] = m[i] // all −∞ (or a +∞ among them)
				} else {
					acc[i] = m[i] + math.Log(acc[i])
				}
			}
		}
	case "ReduceL2":
		each(func(a *float64, x float64) { *a += x * x })
		for i := range acc {
			acc[i] = math.Sqrt(acc[i])
		}
	default: // sum and mean: the hot case, without a call per element
		eachRow(op.inShape, sx, sy, func(o, _, iy int) {
			for j, xj := range x[o : o+n] {
				acc[iy+j*ly] += float64(xj)
			}
		})
	}
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

// reduceDiffXYOp computes dL/dx of ReduceMax, ReduceMin, ReduceL2 and
// ReduceLogSumExp from (x, y, dL/dy).
type reduceDiffXYOp struct{ *reduceOp }

func (op *reduceDiffXYOp) Arity() int { return 3 }
func (op *reduceDiffXYOp) Type() hm.Type {
	return hm.NewFnType(op.inType, op.outType, op.outType, op.inType)
}
func (op *reduceDiffXYOp) ReturnsPtr() bool     { return false }
func (op *reduceDiffXYOp) OverwritesInput() int { return -1 }
func (op *reduceDiffXYOp) String() string       { return "∂" + op.reduceOp.String() }
func (op *reduceDiffXYOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "elem.dxy%s%v%v%v", op.name, op.dt, op.inShape, op.outShape)
}
func (op *reduceDiffXYOp) Hashcode() uint32  { return hashOp(op) }
func (op *reduceDiffXYOp) IsReduction() bool { return false }
func (op *reduceDiffXYOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return tensor.Shape(op.inShape).Clone(), nil
}
func (op *reduceDiffXYOp) DiffWRT(int) []bool { return []bool{false, false, false} }
func (op *reduceDiffXYOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("nn: %v: %w", op, errSecondOrder)
}
func (op *reduceDiffXYOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *reduceDiffXYOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 3 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 3", op, len(vs))
	}
	if op.dt == tensor.Float32 {
		return reduceDiffXYRun[float32](op, p, vs)
	}
	return reduceDiffXYRun[float64](op, p, vs)
}

func reduceDiffXYRun[T float](op *reduceDiffXYOp, p G.Value, vs []G.Value) (G.Value, error) {
	x, err := valuesOf[T](op.name, vs[0], op.inShape)
	if err != nil {
		return nil, err
	}
	y, err := valuesOf[T](op.name, vs[1], op.outShape)
	if err != nil {
		return nil, err
	}
	g, err := valuesOf[T](op.name, vs[2], op.outShape)
	if err != nil {
		return nil, err
	}
	v, d := allocOutput[T](p, op.dt, op.inShape, nil, spanOf(x), spanOf(y), spanOf(g))
	sx := broadcastStrides(op.inShape, op.inShape)
	sy := broadcastStrides(op.kept, op.inShape)
	n, ly := 1, 0
	if r := len(op.inShape); r > 0 {
		n, ly = op.inShape[r-1], sy[r-1]
	}
	var ties []int
	if op.name == "ReduceMax" || op.name == "ReduceMin" {
		ties = make([]int, len(y))
		eachRow(op.inShape, sx, sy, func(o, _, iy int) {
			for j, xj := range x[o : o+n] {
				if xj == y[iy+j*ly] {
					ties[iy+j*ly]++
				}
			}
		})
	}
	eachRow(op.inShape, sx, sy, func(o, _, iy int) {
		for j, xj := range x[o : o+n] {
			i := iy + j*ly
			xv, yv, gv := float64(xj), float64(y[i]), float64(g[i])
			var dv float64
			switch op.name {
			case "ReduceMax", "ReduceMin":
				if xj == y[i] {
					dv = gv / float64(ties[i])
				}
			case "ReduceL2":
				if yv != 0 {
					dv = gv * xv / yv
				}
			case "ReduceLogSumExp":
				dv = gv * math.Exp(xv-yv)
			}
			d[o+j] = T(dv)
		}
	})
	return wrap(v, d), nil
}
