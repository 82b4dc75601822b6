package ops

import (
	"github.com/apportion/apportion/nn/internal/asm/f32"

	"fmt"
	"hash"
	"slices"
	"strings"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// ConvSpec holds the attributes of an ONNX Conv node. Pads are in ONNX
// order [x1_begin, x2_begin, ..., x1_end, x2_end]; Strides and Dilations
// have one entry per spatial axis; Group ≥ 1 splits the input channels into
// Group independent convolutions (depthwise when Group equals the number of
// input channels). Nil Pads mean no padding, nil Strides and Dilations mean
// ones, and a zero Group means 1.
type ConvSpec struct {
	Pads, Strides, Dilations []int
	Group                    int
	// Relu applies max(v, 0) to every output value v after the bias add
	// (nn fuses a Relu that alone reads a Conv); the gradient masks dy with the output first.
	Relu bool
}

// conv applies an ONNX Conv to x (N, C, spatial...) with weights w
// (M, C/group, k...) and optional bias b (M) or nil, for one (NCW) or two
// (NCHW) spatial axes:
//
//	y[n, m, o] = b[m] + Σ_{c, k} w[m, c, k] · x[n, g·C/group + c, o·s − p_begin + k·d]
//
// where g = m / (M/group) and positions in the padding read 0. The output
// spatial size per axis is ⌊(in + p_begin + p_end − ((k−1)·d + 1)) / s⌋ + 1
// (ONNX Conv operator, opset 11). The forward pass lowers each group to one
// matrix product W·im2col(x); gradients with respect to x, w (dy·colᵀ) and
// b (Σ dy) are exact. With the float32 kernels (conv_strips.go) the im2col
// matrix is never stored: it is packed strip by strip from the padded
// image, and the input gradient of a unit-stride convolution runs as the
// same forward correlation of dy with the flipped weights (inputGrad32);
// float64, other strides and CPUs without the kernel use im2col, GEMM and,
// for the input gradient, col2im of Wᵀ·dy.
func Conv(x, w, b *G.Node, s ConvSpec) (y *G.Node, err error) {
	if x == nil || w == nil {
		return nil, fmt.Errorf("nn: Conv: %w: input and weights are required", ErrShape)
	}
	rank := x.Dims() - 2
	if rank != 1 && rank != 2 {
		return nil, fmt.Errorf("nn: Conv: %w: expected input of rank 3 (NCW) or 4 (NCHW), got shape %v", ErrShape, x.Shape())
	}
	if w.Dims() != x.Dims() {
		return nil, fmt.Errorf("nn: Conv: %w: expected weights of rank %d, got shape %v", ErrShape, x.Dims(), w.Shape())
	}
	if err := convCheckDtype("Conv", x, w, b); err != nil {
		return nil, err
	}
	op := &convOp{rank: rank, bias: b != nil, relu: s.Relu, slot: new(convSlot)}
	if op.pads, op.strides, op.dils, err = convNormalize(rank, s.Pads, s.Strides, s.Dilations); err != nil {
		return nil, fmt.Errorf("nn: Conv: %w", err)
	}
	op.group = s.Group
	if op.group == 0 {
		op.group = 1
	}
	if op.group < 0 {
		return nil, fmt.Errorf("nn: Conv: %w: expected group ≥ 1, got %d", ErrShape, s.Group)
	}
	op.constX, op.constW = fixed(x), fixed(w)
	children := G.Nodes{x, w}
	if b != nil {
		op.constB = fixed(b)
		children = append(children, b)
	}
	shapes := make([]tensor.Shape, len(children))
	for i, c := range children {
		shapes[i] = c.Shape()
	}
	if _, _, err := op.geometry(shapes...); err != nil {
		return nil, err
	}
	return G.ApplyOp(op, children...)
}

// convCheckDtype checks that all nodes share a float32 or float64 dtype.
func convCheckDtype(what string, nodes ...*G.Node) error {
	var dt tensor.Dtype
	for _, n := range nodes {
		if n == nil {
			continue
		}
		d, ok := ElemType(n)
		if !ok || d != tensor.Float32 && d != tensor.Float64 {
			return fmt.Errorf("nn: %s: %w: expected float32 or float64, got %v", what, ErrShape, d)
		}
		if dt != (tensor.Dtype{}) && d != dt {
			return fmt.Errorf("nn: %s: %w: mixed dtypes %v and %v", what, ErrShape, dt, d)
		}
		dt = d
	}
	return nil
}

// isConst reports whether n is a graph constant, whose gradient is
// never needed: the ops below then skip building that gradient.
func isConst(n *G.Node) bool {
	if n == nil || n.Op() == nil {
		return false
	}
	// gorgonia's constant ops (unexported) are the only ops that carry
	// their value and print as "const ...".
	_, ok := n.Op().(interface{ Value() G.Value })
	return ok && strings.HasPrefix(n.Op().String(), "const ")
}

// fixed reports whether n is the same on every run of a program: a graph
// constant, a model constant (a valued input node that the builder names
// with ConstPrefix: the weights), or a node computed from such nodes
// alone. Ops skip building gradients for fixed operands: gorgonia compiles
// every node of the graph, so an unused weight gradient would still run on
// every backward pass. Nodes built outside a program (other names) are never
// fixed, so their gradients are always built.
func fixed(n *G.Node) bool {
	if n == nil {
		return true
	}
	seen := map[*G.Node]bool{}
	stack := []*G.Node{n}
	for len(stack) > 0 {
		c := stack[len(stack)-1]
		stack = stack[:len(stack)-1]
		if seen[c] {
			continue
		}
		seen[c] = true
		if isConst(c) {
			continue
		}
		if c.Op() == nil {
			if !strings.HasPrefix(c.Name(), ConstPrefix) {
				return false
			}
			continue
		}
		if c.Graph() == nil {
			return false
		}
		for it := c.Graph().From(c.ID()); it.Next(); {
			k, ok := it.Node().(*G.Node)
			if !ok {
				return false
			}
			stack = append(stack, k)
		}
	}
	return true
}

// convNormalize fills in the defaults of pads, strides and dilations for
// rank spatial axes and checks them.
func convNormalize(rank int, pads, strides, dils []int) (p, s, d []int, err error) {
	p = make([]int, 2*rank)
	if pads != nil {
		if len(pads) != 2*rank {
			return nil, nil, nil, fmt.Errorf("%w: expected %d pads, got %v", ErrShape, 2*rank, pads)
		}
		for i, v := range pads {
			if v < 0 {
				return nil, nil, nil, fmt.Errorf("%w: expected non-negative pads, got %v", ErrShape, pads)
			}
			p[i] = v
		}
	}
	ones := func(in []int, name string) ([]int, error) {
		out := make([]int, rank)
		for i := range out {
			out[i] = 1
		}
		if in == nil {
			return out, nil
		}
		if len(in) != rank {
			return nil, fmt.Errorf("%w: expected %d %s, got %v", ErrShape, rank, name, in)
		}
		for i, v := range in {
			if v < 1 {
				return nil, fmt.Errorf("%w: expected %s ≥ 1, got %v", ErrShape, name, in)
			}
			out[i] = v
		}
		return out, nil
	}
	if s, err = ones(strides, "strides"); err != nil {
		return nil, nil, nil, err
	}
	if d, err = ones(dils, "dilations"); err != nil {
		return nil, nil, nil, err
	}
	return p, s, d, nil
}

// ResolvePads turns an ONNX auto_pad attribute into explicit pads in ONNX
// order [x1_begin, ..., x1_end, ...] for spatial input sizes in. NOTSET (or
// "") returns pads (zeros when nil); VALID returns zeros; SAME_UPPER and
// SAME_LOWER pad so that out = ⌈in / stride⌉, with a total pad per axis of
// max(0, (out−1)·stride + (k−1)·d + 1 − in), split evenly and the odd
// element at the end (SAME_UPPER) or the beginning (SAME_LOWER) (ONNX Conv
// and pooling operators, auto_pad attribute).
func ResolvePads(autoPad string, in, kernel, strides, dilations, pads []int) ([]int, error) {
	rank := len(in)
	if len(kernel) != rank {
		return nil, fmt.Errorf("nn: auto_pad: %w: expected %d kernel sizes, got %v", ErrShape, rank, kernel)
	}
	_, s, d, err := convNormalize(rank, nil, strides, dilations)
	if err != nil {
		return nil, fmt.Errorf("nn: auto_pad: %w", err)
	}
	out := make([]int, 2*rank)
	switch autoPad {
	case "", "NOTSET":
		if pads == nil {
			return out, nil
		}
		if len(pads) != 2*rank {
			return nil, fmt.Errorf("nn: auto_pad: %w: expected %d pads, got %v", ErrShape, 2*rank, pads)
		}
		copy(out, pads)
		return out, nil
	case "VALID":
		return out, nil
	case "SAME_UPPER", "SAME_LOWER":
		for i := 0; i < rank; i++ {
			if kernel[i] < 1 || in[i] < 1 {
				return nil, fmt.Errorf("nn: auto_pad: %w: expected positive sizes, got input %v kernel %v", ErrShape, in, kernel)
			}
			o := (in[i] + s[i] - 1) / s[i]
			total := (o-1)*s[i] + (kernel[i]-1)*d[i] + 1 - in[i]
			if total < 0 {
				total = 0
			}
			small := total / 2
			if autoPad == "SAME_UPPER" {
				out[i], out[i+rank] = small, total-small
			} else {
				out[i], out[i+rank] = total-small, small
			}
		}
		return out, nil
	}
	return nil, fmt.Errorf("nn: auto_pad: %w: expected NOTSET, SAME_UPPER, SAME_LOWER or VALID, got %q", ErrShape, autoPad)
}

// convOp is the forward Conv op: inputs x, w and (when bias) b.
type convOp struct {
	rank                   int
	pads, strides, dils    []int
	group                  int
	bias                   bool
	constX, constW, constB bool
	// relu applies max(v, 0) to the output after the bias (ConvSpec.Relu).
	relu bool

	// slot keeps the scratch (geometry, packed weights, buffers) between
	// runs; see convSlot. Ops built without one allocate scratch per call.
	slot *convSlot
}

// geometry checks the input shapes and returns the output shape and the
// per-group 2-D geometry.
func (op *convOp) geometry(shapes ...tensor.Shape) (tensor.Shape, convGeom, error) {
	xs, ws := shapes[0], shapes[1]
	r := op.rank
	if len(xs) != r+2 || len(ws) != r+2 {
		return nil, convGeom{}, fmt.Errorf("nn: Conv: %w: expected input and weights of rank %d, got %v and %v", ErrShape, r+2, xs, ws)
	}
	n, c, m := xs[0], xs[1], ws[0]
	if c%op.group != 0 || m%op.group != 0 || ws[1]*op.group != c {
		return nil, convGeom{}, fmt.Errorf("nn: Conv: %w: with group %d expected input channels %d = weights axis 1 (%d) × group and filters %d divisible by group",
			ErrShape, op.group, c, ws[1], m)
	}
	// The gradient ops pass (x, w) only: the bias does not change the
	// geometry. Do and InferShape check the number of inputs first.
	if op.bias && len(shapes) > 2 {
		if len(shapes) != 3 || len(shapes[2]) != 1 || shapes[2][0] != m {
			var got tensor.Shape
			if len(shapes) == 3 {
				got = shapes[2]
			}
			return nil, convGeom{}, fmt.Errorf("nn: Conv: %w: expected bias of shape (%d), got %v", ErrShape, m, got)
		}
	}
	out := make([]int, r)
	for i := 0; i < r; i++ {
		in, k := xs[2+i], ws[2+i]
		span := (k-1)*op.dils[i] + 1
		num := in + op.pads[i] + op.pads[i+r] - span
		if k < 1 || num < 0 {
			return nil, convGeom{}, fmt.Errorf("nn: Conv: %w: kernel %v (dilations %v) does not fit padded input %v (pads %v)",
				ErrShape, []int(ws[2:]), op.dils, []int(xs[2:]), op.pads)
		}
		out[i] = num/op.strides[i] + 1
	}
	total := n * m
	for _, o := range out {
		if total > maxElems/o {
			return nil, convGeom{}, fmt.Errorf("nn: Conv: %w: output (%d, %d, %v) exceeds %d elements", errTooLarge, n, m, out, maxElems)
		}
		total *= o
	}
	g := convGeomOf(r, xs[2:], ws[2:], op.pads, op.strides, op.dils, out)
	if k := ws[1] * g.kh * g.kw; k > maxElems/(g.oh*g.ow) {
		return nil, convGeom{}, fmt.Errorf("nn: Conv: %w: im2col buffer of %d×%d exceeds %d elements", errTooLarge, k, g.oh*g.ow, maxElems)
	}
	return append(tensor.Shape{n, m}, out...), g, nil
}

func (op *convOp) Arity() int {
	if op.bias {
		return 3
	}
	return 2
}

func (op *convOp) Type() hm.Type {
	a := hm.TypeVariable('a')
	t := &G.TensorType{Dims: op.rank + 2, Of: a}
	if op.bias {
		return hm.NewFnType(t, t, &G.TensorType{Dims: 1, Of: a}, t)
	}
	return hm.NewFnType(t, t, t)
}

func (op *convOp) InferShape(ds ...G.DimSizer) (tensor.Shape, error) {
	shapes, err := convShapes(op.Arity(), ds)
	if err != nil {
		return nil, err
	}
	s, _, err := op.geometry(shapes...)
	return s, err
}

// convShapes converts the DimSizers gorgonia passes to InferShape.
func convShapes(arity int, ds []G.DimSizer) ([]tensor.Shape, error) {
	if len(ds) != arity {
		return nil, fmt.Errorf("%w: expected %d inputs, got %d", ErrShape, arity, len(ds))
	}
	return G.DimSizersToShapes(ds)
}

// Do runs the forward convolution into a new tensor.
func (op *convOp) Do(vals ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vals...) }

