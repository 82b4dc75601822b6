package nn

import (
	"fmt"
	"hash"
	"hash/fnv"
	"math"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// poolSpec holds the attributes of an ONNX MaxPool or AveragePool node.
// Kernel has one size per spatial axis and is required; Pads are in ONNX
// order [x1_begin, x2_begin, ..., x1_end, x2_end] (nil: none); Strides and
// Dilations have one entry per spatial axis (nil: ones). CeilMode rounds
// the output size up; CountIncludePad (AveragePool only) divides by the
// window size clipped to the padded input instead of the number of real
// input elements in the window.
type poolSpec struct {
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
		return nil, fmt.Errorf("%w: expected %d kernel sizes, got %v", ErrConvShape, r, kernel)
	}
	p, s, d, err := convNormalize(r, pads, strides, dilations)
	if err != nil {
		return nil, err
	}
	out := make([]int, r)
	for i := 0; i < r; i++ {
		if kernel[i] < 1 || in[i] < 1 {
			return nil, fmt.Errorf("%w: expected positive kernel and input sizes, got kernel %v input %v", ErrConvShape, kernel, in)
		}
		num := in[i] + p[i] + p[i+r] - ((kernel[i]-1)*d[i] + 1)
		if num < 0 {
			return nil, fmt.Errorf("%w: window %v (dilations %v) larger than padded input %v (pads %v)", ErrConvShape, kernel, d, in, p)
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

// maxPool applies an ONNX MaxPool to x (N, C, W) or (N, C, H, W):
//
//	y[n, c, o] = max_{k : o·s − p_begin + k·d inside x} x[n, c, o·s − p_begin + k·d]
//
// Padding never takes part in the max; a NaN in a window makes that output
// NaN. The gradient routes dy to the first maximal element of each window
// in row-major window order (ties: common practice, as in onnxruntime and
// PyTorch).
func maxPool(x *G.Node, s poolSpec) (*G.Node, error) {
	return poolBuild("MaxPool", x, s, true)
}

// avgPool applies an ONNX AveragePool to x (N, C, W) or (N, C, H, W):
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
func avgPool(x *G.Node, s poolSpec) (*G.Node, error) {
	return poolBuild("AveragePool", x, s, false)
}

// globalPool applies ONNX GlobalMaxPool (max) or GlobalAveragePool to x
// (N, C, spatial...) of any spatial rank ≥ 1: one max or mean over all
// spatial positions per channel, output (N, C, 1, ...).
func globalPool(x *G.Node, max bool) (y *G.Node, err error) {
	defer convRecover("GlobalPool", &err)
	what := "GlobalAveragePool"
	if max {
		what = "GlobalMaxPool"
	}
	if x == nil || x.Dims() < 3 {
		var shp tensor.Shape
		if x != nil {
			shp = x.Shape()
		}
		return nil, fmt.Errorf("nn: %s: %w: expected input of rank ≥ 3 (N, C, spatial...), got shape %v", what, ErrConvShape, shp)
	}
	if err := convCheckDtype(what, x); err != nil {
		return nil, err
	}
	op := &poolOp{rank: x.Dims() - 2, max: max, global: true, constX: convIsConst(x)}
	if _, _, err := op.geometry(x.Shape()); err != nil {
		return nil, err
	}
	return G.ApplyOp(op, x)
}

func poolBuild(what string, x *G.Node, s poolSpec, max bool) (y *G.Node, err error) {
	defer convRecover(what, &err)
	if x == nil {
		return nil, fmt.Errorf("nn: %s: %w: input is required", what, ErrConvShape)
	}
	rank := x.Dims() - 2
	if rank != 1 && rank != 2 {
		return nil, fmt.Errorf("nn: %s: %w: expected input of rank 3 (NCW) or 4 (NCHW), got shape %v", what, ErrConvShape, x.Shape())
	}
	if err := convCheckDtype(what, x); err != nil {
		return nil, err
	}
	if len(s.Kernel) != rank {
		return nil, fmt.Errorf("nn: %s: %w: expected %d kernel sizes, got %v", what, ErrConvShape, rank, s.Kernel)
	}
	op := &poolOp{rank: rank, max: max, kernel: append([]int(nil), s.Kernel...),
		ceil: s.CeilMode, includePad: s.CountIncludePad && !max, constX: convIsConst(x)}
	if op.pads, op.strides, op.dils, err = convNormalize(rank, s.Pads, s.Strides, s.Dilations); err != nil {
		return nil, fmt.Errorf("nn: %s: %w", what, err)
	}
	if _, _, err := op.geometry(x.Shape()); err != nil {
		return nil, err
	}
	return G.ApplyOp(op, x)
}

// poolOp is the forward MaxPool / AveragePool / global pool op.
type poolOp struct {
	rank                        int
	max, global                 bool
	kernel, pads, strides, dils []int
	ceil, includePad            bool
	constX                      bool
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
		return nil, convGeom{}, fmt.Errorf("nn: %s: %w: expected input of rank %d, got %v", op.name(), ErrConvShape, op.rank+2, xs)
	}
	for _, v := range xs {
		if v < 1 {
			return nil, convGeom{}, fmt.Errorf("nn: %s: %w: expected positive sizes, got %v", op.name(), ErrConvShape, xs)
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
		if total > convMaxElems/v {
			return nil, convGeom{}, fmt.Errorf("nn: %s: %w: output shape %v exceeds %d elements", op.name(), ErrConvTooLarge, oshp, convMaxElems)
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

func (op *poolOp) Do(vals ...G.Value) (ret G.Value, err error) {
	defer convRecover(op.name(), &err)
	if len(vals) != 1 {
		return nil, fmt.Errorf("nn: %s: expected 1 input, got %d", op.name(), len(vals))
	}
	x, err := convDense(vals[0], op.name())
	if err != nil {
		return nil, err
	}
	oshp, g, err := op.geometry(x.Shape())
	if err != nil {
		return nil, err
	}
	out, err := convNewDense(x.Dtype(), oshp)
	if err != nil {
		return nil, fmt.Errorf("nn: %s: %w", op.name(), err)
	}
	planes := oshp[0] * oshp[1]
	switch xd := x.Data().(type) {
	case []float64:
		poolForward(&g, planes, op.max, op.includePad, xd, out.Data().([]float64))
	case []float32:
		poolForward(&g, planes, op.max, op.includePad, xd, out.Data().([]float32))
	}
	return out, nil
}

// poolDivisor is the AveragePool divisor D of the window at (y0, x0), the
// top-left input position (possibly in the padding).
func poolDivisor(g *convGeom, y0, x0 int, includePad bool) int {
	if includePad {
		iLo, iHi := poolRange(y0+g.pt, g.kh, g.dh, g.h+g.pt+g.pb)
		jLo, jHi := poolRange(x0+g.pl, g.kw, g.dw, g.w+g.pl+g.pr)
		return (iHi - iLo) * (jHi - jLo)
	}
	iLo, iHi := poolRange(y0, g.kh, g.dh, g.h)
	jLo, jHi := poolRange(x0, g.kw, g.dw, g.w)
	return (iHi - iLo) * (jHi - jLo)
}

// poolForward computes max or average pooling over planes (n·c) planes.
// A window with no input element yields −Inf (max) or 0 (average).
func poolForward[T convFloat](g *convGeom, planes int, max, includePad bool, x, y []T) {
	hw, p := g.h*g.w, g.oh*g.ow
	for pl := 0; pl < planes; pl++ {
		xp := x[pl*hw : (pl+1)*hw]
		yp := y[pl*p : (pl+1)*p]
		for oy := 0; oy < g.oh; oy++ {
			y0 := oy*g.sh - g.pt
			for ox := 0; ox < g.ow; ox++ {
				x0 := ox*g.sw - g.pl
				if max {
					idx := poolArgmax(g, xp, y0, x0)
					if idx < 0 {
						yp[oy*g.ow+ox] = T(math.Inf(-1))
					} else {
						yp[oy*g.ow+ox] = xp[idx]
					}
					continue
				}
				var s T
				iLo, iHi := poolRange(y0, g.kh, g.dh, g.h)
				jLo, jHi := poolRange(x0, g.kw, g.dw, g.w)
				for i := iLo; i < iHi; i++ {
					row := (y0 + i*g.dh) * g.w
					for j := jLo; j < jHi; j++ {
						s += xp[row+x0+j*g.dw]
					}
				}
				if d := poolDivisor(g, y0, x0, includePad); d > 0 {
					s /= T(d)
				}
				yp[oy*g.ow+ox] = s
			}
		}
	}
}

// poolArgmax returns the plane index of the first maximum of the window at
// (y0, x0), or −1 when the window holds no input element. A NaN in the
// window wins, so that NaN inputs stay visible in the output.
func poolArgmax[T convFloat](g *convGeom, xp []T, y0, x0 int) int {
	iLo, iHi := poolRange(y0, g.kh, g.dh, g.h)
	jLo, jHi := poolRange(x0, g.kw, g.dw, g.w)
	if iLo >= iHi || jLo >= jHi {
		return -1
	}
	best := (y0+iLo*g.dh)*g.w + x0 + jLo*g.dw
	bv := xp[best]
	if bv != bv {
		return best
	}
	for i := iLo; i < iHi; i++ {
		row := (y0 + i*g.dh) * g.w
		for j := jLo; j < jHi; j++ {
			k := row + x0 + j*g.dw
			v := xp[k]
			if v > bv {
				best, bv = k, v
			} else if v != v {
				return k // NaN propagates
			}
		}
	}
	return best
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
func (op *poolOp) Hashcode() uint32 {
	h := fnv.New32a()
	op.WriteHash(h)
	return h.Sum32()
}
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
type poolBackOp struct{ poolOp }

func (op *poolBackOp) Arity() int { return 2 }

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

func (op *poolBackOp) Do(vals ...G.Value) (ret G.Value, err error) {
	what := op.name() + " gradient"
	defer convRecover(what, &err)
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
	oshp, g, err := op.geometry(x.Shape())
	if err != nil {
		return nil, err
	}
	if !dy.Shape().Eq(oshp) {
		return nil, fmt.Errorf("nn: %s: %w: expected output gradient of shape %v, got %v", what, ErrConvShape, oshp, dy.Shape())
	}
	out, err := convNewDense(x.Dtype(), x.Shape())
	if err != nil {
		return nil, fmt.Errorf("nn: %s: %w", what, err)
	}
	planes := oshp[0] * oshp[1]
	switch xd := x.Data().(type) {
	case []float64:
		poolBackward(&g, planes, op.max, op.includePad, xd, dy.Data().([]float64), out.Data().([]float64))
	case []float32:
		poolBackward(&g, planes, op.max, op.includePad, xd, dy.Data().([]float32), out.Data().([]float32))
	}
	return out, nil
}

// poolBackward adds into the zeroed dx the pooling gradient: dy to each
// window's argmax (max), or dy/D to each input element of the window
// (average).
func poolBackward[T convFloat](g *convGeom, planes int, max, includePad bool, x, dy, dx []T) {
	hw, p := g.h*g.w, g.oh*g.ow
	for pl := 0; pl < planes; pl++ {
		xp := x[pl*hw : (pl+1)*hw]
		dxp := dx[pl*hw : (pl+1)*hw]
		dyp := dy[pl*p : (pl+1)*p]
		for oy := 0; oy < g.oh; oy++ {
			y0 := oy*g.sh - g.pt
			for ox := 0; ox < g.ow; ox++ {
				x0 := ox*g.sw - g.pl
				d := dyp[oy*g.ow+ox]
				if max {
					if idx := poolArgmax(g, xp, y0, x0); idx >= 0 {
						dxp[idx] += d
					}
					continue
				}
				div := poolDivisor(g, y0, x0, includePad)
				if div == 0 {
					continue
				}
				d /= T(div)
				iLo, iHi := poolRange(y0, g.kh, g.dh, g.h)
				jLo, jHi := poolRange(x0, g.kw, g.dw, g.w)
				for i := iLo; i < iHi; i++ {
					row := (y0 + i*g.dh) * g.w
					for j := jLo; j < jHi; j++ {
						dxp[row+x0+j*g.dw] += d
					}
				}
			}
		}
	}
}

func (op *poolBackOp) WriteHash(h hash.Hash) { fmt.Fprint(h, op.String()) }
func (op *poolBackOp) Hashcode() uint32 {
	h := fnv.New32a()
	op.WriteHash(h)
	return h.Sum32()
}
func (op *poolBackOp) String() string { return op.poolOp.String() + "Grad" }

// DiffWRT reports the gradient op as not differentiable.
func (op *poolBackOp) DiffWRT(inputs int) []bool { return make([]bool, inputs) }

// SymDiff refuses second derivatives with ErrConvSecondOrder.
func (op *poolBackOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("nn: %v: %w", op, ErrConvSecondOrder)
}

var _ G.SDOp = (*poolOp)(nil)
