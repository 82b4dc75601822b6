package ops

import (
	"fmt"
	"hash"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// PoolSpec holds the attributes of an ONNX MaxPool or AveragePool node.
// Kernel has one size per spatial axis and is required; Pads are in ONNX
// order [x1_begin, x2_begin, ..., x1_end, x2_end] (nil: none); Strides and
// Dilations have one entry per spatial axis (nil: ones). CeilMode rounds
// the output size up; CountIncludePad (AveragePool only) divides by the
// window size clipped to the padded input instead of the number of real
// input elements in the window.
type PoolSpec struct {
	Kernel, Pads, Strides, Dilations []int
	CeilMode, CountIncludePad        bool
}

// poolOutSize returns the output spatial sizes of a sliding window over
// inputs of spatial size in with ONNX-ordered pads:
//
//	out = ⌊(in + p_begin + p_end − ((k−1)·d + 1)) / s⌋ + 1       (floor mode)
//	out = ⌈(in + p_begin + p_end − ((k−1)·d + 1)) / s⌉ + 1       (ceil mode)
//
// In ceil mode a last window that would start inside the end padding,
// (out−1)·s ≥ in + p_begin, is dropped (ONNX MaxPool operator doc,
// output_spatial_shape; onnxruntime pool_attributes.h ComputeOutputSize).
func poolOutSize(in, kernel, pads, strides, dilations []int, ceilMode bool) ([]int, error) {
	r := len(in)
	if len(kernel) != r {
		return nil, fmt.Errorf("%w: expected %d kernel sizes, got %v", ErrShape, r, kernel)
	}
	p, s, d, err := convNormalize(r, pads, strides, dilations)
	if err != nil {
		return nil, err
	}
	out := make([]int, r)
	for i := 0; i < r; i++ {
		if kernel[i] < 1 || in[i] < 1 {
			return nil, fmt.Errorf("%w: expected positive kernel and input sizes, got kernel %v input %v", ErrShape, kernel, in)
		}
		num := in[i] + p[i] + p[i+r] - ((kernel[i]-1)*d[i] + 1)
		if num < 0 {
			return nil, fmt.Errorf("%w: window %v (dilations %v) larger than padded input %v (pads %v)", ErrShape, kernel, d, in, p)
		}
		if ceilMode {
			o := (num+s[i]-1)/s[i] + 1
			if (o-1)*s[i] >= in[i]+p[i] {
				o--
			}
			out[i] = o
		} else {
			out[i] = num/s[i] + 1
		}
	}
	return out, nil
}

// MaxPool applies an ONNX MaxPool to x (N, C, W) or (N, C, H, W):
//
//	y[n, c, o] = max_{k : o·s − p_begin + k·d inside x} x[n, c, o·s − p_begin + k·d]
//
// Padding never takes part in the max; a NaN in a window makes that output
// NaN. The gradient routes dy to the first maximal element of each window
// in row-major window order (ties: common practice, as in onnxruntime and
// PyTorch).
func MaxPool(x *G.Node, s PoolSpec) (*G.Node, error) {
	return poolBuild("MaxPool", x, s, true)
}

// AvgPool applies an ONNX AveragePool to x (N, C, W) or (N, C, H, W):
//
//	y[n, c, o] = Σ_{k valid} x[n, c, o·s − p_begin + k·d] / D
//
// where D counts the window positions inside the input, or with
// CountIncludePad the positions inside the padded input (ONNX AveragePool
// operator, count_include_pad; reference pool() of the ONNX backend tests).
// In ceil mode a window may run past the end padding; its positions there
// count in neither case (onnxruntime and PyTorch clip the window to the
// padded input, from memory). The gradient spreads dy/D over the same
// positions.
func AvgPool(x *G.Node, s PoolSpec) (*G.Node, error) {
	return poolBuild("AveragePool", x, s, false)
}

// GlobalPool applies ONNX GlobalMaxPool (max) or GlobalAveragePool to x
// (N, C, spatial...) of any spatial rank ≥ 1: one max or mean over all
// spatial positions per channel, output (N, C, 1, ...).
func GlobalPool(x *G.Node, takeMax bool) (y *G.Node, err error) {
	what := "GlobalAveragePool"
	if takeMax {
		what = "GlobalMaxPool"
	}
	if x == nil || x.Dims() < 3 {
		var shp tensor.Shape
		if x != nil {
			shp = x.Shape()
		}
		return nil, fmt.Errorf("nn: %s: %w: expected input of rank ≥ 3 (N, C, spatial...), got shape %v", what, ErrShape, shp)
	}
	if err := convCheckDtype(what, x); err != nil {
		return nil, err
	}
	op := &poolOp{rank: x.Dims() - 2, max: takeMax, global: true, constX: isConst(x)}
	if _, _, err := op.geometry(x.Shape()); err != nil {
		return nil, err
	}
	return G.ApplyOp(op, x)
}

func poolBuild(what string, x *G.Node, s PoolSpec, takeMax bool) (y *G.Node, err error) {
	if x == nil {
		return nil, fmt.Errorf("nn: %s: %w: input is required", what, ErrShape)
	}
	rank := x.Dims() - 2
	if rank != 1 && rank != 2 {
		return nil, fmt.Errorf("nn: %s: %w: expected input of rank 3 (NCW) or 4 (NCHW), got shape %v", what, ErrShape, x.Shape())
	}
	if err := convCheckDtype(what, x); err != nil {
		return nil, err
	}
	if len(s.Kernel) != rank {
		return nil, fmt.Errorf("nn: %s: %w: expected %d kernel sizes, got %v", what, ErrShape, rank, s.Kernel)
	}
	op := &poolOp{rank: rank, max: takeMax, kernel: append([]int(nil), s.Kernel...),
		ceil: s.CeilMode, includePad: s.CountIncludePad && !takeMax, constX: isConst(x)}
	if op.pads, op.strides, op.dils, err = convNormalize(rank, s.Pads, s.Strides, s.Dilations); err != nil {
		return nil, fmt.Errorf("nn: %s: %w", what, err)
	}
	if _, _, err := op.geometry(x.Shape()); err != nil {
		return nil, err
	}
	return G.ApplyOp(op, x)
}

// poolOp is the forward MaxPool / AveragePool / global pool op.
//
// It remembers the geometry of the last input shape it ran on (in, out,
// geom, win), so that a warm call with the same shape computes and
// allocates nothing but the pool. Like every op of a compiled machine it is only ever run by one
// goroutine at a time (each machine builds its own graph), which is what
// makes this cache safe; the cache is replaced, never modified in place,
// so the copy a poolBackOp starts from shares nothing mutable.
type poolOp struct {
	rank                        int
	max, global                 bool
	kernel, pads, strides, dils []int
	ceil, includePad            bool
	constX                      bool

	in, out tensor.Shape // last input shape and its output shape
	geom    convGeom     // geometry of in
	win     poolWindows  // window clipping of geom (windowed pools only)
}

func (op *poolOp) name() string {
	switch {
	case op.global && op.max:
		return "GlobalMaxPool"
	case op.global:
		return "GlobalAveragePool"
	case op.max:
		return "MaxPool"
	}
	return "AveragePool"
}

// geometry checks the input shape and returns the output shape and 2-D
// geometry (global pools flatten all spatial axes into one row).
func (op *poolOp) geometry(xs tensor.Shape) (tensor.Shape, convGeom, error) {
	if len(xs) != op.rank+2 {
		return nil, convGeom{}, fmt.Errorf("nn: %s: %w: expected input of rank %d, got %v", op.name(), ErrShape, op.rank+2, xs)
	}
	for _, v := range xs {
		if v < 1 {
			return nil, convGeom{}, fmt.Errorf("nn: %s: %w: expected positive sizes, got %v", op.name(), ErrShape, xs)
		}
	}
	if op.global {
		n := 1
		oshp := tensor.Shape{xs[0], xs[1]}
		for _, v := range xs[2:] {
			n *= v
			oshp = append(oshp, 1)
		}
		return oshp, convGeom{h: 1, w: n, kh: 1, kw: n, oh: 1, ow: 1, sh: 1, sw: 1, dh: 1, dw: 1}, nil
	}
	out, err := poolOutSize(xs[2:], op.kernel, op.pads, op.strides, op.dils, op.ceil)
	if err != nil {
		return nil, convGeom{}, fmt.Errorf("nn: %s: %w", op.name(), err)
	}
	oshp := append(tensor.Shape{xs[0], xs[1]}, out...)
	total := 1
	for _, v := range oshp {
		if total > maxElems/v {
			return nil, convGeom{}, fmt.Errorf("nn: %s: %w: output shape %v exceeds %d elements", op.name(), errTooLarge, oshp, maxElems)
		}
		total *= v
	}
	return oshp, convGeomOf(op.rank, xs[2:], op.kernel, op.pads, op.strides, op.dils, out), nil
}

func (op *poolOp) Arity() int { return 1 }

func (op *poolOp) Type() hm.Type {
	t := &G.TensorType{Dims: op.rank + 2, Of: hm.TypeVariable('a')}
	return hm.NewFnType(t, t)
}

func (op *poolOp) InferShape(ds ...G.DimSizer) (tensor.Shape, error) {
	shapes, err := convShapes(1, ds)
	if err != nil {
		return nil, err
	}
	s, _, err := op.geometry(shapes[0])
	return s, err
}

func (op *poolOp) Do(vals ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vals...) }