// UsePreallocDo runs the forward convolution into prealloc when it is a
// dense tensor of the output's dtype and shape that shares no memory with
// the inputs, and into a new tensor otherwise. Every element of the output
// is written. float32 runs on the packed driver of conv_strips.go where the
// CPU has the kernel; float64 (and float32 elsewhere) on im2col + GEMM.
func (op *convOp) UsePreallocDo(prealloc G.Value, vals ...G.Value) (ret G.Value, err error) {
	if len(vals) != op.Arity() {
		return nil, fmt.Errorf("nn: Conv: expected %d inputs, got %d", op.Arity(), len(vals))
	}
	var ts [3]*tensor.Dense
	var shapes [3]tensor.Shape
	for i, v := range vals {
		if ts[i], err = convDense(v, "Conv"); err != nil {
			return nil, err
		}
		shapes[i] = ts[i].Shape()
	}
	s := op.scratch()
	defer op.release(s)
	oshp, g, err := op.cachedGeometry(s, shapes[:len(vals)]...)
	if err != nil {
		return nil, err
	}
	dt := ts[0].Dtype()
	for _, t := range ts[1:len(vals)] {
		if t.Dtype() != dt {
			return nil, fmt.Errorf("nn: Conv: %w: mixed dtypes %v and %v", ErrShape, dt, t.Dtype())
		}
	}
	out, err := denseOutput(prealloc, dt, oshp, ts[:len(vals)]...)
	if err != nil {
		return nil, fmt.Errorf("nn: Conv: %w", err)
	}
	n, c, m := shapes[0][0], shapes[0][1], shapes[1][0]
	if dt == tensor.Float64 {
		var b []float64
		if op.bias {
			b = ts[2].Float64s()
		}
		y := out.Float64s()
		convForward(&g, n, c, m, op.group, ts[0].Float64s(), ts[1].Float64s(), b, y)
		if op.relu {
			relu(y, y)
		}
		return out, nil
	}
	var b []float32
	if op.bias {
		b = ts[2].Float32s()
	}
	x, w, y := ts[0].Float32s(), ts[1].Float32s(), out.Float32s()
	if convFast(c / op.group * g.kh * g.kw) {
		op.forward32(s, &g, n, c, m, x, w, b, y)
		return out, nil
	}
	convForward(&g, n, c, m, op.group, x, w, b, y)
	if op.relu {
		f32.Relu(y, y)
	}
	return out, nil
}

// convDirect reports whether the im2col matrix of g equals the input itself
// (1×1 kernel, unit stride, no padding), so the copy can be skipped.
func convDirect(g *convGeom) bool {
	return g.kh == 1 && g.kw == 1 && g.sh == 1 && g.sw == 1 && g.pt == 0 && g.pl == 0 && g.pb == 0 && g.pr == 0
}

// convForward computes y = Conv(x, w) + b for n images of c channels into m
// output channels, group by group: Y_g = W_g · im2col(X_g).
func convForward[T float](g *convGeom, n, c, m, group int, x, w, b, y []T) {
	cg, mg := c/group, m/group
	hw, p := g.h*g.w, g.oh*g.ow
	k := cg * g.kh * g.kw
	direct := convDirect(g)
	var buf *[]T
	if !direct {
		buf = convGetBuf[T](k * p)
		defer convPutBuf(buf)
	}
	for ni := 0; ni < n; ni++ {
		for gi := 0; gi < group; gi++ {
			xs := x[(ni*c+gi*cg)*hw : (ni*c+(gi+1)*cg)*hw]
			col := xs
			if !direct {
				col = *buf
				convIm2col(g, cg, xs, col)
			}
			ys := y[(ni*m+gi*mg)*p : (ni*m+(gi+1)*mg)*p]
			convGemm(false, false, mg, p, k, w[gi*mg*k:(gi+1)*mg*k], k, col, p, 0, ys, p)
			if b != nil {
				for j := 0; j < mg; j++ {
					bv := b[gi*mg+j]
					row := ys[j*p : (j+1)*p]
					for i := range row {
						row[i] += bv
					}
				}
			}
		}
	}
}