// cachedGeometry is geometry with the result of the last shape kept.
func (op *poolOp) cachedGeometry(xs tensor.Shape) (tensor.Shape, convGeom, error) {
	if op.in != nil && op.in.Eq(xs) {
		return op.out, op.geom, nil
	}
	oshp, g, err := op.geometry(xs)
	if err != nil {
		return nil, convGeom{}, err
	}
	op.in, op.out, op.geom, op.win = xs.Clone(), oshp, g, poolWindows{}
	if !op.global && !poolTiled(&g) {
		op.win = poolWindowsOf(&g)
	}
	return oshp, g, nil
}

// UsePreallocDo pools into prealloc when it is a dense tensor of the input's
// element type and the output's shape, and into a new tensor otherwise.
func (op *poolOp) UsePreallocDo(prealloc G.Value, vals ...G.Value) (ret G.Value, err error) {
	if len(vals) != 1 {
		return nil, fmt.Errorf("nn: %s: expected 1 input, got %d", op.name(), len(vals))
	}
	x, err := convDense(vals[0], op.name())
	if err != nil {
		return nil, err
	}
	oshp, g, err := op.cachedGeometry(x.Shape())
	if err != nil {
		return nil, err
	}
	out, err := denseOutput(prealloc, x.Dtype(), oshp, x)
	if err != nil {
		return nil, fmt.Errorf("nn: %s: %w", op.name(), err)
	}
	planes := oshp[0] * oshp[1]
	tiled := !op.global && poolTiled(&g)
	if op.global {
		if x.Dtype() == tensor.Float64 {
			poolGlobalForward(g.w, planes, op.max, x.Float64s(), out.Float64s())
		} else {
			poolGlobalForward(g.w, planes, op.max, x.Float32s(), out.Float32s())
		}
		return out, nil
	}
	if x.Dtype() == tensor.Float64 {
		if tiled {
			poolTiledForward(&g, planes, op.max, x.Float64s(), out.Float64s())
		} else {
			poolWindowForward(&g, &op.win, planes, op.max, op.includePad, x.Float64s(), out.Float64s())
		}
	} else if tiled {
		poolTiledForward(&g, planes, op.max, x.Float32s(), out.Float32s())
	} else {
		poolWindowForward(&g, &op.win, planes, op.max, op.includePad, x.Float32s(), out.Float32s())
	}
	return out, nil
}

// poolRange returns the window taps [lo, hi) whose positions
// start + t·d lie in [0, n).
func poolRange(start, k, d, n int) (lo, hi int) {
	if start < 0 {
		lo = (-start + d - 1) / d
	}
	hi = k
	if last := start + (k-1)*d; last >= n {
		if start >= n {
			return lo, lo
		}
		hi = (n-1-start)/d + 1
	}
	if hi < lo {
		hi = lo
	}
	return lo, hi
}

func (op *poolOp) ReturnsPtr() bool      { return false }
func (op *poolOp) CallsExtern() bool     { return false }
func (op *poolOp) OverwritesInput() int  { return -1 }
func (op *poolOp) WriteHash(h hash.Hash) { fmt.Fprint(h, op.String()) }
func (op *poolOp) Hashcode() uint32      { return hashOp(op) }
func (op *poolOp) String() string {
	return fmt.Sprintf("%s%dD{kernel:%v pads:%v strides:%v dilations:%v ceil:%t includePad:%t const:%t}",
		op.name(), op.rank, op.kernel, op.pads, op.strides, op.dils, op.ceil, op.includePad, op.constX)
}

func (op *poolOp) DiffWRT(inputs int) []bool { return []bool{!op.constX}[:inputs] }

func (op *poolOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 1 {
		return nil, fmt.Errorf("nn: %s: expected 1 input, got %d", op.name(), len(inputs))
	}
	if op.constX {
		return G.Nodes{nil}, nil
	}
	n, err := G.ApplyOp(&poolBackOp{poolOp: *op}, inputs[0], grad)
	if err != nil {
		return nil, fmt.Errorf("nn: %s gradient: %w", op.name(), err)
	}
	return G.Nodes{n}, nil
}