func (op *convOp) ReturnsPtr() bool      { return false }
func (op *convOp) CallsExtern() bool     { return false }
func (op *convOp) OverwritesInput() int  { return -1 }
func (op *convOp) WriteHash(h hash.Hash) { fmt.Fprint(h, op.String()) }
func (op *convOp) Hashcode() uint32      { return hashOp(op) }
func (op *convOp) String() string {
	relu := ""
	if op.relu {
		relu = " relu"
	}
	return fmt.Sprintf("Conv%dD{pads:%v strides:%v dilations:%v group:%d bias:%t const:%t%t%t%s}",
		op.rank, op.pads, op.strides, op.dils, op.group, op.bias, op.constX, op.constW, op.constB, relu)
}

func (op *convOp) DiffWRT(inputs int) []bool {
	d := []bool{!op.constX, !op.constW, !op.constB}
	return d[:inputs]
}

func (op *convOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != op.Arity() {
		return nil, fmt.Errorf("nn: Conv: expected %d inputs, got %d", op.Arity(), len(inputs))
	}
	diff := op.DiffWRT(len(inputs))
	ret := make(G.Nodes, len(inputs))
	if op.relu && op.masksInputGrad(inputs[0], diff) {
		// The input gradient alone: it masks ∂L/∂y itself, sample by
		// sample, instead of reading a masked copy of the whole batch.
		back := &convBackOp{convOp: *op, wrt: 0, masked: true}
		back.relu = false
		back.slot = new(convSlot)
		n, err := G.ApplyOp(back, inputs[0], inputs[1], grad, output)
		if err != nil {
			return nil, fmt.Errorf("nn: Conv gradient: %w", err)
		}
		ret[0] = n
		return ret, nil
	}
	if op.relu {
		// ∂L/∂v = ∂L/∂y where y > 0: the mask of the Relu this op applies.
		g, err := reluGrad(output, grad)
		if err != nil {
			return nil, fmt.Errorf("nn: Conv gradient: %w", err)
		}
		grad = g
	}
	for i := range inputs {
		if !diff[i] {
			continue
		}
		back := &convBackOp{convOp: *op, wrt: i}
		back.relu = false
		back.slot = new(convSlot)
		n, err := G.ApplyOp(back, inputs[0], inputs[1], grad)
		if err != nil {
			return nil, fmt.Errorf("nn: Conv gradient: %w", err)
		}
		ret[i] = n
	}
	return ret, nil
}

// masksInputGrad reports whether the gradient of a Conv with a fused Relu
// runs as one masked input-gradient op (convBackOp.masked): when the input
// gradient is the only one taken and it runs on the packed float32 driver
// (unit strides, the kernels in assembly), where the mask is applied to
// each sample's ∂L/∂y as it is copied into the padded buffer.
func (op *convOp) masksInputGrad(x *G.Node, diff []bool) bool {
	if !diff[0] || slices.Contains(diff[1:], true) || !f32.Asm() {
		return false
	}
	if dt, ok := ElemType(x); !ok || dt != tensor.Float32 {
		return false
	}
	for _, s := range op.strides {
		if s != 1 {
			return false
		}
	}
	return true
}

// convBackOp computes one gradient of Conv from (x, w, dy): with respect to
// x (wrt 0), w (wrt 1) or b (wrt 2). A masked op (wrt 0 only) takes the
// Conv's output y as a fourth operand and differentiates the fused Relu
// too: it uses ∂L/∂y where y > 0 and +0 elsewhere in place of dy, the
// bits reluDiffOp stores.
type convBackOp struct {
	convOp
	wrt    int
	masked bool
}

func (op *convBackOp) Arity() int {
	if op.masked {
		return 4
	}
	return 3
}

func (op *convBackOp) Type() hm.Type {
	a := hm.TypeVariable('a')
	t := &G.TensorType{Dims: op.rank + 2, Of: a}
	if op.wrt == 2 {
		return hm.NewFnType(t, t, t, &G.TensorType{Dims: 1, Of: a})
	}
	if op.masked {
		return hm.NewFnType(t, t, t, t, t)
	}
	return hm.NewFnType(t, t, t, t)
}