// poolBackOp computes the input gradient of a pool from (x, dy).
//
// A max pool's gradient finds each window's argmax again in x instead of
// reading one recorded by the forward op: a record would only be right if
// x still held, at the same address, the values the forward op saw, which
// the op cannot check without reading x, and the search costs no more than
// that read (the 2×2 kernels run at memory speed).
type poolBackOp struct{ poolOp }

func (op *poolBackOp) Arity() int { return 2 }

// gradName is the op's name in errors (a constant, so that a warm call
// allocates nothing).
func (op *poolBackOp) gradName() string {
	switch {
	case op.global && op.max:
		return "GlobalMaxPool gradient"
	case op.global:
		return "GlobalAveragePool gradient"
	case op.max:
		return "MaxPool gradient"
	}
	return "AveragePool gradient"
}

func (op *poolBackOp) Type() hm.Type {
	t := &G.TensorType{Dims: op.rank + 2, Of: hm.TypeVariable('a')}
	return hm.NewFnType(t, t, t)
}

func (op *poolBackOp) InferShape(ds ...G.DimSizer) (tensor.Shape, error) {
	shapes, err := convShapes(2, ds)
	if err != nil {
		return nil, err
	}
	return shapes[0].Clone(), nil
}

func (op *poolBackOp) Do(vals ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vals...) }

// UsePreallocDo writes the input gradient into prealloc when it is a dense
// tensor of x's element type and shape that shares no buffer with x or dy,
// and into a new tensor otherwise.
func (op *poolBackOp) UsePreallocDo(prealloc G.Value, vals ...G.Value) (ret G.Value, err error) {
	what := op.gradName()
	if len(vals) != 2 {
		return nil, fmt.Errorf("nn: %s: expected 2 inputs, got %d", what, len(vals))
	}
	x, err := convDense(vals[0], what)
	if err != nil {
		return nil, err
	}
	dy, err := convDense(vals[1], what)
	if err != nil {
		return nil, err
	}
	oshp, g, err := op.cachedGeometry(x.Shape())
	if err != nil {
		return nil, err
	}
	if !dy.Shape().Eq(oshp) {
		return nil, fmt.Errorf("nn: %s: %w: expected output gradient of shape %v, got %v", what, ErrShape, oshp, dy.Shape())
	}
	if dy.Dtype() != x.Dtype() {
		return nil, fmt.Errorf("nn: %s: %w: expected output gradient of type %v, got %v", what, ErrShape, x.Dtype(), dy.Dtype())
	}
	out, err := denseOutput(prealloc, x.Dtype(), x.Shape(), x, dy)
	if err != nil {
		return nil, fmt.Errorf("nn: %s: %w", what, err)
	}
	planes := oshp[0] * oshp[1]
	fresh := out != prealloc
	if x.Dtype() == tensor.Float64 {
		poolBackwardInto(&g, &op.win, planes, op.max, op.includePad, op.global, fresh, x.Float64s(), dy.Float64s(), out.Float64s())
	} else {
		poolBackwardInto(&g, &op.win, planes, op.max, op.includePad, op.global, fresh, x.Float32s(), dy.Float32s(), out.Float32s())
	}
	return out, nil
}

// poolBackwardInto writes the pooling gradient into dx with the global,
// tiled or generic kernel; dx is zeroed when fresh and holds anything
// otherwise.
func poolBackwardInto[T float](g *convGeom, win *poolWindows, planes int, takeMax, includePad, global, fresh bool, x, dy, dx []T) {
	if global {
		poolGlobalBackward(g.w, planes, takeMax, x, dy, dx)
		return
	}
	if poolTiled(g) {
		poolTiledBackward(g, planes, takeMax, x, dy, dx)
		return
	}
	if !fresh {
		clear(dx)
	}
	poolWindowBackward(g, win, planes, takeMax, includePad, x, dy, dx)
}

func (op *poolBackOp) WriteHash(h hash.Hash) { fmt.Fprint(h, op.String()) }
func (op *poolBackOp) Hashcode() uint32      { return hashOp(op) }
func (op *poolBackOp) String() string        { return op.poolOp.String() + "Grad" }

// DiffWRT reports the gradient op as not differentiable.
func (op *poolBackOp) DiffWRT(inputs int) []bool { return make([]bool, inputs) }

// SymDiff refuses second derivatives with errSecondOrder.
func (op *poolBackOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("nn: %v: %w", op, errSecondOrder)
}

var (
	_ G.SDOp            = (*poolOp)(nil)
	_ G.UsePreallocDoer = (*poolOp)(nil)
	_ G.UsePreallocDoer = (*poolBackOp)(nil)
)