func (op *convBackOp) InferShape(ds ...G.DimSizer) (tensor.Shape, error) {
	shapes, err := convShapes(op.Arity(), ds)
	if err != nil {
		return nil, err
	}
	switch op.wrt {
	case 0:
		return shapes[0].Clone(), nil
	case 1:
		return shapes[1].Clone(), nil
	}
	return tensor.Shape{shapes[1][0]}, nil
}

// Do runs the gradient into a new tensor.
func (op *convBackOp) Do(vals ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vals...) }

// UsePreallocDo runs the gradient into prealloc when it is a dense tensor of
// the result's dtype and shape that shares no memory with the inputs, and
// into a new tensor otherwise; every element is written. The float32 input
// gradient with unit strides runs as a forward correlation on the packed
// driver (inputGrad32); the other cases use im2col/col2im and GEMM.
func (op *convBackOp) UsePreallocDo(prealloc G.Value, vals ...G.Value) (ret G.Value, err error) {
	if len(vals) != op.Arity() {
		return nil, fmt.Errorf("nn: Conv gradient: expected %d inputs, got %d", op.Arity(), len(vals))
	}
	var ts [4]*tensor.Dense
	for i, v := range vals {
		if ts[i], err = convDense(v, "Conv gradient"); err != nil {
			return nil, err
		}
	}
	dt := ts[0].Dtype()
	for _, t := range ts[1:len(vals)] {
		if t.Dtype() != dt {
			return nil, fmt.Errorf("nn: Conv gradient: %w: mixed dtypes %v and %v", ErrShape, dt, t.Dtype())
		}
	}
	s := op.scratch()
	defer op.release(s)
	oshp, g, err := op.convOp.cachedGeometry(s, ts[0].Shape(), ts[1].Shape())
	if err != nil {
		return nil, err
	}
	if !ts[2].Shape().Eq(oshp) {
		return nil, fmt.Errorf("nn: Conv gradient: %w: expected output gradient of shape %v, got %v", ErrShape, oshp, ts[2].Shape())
	}
	if op.masked && !ts[3].Shape().Eq(oshp) {
		return nil, fmt.Errorf("nn: Conv gradient: %w: expected output of shape %v, got %v", ErrShape, oshp, ts[3].Shape())
	}
	var rshp tensor.Shape
	switch op.wrt {
	case 0:
		rshp = ts[0].Shape()
	case 1:
		rshp = ts[1].Shape()
	default:
		rshp = oshp[1:2]
	}
	out, err := denseOutput(prealloc, dt, rshp, ts[:len(vals)]...)
	if err != nil {
		return nil, fmt.Errorf("nn: Conv gradient: %w", err)
	}
	n, c, m := oshp[0], ts[0].Shape()[1], oshp[1]
	if dt == tensor.Float32 && op.wrt == 0 && convBackwardDirect(&g) && convFast(m/op.group*g.kh*g.kw) {
		var ym []float32
		if op.masked {
			ym = ts[3].Float32s()
		}
		op.inputGrad32(s, &g, n, c, m, ts[1].Float32s(), ts[2].Float32s(), ym, out.Float32s())
		return out, nil
	}
	if dt == tensor.Float64 {
		dy := ts[2].Float64s()
		if op.masked {
			d := make([]float64, len(dy))
			reluDiff(d, ts[3].Float64s(), dy)
			dy = d
		}
		r := out.Float64s()
		clear(r)
		convBackward(&g, op.wrt, n, c, m, op.group, ts[0].Float64s(), ts[1].Float64s(), dy, r)
		return out, nil
	}
	dy := ts[2].Float32s()
	if op.masked {
		d := make([]float32, len(dy))
		f32.ReluGrad(d, ts[3].Float32s(), dy)
		dy = d
	}
	r := out.Float32s()
	clear(r)
	convBackward(&g, op.wrt, n, c, m, op.group, ts[0].Float32s(), ts[1].Float32s(), dy, r)
	return out, nil
}

// convBackward writes into the zeroed r the gradient of Σ dy·Conv(x, w)
// with respect to x (wrt 0: col2im(W_gᵀ·dY_g)), w (wrt 1: Σ_n dY_g·im2col(X_g)ᵀ)
// or b (wrt 2: Σ_{n, spatial} dY).
func convBackward[T float](g *convGeom, wrt, n, c, m, group int, x, w, dy, r []T) {
	cg, mg := c/group, m/group
	hw, p := g.h*g.w, g.oh*g.ow
	k := cg * g.kh * g.kw
	if wrt == 2 {
		for ni := 0; ni < n; ni++ {
			for mi := 0; mi < m; mi++ {
				var s T
				for _, v := range dy[(ni*m+mi)*p : (ni*m+mi+1)*p] {
					s += v
				}
				r[mi] += s
			}
		}
		return
	}
	direct := convDirect(g)
	var buf *[]T
	if !direct {
		buf = convGetBuf[T](k * p)
		defer convPutBuf(buf)
	}
	for ni := 0; ni < n; ni++ {
		for gi := 0; gi < group; gi++ {
			dys := dy[(ni*m+gi*mg)*p : (ni*m+(gi+1)*mg)*p]
			wg := w[gi*mg*k : (gi+1)*mg*k]
			if wrt == 0 {
				dxs := r[(ni*c+gi*cg)*hw : (ni*c+(gi+1)*cg)*hw]
				if direct {
					convGemm(true, false, k, p, mg, wg, k, dys, p, 0, dxs, p)
					continue
				}
				col := *buf
				convGemm(true, false, k, p, mg, wg, k, dys, p, 0, col, p)
				convCol2im(g, cg, col, dxs)
				continue
			}
			xs := x[(ni*c+gi*cg)*hw : (ni*c+(gi+1)*cg)*hw]
			col := xs
			if !direct {
				col = *buf
				convIm2col(g, cg, xs, col)
			}
			convGemm(false, true, mg, k, p, dys, p, col, p, 1, r[gi*mg*k:(gi+1)*mg*k], k)
		}
	}
}

func (op *convBackOp) WriteHash(h hash.Hash) { fmt.Fprint(h, op.String()) }
func (op *convBackOp) Hashcode() uint32      { return hashOp(op) }
func (op *convBackOp) String() string {
	if op.masked {
		return fmt.Sprintf("%sGrad%d masked", op.convOp.String(), op.wrt)
	}
	return fmt.Sprintf("%sGrad%d", op.convOp.String(), op.wrt)
}

// DiffWRT reports the gradient ops as not differentiable: apportion needs
// first derivatives only.
func (op *convBackOp) DiffWRT(inputs int) []bool { return make([]bool, inputs) }

// SymDiff refuses second derivatives with errSecondOrder.
func (op *convBackOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("nn: %v: %w", op, errSecondOrder)
}

var _ G.SDOp = (*convOp)(nil)
