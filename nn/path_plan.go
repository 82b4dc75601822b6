package nn

import (
	"errors"
	"fmt"
	"math"
	"sync"

	"github.com/apportion/apportion/nn/internal/ops"
	"github.com/apportion/apportion/onnxlite"
)

// ErrNotPiecewiseLinear marks a Head whose value is not a piecewise-linear
// function of the input (up to one smooth head), so that its gradient
// cannot be integrated exactly along a path (Head.PiecewiseLinear).
var ErrNotPiecewiseLinear = errors.New("not a piecewise-linear network")

// pathFloat is the element type the path evaluator computes in: the
// Network's.
type pathFloat interface{ float32 | float64 }

// The smooth heads a piecewise-linear network may end in.
const (
	headNone       = ""
	headSoftmax    = "Softmax"
	headLogSoftmax = "LogSoftmax"
	headSigmoid    = "Sigmoid"
)

// pathPlan is the network behind a Head as the path evaluator runs it: the
// operations, in graph order, that compute the Head's value from the input
// for one sample (the batch-1 graph), each affine or piecewise-affine, and
// the smooth head after them, if any. Values live in slots; an operation
// that only changes the shape of its input (Reshape, Flatten, Identity, …)
// writes no slot of its own.
type pathPlan[T pathFloat] struct {
	ops    []pathOp[T]
	sizes  []int // elements per sample of each slot
	output int   // the slot of the value the head reads (or the Head's value)
	head   string
	last   []int     // per slot: the last operation that reads it (len(ops) for output)
	runs   sync.Pool // *pathRun[T], with their buffers, for the next path
}

// planBuilder translates the nodes of one Static graph into a pathPlan.
type planBuilder[T pathFloat] struct {
	b     builder // for the attribute readers shared with translate.go
	slot  map[string]int
	sizes []int
	ops   []pathOp[T]
}

// notPiecewise is the error of node n that exact integration cannot run.
func notPiecewise(n *onnxlite.Node, i int, why string) error {
	name := n.Name
	if name == "" {
		name = fmt.Sprintf("#%d", i)
	}
	return fmt.Errorf("%w: operator %s (node %q) %s", ErrNotPiecewiseLinear, n.OpType, name, why)
}

// newPathPlan builds the plan of value in st (the batch-1 graph), whose
// single runtime input is the Head's.
func newPathPlan[T pathFloat](st *onnxlite.Static, m *onnxlite.Model, value string) (*pathPlan[T], error) {
	pb := &planBuilder[T]{b: builder{st: st, opset: m.OpsetVersion("")}, slot: map[string]int{}}
	if len(st.Inputs) != 1 {
		return nil, fmt.Errorf("%w: exact integration needs one runtime input, the model has %d", ErrBadRequest, len(st.Inputs))
	}
	pb.newSlot(st.Inputs[0])
	nodes := needed(st.Nodes, []string{value})
	head := headNone
	if k := len(nodes); k > 0 {
		last := nodes[k-1]
		switch last.OpType {
		case headSoftmax, headLogSoftmax, headSigmoid:
			if err := pb.checkHead(last, value, k-1); err != nil {
				return nil, err
			}
			head, value, nodes = last.OpType, last.Inputs[0], nodes[:k-1]
		}
	}
	for i, n := range nodes {
		if err := pb.node(n, i); err != nil {
			return nil, err
		}
	}
	out, ok := pb.slot[value]
	if !ok {
		return nil, fmt.Errorf("%w: value %q does not depend on the input", ErrNotPiecewiseLinear, value)
	}
	p := &pathPlan[T]{ops: pb.ops, sizes: pb.sizes, output: out, head: head, last: make([]int, len(pb.sizes))}
	for s := range p.last {
		p.last[s] = -1
	}
	for k, op := range p.ops {
		for _, s := range op.inputs() {
			p.last[s] = k
		}
	}
	p.last[out] = len(p.ops)
	return p, nil
}

// checkHead accepts a final Softmax or LogSoftmax that normalises over every
// element of the sample, and any final Sigmoid.
func (pb *planBuilder[T]) checkHead(n *onnxlite.Node, value string, i int) error {
	if n.OpType == headSigmoid {
		return nil
	}
	shape := pb.b.shape(value)
	def := int64(-1)
	if pb.b.opset < 13 {
		def = 1
	}
	axis, err := normAxis(int(n.AttrInt("axis", def)), len(shape))
	if err != nil {
		return err
	}
	all := prod(shape)
	covered := shape[axis]
	if pb.b.opset < 13 {
		covered = prod(shape[axis:])
	}
	if covered != all {
		return notPiecewise(n, i, fmt.Sprintf("normalises over part of the output (axis %d of shape %v); exact integration needs one normalisation over the whole sample", axis, shape))
	}
	return nil
}

func (pb *planBuilder[T]) newSlot(name string) int {
	s := len(pb.sizes)
	pb.slot[name] = s
	pb.sizes = append(pb.sizes, prod(pb.b.shape(name)))
	return s
}

// runtime reports whether input i of n is computed from the Head's input.
func (pb *planBuilder[T]) runtime(n *onnxlite.Node, i int) bool {
	if i >= len(n.Inputs) || n.Inputs[i] == "" {
		return false
	}
	_, ok := pb.slot[n.Inputs[i]]
	return ok
}

// constant returns the elements of constant input i of n as T.
func (pb *planBuilder[T]) constant(n *onnxlite.Node, i int) ([]T, error) {
	t, ok := pb.b.st.Consts[n.Inputs[i]]
	if !ok {
		return nil, fmt.Errorf("value %q is neither a constant nor computed from the input", n.Inputs[i])
	}
	v, err := t.Float64s()
	if err != nil {
		return nil, fmt.Errorf("constant %q: %w", n.Inputs[i], err)
	}
	return convertSlice[T](v), nil
}

func convertSlice[T pathFloat](v []float64) []T {
	out := make([]T, len(v))
	for i, x := range v {
		out[i] = T(x)
	}
	return out
}

// node adds the operation of node n (the i-th of the plan's nodes).
func (pb *planBuilder[T]) node(n *onnxlite.Node, i int) error {
	if !defaultDomain(n.Domain) {
		return notPiecewise(n, i, "is not known to be piecewise-linear")
	}
	var runtime []int
	for j := range n.Inputs {
		if pb.runtime(n, j) {
			runtime = append(runtime, j)
		}
	}
	if len(runtime) == 0 {
		return nil // a constant that shape inference left as a node; unused by the plan
	}
	if len(n.Outputs) == 0 || n.Outputs[0] == "" {
		return nil
	}
	out := n.Outputs[0]
	alias := func() error { pb.slot[out] = pb.slot[n.Inputs[0]]; return nil }
	switch n.OpType {
	case "Identity", "Reshape", "Flatten", "Squeeze", "Unsqueeze":
		if runtime[0] != 0 {
			return notPiecewise(n, i, "has a shape computed from the input")
		}
		return alias()
	case "Dropout":
		if n.AttrInt("is_test", 1) == 0 && pb.b.opset < 7 {
			return notPiecewise(n, i, "in training mode is random")
		}
		return alias()
	case "Cast":
		if to := onnxlite.DataType(n.AttrInt("to", 0)); !isFloat(to) {
			return notPiecewise(n, i, fmt.Sprintf("to %v is not piecewise-linear", to))
		}
		return alias()
	case "Gemm", "MatMul":
		return pb.dense(n, i)
	case "Conv":
		return pb.conv(n, i)
	case "Add", "Sub", "Mul", "Div":
		return pb.binary(n, i)
	case "Neg":
		return pb.elementwise(n, func(int) (T, T) { return -1, 0 })
	case "BatchNormalization":
		return pb.batchNorm(n, i)
	case "Transpose", "Concat", "Pad", "AveragePool", "GlobalAveragePool", "ReduceSum", "ReduceMean":
		return pb.gather(n, i)
	case "Relu", "LeakyRelu", "PRelu", "Clip", "Abs":
		return pb.kink(n, i)
	case "MaxPool", "GlobalMaxPool":
		return pb.maxPool(n, i)
	}
	return notPiecewise(n, i, "is not known to be piecewise-linear")
}

// add appends op with output value out.
func (pb *planBuilder[T]) add(op pathOp[T]) { pb.ops = append(pb.ops, op) }

// dense translates Gemm and MatMul with a constant right operand.
func (pb *planBuilder[T]) dense(n *onnxlite.Node, i int) error {
	if !pb.runtime(n, 0) || pb.runtime(n, 1) || pb.runtime(n, 2) {
		return notPiecewise(n, i, "multiplies run-time values other than a left operand by constant weights")
	}
	sa, sb := pb.b.shape(n.Inputs[0]), pb.b.shape(n.Inputs[1])
	b, err := pb.constant(n, 1)
	if err != nil {
		return err
	}
	d := &pathDense[T]{in: pb.slot[n.Inputs[0]]}
	if n.OpType == "MatMul" {
		if len(sa) == 0 || len(sb) < 1 || len(sb) > 2 {
			return notPiecewise(n, i, fmt.Sprintf("with operands of shapes %v and %v (constant right operands of rank 1 or 2 only)", sa, sb))
		}
		d.k = sa[len(sa)-1]
		d.m = prod(sa) / max(d.k, 1)
		d.n = 1
		if len(sb) == 2 {
			d.n = sb[1]
		}
		d.b = b
	} else {
		if len(sa) != 2 || len(sb) != 2 {
			return fmt.Errorf("Gemm: expected rank-2 A and B, got %v and %v", sa, sb)
		}
		d.transA = n.AttrInt("transA", 0) != 0
		d.m, d.k = sa[0], sa[1]
		if d.transA {
			d.m, d.k = sa[1], sa[0]
		}
		d.n = sb[1]
		alpha := T(n.AttrFloat("alpha", 1))
		if n.AttrInt("transB", 0) != 0 {
			d.n = sb[0]
			t := make([]T, len(b))
			for r := 0; r < sb[0]; r++ {
				for c := 0; c < sb[1]; c++ {
					t[c*sb[0]+r] = b[r*sb[1]+c]
				}
			}
			b = t
		}
		for j := range b {
			b[j] *= alpha
		}
		d.b = b
		if pb.b.has(n, 2) && n.AttrFloat("beta", 1) != 0 {
			c, err := pb.constant(n, 2)
			if err != nil {
				return err
			}
			idx, err := broadcastIndex([]int{d.m, d.n}, pb.b.shape(n.Inputs[2]))
			if err != nil {
				return err
			}
			beta := T(n.AttrFloat("beta", 1))
			d.bias = make([]T, d.m*d.n)
			for j, k := range idx {
				d.bias[j] = beta * c[k]
			}
		}
	}
	if len(b) != d.k*d.n {
		return fmt.Errorf("%s: weights of %d values for a %d×%d product", n.OpType, len(b), d.k, d.n)
	}
	d.setRows()
	d.out = pb.newSlot(n.Outputs[0])
	pb.add(d)
	return nil
}

func (pb *planBuilder[T]) conv(n *onnxlite.Node, i int) error {
	if !pb.runtime(n, 0) || pb.runtime(n, 1) || pb.runtime(n, 2) {
		return notPiecewise(n, i, "has run-time weights")
	}
	spec, err := pb.b.convSpec(n)
	if err != nil {
		return err
	}
	sx, sw := pb.b.shape(n.Inputs[0]), pb.b.shape(n.Inputs[1])
	if len(sx) == 0 || sx[0] != 1 {
		return fmt.Errorf("Conv: expected an input with a batch of one, got %v", sx)
	}
	plan, err := ops.NewConvPlan(sx[1:], sw, spec)
	if err != nil {
		return err
	}
	c := &pathConv[T]{in: pb.slot[n.Inputs[0]], plan: plan, inSize: prod(sx)}
	if c.w, err = pb.constant(n, 1); err != nil {
		return err
	}
	if pb.b.has(n, 2) {
		if c.b, err = pb.constant(n, 2); err != nil {
			return err
		}
	}
	c.out = pb.newSlot(n.Outputs[0])
	if pb.sizes[c.out] != prod(plan.Out) {
		return fmt.Errorf("Conv: output of %d values, shape inference gives %v", prod(plan.Out), pb.b.shape(n.Outputs[0]))
	}
	pb.add(c)
	return nil
}

// binary translates Add, Sub, Mul and Div with a constant operand (any of
// them) or two run-time operands (Add, Sub).
func (pb *planBuilder[T]) binary(n *onnxlite.Node, i int) error {
	if pb.b.opset < 7 && n.AttrInt("broadcast", 0) != 0 && n.Attr("axis") != nil {
		return notPiecewise(n, i, "with the broadcast axis of opsets before 7 is not run exactly")
	}
	ra, rb := pb.runtime(n, 0), pb.runtime(n, 1)
	outShape := pb.b.shape(n.Outputs[0])
	if ra && rb {
		if n.OpType == "Mul" || n.OpType == "Div" {
			return notPiecewise(n, i, "of two run-time values is not piecewise-linear")
		}
		sb := newSparse[T](prod(outShape))
		ia, err := broadcastIndex(outShape, pb.b.shape(n.Inputs[0]))
		if err != nil {
			return err
		}
		ib, err := broadcastIndex(outShape, pb.b.shape(n.Inputs[1]))
		if err != nil {
			return err
		}
		wb := T(1)
		if n.OpType == "Sub" {
			wb = -1
		}
		for j := range ia {
			sb.term(0, ia[j], 1)
			sb.term(1, ib[j], wb)
			sb.endRow(0)
		}
		return pb.addSparse(n, sb, []int{0, 1})
	}
	x, c := 0, 1
	if rb {
		x, c = 1, 0
	}
	if n.OpType == "Div" && x == 1 {
		return notPiecewise(n, i, "divides by a run-time value")
	}
	cv, err := pb.constant(n, c)
	if err != nil {
		return err
	}
	ic, err := broadcastIndex(outShape, pb.b.shape(n.Inputs[c]))
	if err != nil {
		return err
	}
	ix, err := broadcastIndex(outShape, pb.b.shape(n.Inputs[x]))
	if err != nil {
		return err
	}
	sb := newSparse[T](len(ix))
	for j := range ix {
		v := cv[ic[j]]
		var w, shift T
		switch {
		case n.OpType == "Add":
			w, shift = 1, v
		case n.OpType == "Sub" && x == 0:
			w, shift = 1, -v
		case n.OpType == "Sub":
			w, shift = -1, v
		case n.OpType == "Mul":
			w = v
		default: // Div x/c
			w = 1 / v
		}
		sb.term(0, ix[j], w)
		sb.endRow(shift)
	}
	return pb.addSparse(n, sb, []int{x})
}

// elementwise adds y_j = w_j·x_j + c_j for f(j) = (w_j, c_j).
func (pb *planBuilder[T]) elementwise(n *onnxlite.Node, f func(j int) (w, c T)) error {
	size := prod(pb.b.shape(n.Inputs[0]))
	sb := newSparse[T](size)
	for j := 0; j < size; j++ {
		w, c := f(j)
		sb.term(0, int32(j), w)
		sb.endRow(c)
	}
	return pb.addSparse(n, sb, []int{0})
}

func (pb *planBuilder[T]) batchNorm(n *onnxlite.Node, i int) error {
	s, t, runtime, err := pb.b.batchNormAffine(n)
	if err != nil {
		return err
	}
	if runtime || !pb.runtime(n, 0) {
		return notPiecewise(n, i, "has run-time parameters")
	}
	shape := pb.b.shape(n.Inputs[0])
	inner := prod(shape[2:])
	return pb.elementwise(n, func(j int) (T, T) {
		c := j / inner % shape[1]
		return T(s[c]), T(t[c])
	})
}

// addSparse appends the sparse operation of sb over the run-time inputs
// ins (input positions of n).
func (pb *planBuilder[T]) addSparse(n *onnxlite.Node, sb *pathSparse[T], ins []int) error {
	for _, j := range ins {
		sb.in = append(sb.in, pb.slot[n.Inputs[j]])
		sb.inSize = append(sb.inSize, prod(pb.b.shape(n.Inputs[j])))
	}
	sb.out = pb.newSlot(n.Outputs[0])
	if sb.size != pb.sizes[sb.out] {
		return fmt.Errorf("%s: %d output values, shape inference gives %v", n.OpType, sb.size, pb.b.shape(n.Outputs[0]))
	}
	pb.add(sb)
	return nil
}

// gather translates the linear operators that move, sum or average
// elements: Transpose, Concat, Pad, AveragePool, GlobalAveragePool,
// ReduceSum and ReduceMean.
func (pb *planBuilder[T]) gather(n *onnxlite.Node, i int) error {
	in := pb.b.shape(n.Inputs[0])
	outShape := pb.b.shape(n.Outputs[0])
	sb := newSparse[T](prod(outShape))
	switch n.OpType {
	case "Transpose":
		perm, err := transposePerm(n, len(in))
		if err != nil {
			return err
		}
		strides := stridesOf(in)
		forEachIndex(outShape, func(_ int, o []int) {
			k := 0
			for a, p := range perm {
				k += o[a] * strides[p]
			}
			sb.term(0, int32(k), 1)
			sb.endRow(0)
		})
	case "Concat":
		return pb.concat(n, outShape)
	case "Pad":
		pads, mode, value, err := pb.b.padArgs(n)
		if err != nil {
			return err
		}
		if mode != "constant" && mode != "reflect" && mode != "edge" {
			return notPiecewise(n, i, fmt.Sprintf("in mode %q is not run exactly", mode))
		}
		strides := stridesOf(in)
		r := len(in)
		forEachIndex(outShape, func(_ int, o []int) {
			k := 0
			for a := 0; a < r && k >= 0; a++ {
				j := padSource(o[a]-pads[a], in[a], mode)
				if j < 0 {
					k = -1
					break
				}
				k += j * strides[a]
			}
			if k >= 0 {
				sb.term(0, int32(k), 1)
				sb.endRow(0)
			} else {
				sb.endRow(T(value))
			}
		})
	case "AveragePool", "GlobalAveragePool":
		win, err := pb.windows(n, in, outShape)
		if err != nil {
			return err
		}
		for o := 0; o < len(win.start)-1; o++ {
			taps := win.col[win.start[o]:win.start[o+1]]
			d := T(win.div[o])
			for _, k := range taps {
				sb.term(0, k, 1/d)
			}
			sb.endRow(0)
		}
	case "ReduceSum", "ReduceMean":
		axes, noop, err := pb.b.st.ReduceAxes(n)
		if err != nil {
			return err
		}
		if noop {
			pb.slot[n.Outputs[0]] = pb.slot[n.Inputs[0]]
			return nil
		}
		return pb.reduce(n, in, outShape, axes)
	}
	return pb.addSparse(n, sb, []int{0})
}

// padSource maps coordinate j of the padded axis (j < 0 or j ≥ n in the
// padding) to the input coordinate it copies, or −1 for the constant.
func padSource(j, n int, mode string) int {
	if j >= 0 && j < n {
		return j
	}
	switch mode {
	case "edge":
		return min(max(j, 0), n-1)
	case "reflect":
		if n == 1 {
			return 0
		}
		period := 2 * (n - 1)
		j %= period
		if j < 0 {
			j += period
		}
		if j >= n {
			j = period - j
		}
		return j
	}
	return -1
}

func (pb *planBuilder[T]) concat(n *onnxlite.Node, outShape []int) error {
	axis, err := normAxis(int(n.AttrInt("axis", 0)), len(outShape))
	if err != nil {
		return err
	}
	outer := prod(outShape[:axis])
	inner := prod(outShape[axis+1:])
	type part struct {
		src    int // run-time input number, or −1
		consts []T
		width  int // along the axis
	}
	var parts []part
	var ins []int
	for j, name := range n.Inputs {
		if name == "" {
			continue
		}
		p := part{src: -1, width: pb.b.shape(name)[axis]}
		if pb.runtime(n, j) {
			p.src = len(ins)
			ins = append(ins, j)
		} else if p.consts, err = pb.constant(n, j); err != nil {
			return err
		}
		parts = append(parts, p)
	}
	sb := newSparse[T](prod(outShape))
	for o := 0; o < outer; o++ {
		for _, p := range parts {
			for a := 0; a < p.width; a++ {
				for r := 0; r < inner; r++ {
					k := (o*p.width+a)*inner + r
					if p.src < 0 {
						sb.endRow(p.consts[k])
						continue
					}
					sb.term(uint8(p.src), int32(k), 1)
					sb.endRow(0)
				}
			}
		}
	}
	return pb.addSparse(n, sb, ins)
}

func (pb *planBuilder[T]) reduce(n *onnxlite.Node, in, outShape []int, axes []int) error {
	r := len(in)
	reduced := make([]bool, r)
	for _, a := range axes {
		reduced[a] = true
	}
	if len(axes) == 0 {
		for a := range reduced {
			reduced[a] = true
		}
	}
	// The output index of every input element, with the reduced axes
	// dropped (keepdims does not move the data).
	var kept []int
	for a := 0; a < r; a++ {
		if !reduced[a] {
			kept = append(kept, in[a])
		}
	}
	ks := stridesOf(kept)
	rows := make([][]int32, prod(kept))
	forEachIndex(in, func(flat int, idx []int) {
		o, q := 0, 0
		for a := 0; a < r; a++ {
			if !reduced[a] {
				o += idx[a] * ks[q]
				q++
			}
		}
		rows[o] = append(rows[o], int32(flat))
	})
	if len(rows) != prod(outShape) {
		return fmt.Errorf("%s: %d outputs, shape inference gives %v", n.OpType, len(rows), outShape)
	}
	sb := newSparse[T](len(rows))
	for _, row := range rows {
		w := T(1)
		if n.OpType == "ReduceMean" {
			w = 1 / T(len(row))
		}
		for _, k := range row {
			sb.term(0, k, w)
		}
		sb.endRow(0)
	}
	return pb.addSparse(n, sb, []int{0})
}

// poolWindows lists, for every output element of a pool over one sample,
// the input elements of its window (row-major flat indices) and the
// AveragePool divisor.
type poolWindows struct {
	start []int32 // len outputs+1
	col   []int32
	div   []int
}

// windows computes the windows of pool node n over a sample of shape in
// (1, C, spatial...) with output shape out. Padding never takes part: a
// max pool ignores it and an average pool divides by the taps inside the
// input, or with count_include_pad by those inside the padded input (ONNX
// AveragePool; ops.AvgPool).
func (pb *planBuilder[T]) windows(n *onnxlite.Node, in, out []int) (*poolWindows, error) {
	if len(in) < 3 || len(out) != len(in) {
		return nil, fmt.Errorf("%s: expected (N, C, spatial...) input, got %v", n.OpType, in)
	}
	sp := in[2:]
	r := len(sp)
	var kernel, strides, dils, pads []int
	includePad := false
	if n.OpType == "GlobalAveragePool" || n.OpType == "GlobalMaxPool" {
		kernel, strides, dils, pads = sp, ones(r), ones(r), make([]int, 2*r)
	} else {
		spec, err := pb.b.poolSpec(n)
		if err != nil {
			return nil, err
		}
		kernel, strides, dils, pads = spec.Kernel, spec.Strides, spec.Dilations, spec.Pads
		includePad = spec.CountIncludePad && n.OpType == "AveragePool"
	}
	w := &poolWindows{start: []int32{0}}
	planes := in[0] * in[1]
	plane := prod(sp)
	ss := stridesOf(sp)
	taps := make([]int, r)
	for pl := 0; pl < planes; pl++ {
		forEachIndex(out[2:], func(_ int, o []int) {
			inside, padded := 0, 1
			for a := 0; a < r; a++ {
				cnt := 0
				for t := 0; t < kernel[a]; t++ {
					pos := o[a]*strides[a] - pads[a] + t*dils[a]
					if pos >= -pads[a] && pos < sp[a]+pads[a+r] {
						cnt++
					}
				}
				padded *= cnt
			}
			forEachIndex(kernel, func(_ int, k []int) {
				flat := 0
				for a := 0; a < r; a++ {
					taps[a] = o[a]*strides[a] - pads[a] + k[a]*dils[a]
					if taps[a] < 0 || taps[a] >= sp[a] {
						return
					}
					flat += taps[a] * ss[a]
				}
				w.col = append(w.col, int32(pl*plane+flat))
				inside++
			})
			w.start = append(w.start, int32(len(w.col)))
			if includePad {
				w.div = append(w.div, padded)
			} else {
				w.div = append(w.div, inside)
			}
		})
	}
	return w, nil
}

func (pb *planBuilder[T]) kink(n *onnxlite.Node, i int) error {
	shape := pb.b.shape(n.Inputs[0])
	k := &pathKinkOp[T]{in: pb.slot[n.Inputs[0]], size: prod(shape), lo: 0, hi: math.Inf(1)}
	switch n.OpType {
	case "Relu":
		k.kind = kinkRelu
	case "Abs":
		k.kind = kinkAbs
	case "LeakyRelu":
		alpha, _ := unaryParams(n)
		k.kind, k.slope = kinkLeaky, []T{T(alpha)}
	case "PRelu":
		if !pb.runtime(n, 0) || pb.runtime(n, 1) {
			return notPiecewise(n, i, "has a run-time slope")
		}
		s, err := pb.constant(n, 1)
		if err != nil {
			return err
		}
		idx, err := broadcastIndex(shape, preluSlopeShape(shape, pb.b.shape(n.Inputs[1])))
		if err != nil {
			return err
		}
		k.kind, k.slope = kinkLeaky, make([]T, len(idx))
		for j, q := range idx {
			k.slope[j] = s[q]
		}
	case "Clip":
		lo, hi, runtime, err := pb.b.clipBounds(n)
		if err != nil {
			return err
		}
		if runtime {
			return notPiecewise(n, i, "has run-time bounds")
		}
		k.kind, k.lo, k.hi = kinkClip, lo, hi
	}
	k.out = pb.newSlot(n.Outputs[0])
	pb.add(k)
	return nil
}

func (pb *planBuilder[T]) maxPool(n *onnxlite.Node, i int) error {
	in, out := pb.b.shape(n.Inputs[0]), pb.b.shape(n.Outputs[0])
	win, err := pb.windows(n, in, out)
	if err != nil {
		return err
	}
	for o := 0; o+1 < len(win.start); o++ {
		if win.start[o] == win.start[o+1] {
			return notPiecewise(n, i, "has a window outside the input")
		}
	}
	m := &pathMaxPool[T]{in: pb.slot[n.Inputs[0]], inSize: prod(in), start: win.start, col: win.col}
	m.out = pb.newSlot(n.Outputs[0])
	pb.add(m)
	return nil
}

// broadcastIndex maps every element of shape out to the element of shape
// in that numpy broadcasting gives it.
func broadcastIndex(out, in []int) ([]int32, error) {
	if len(in) > len(out) {
		return nil, fmt.Errorf("%w: cannot broadcast %v to %v", ErrShape, in, out)
	}
	pad := append(ones(len(out)-len(in)), in...)
	strides := stridesOf(pad)
	for a := range pad {
		if pad[a] == 1 {
			strides[a] = 0
		} else if pad[a] != out[a] {
			return nil, fmt.Errorf("%w: cannot broadcast %v to %v", ErrShape, in, out)
		}
	}
	idx := make([]int32, 0, prod(out))
	forEachIndex(out, func(_ int, o []int) {
		k := 0
		for a, v := range o {
			k += v * strides[a]
		}
		idx = append(idx, int32(k))
	})
	return idx, nil
}

// stridesOf returns the row-major strides of shape.
func stridesOf(shape []int) []int {
	s := make([]int, len(shape))
	acc := 1
	for a := len(shape) - 1; a >= 0; a-- {
		s[a] = acc
		acc *= shape[a]
	}
	return s
}

// forEachIndex calls f with every multi-index of shape in row-major order
// and its flat position; idx is reused between calls.
func forEachIndex(shape []int, f func(flat int, idx []int)) {
	total := prod(shape)
	idx := make([]int, len(shape))
	for flat := 0; flat < total; flat++ {
		f(flat, idx)
		for a := len(shape) - 1; a >= 0; a-- {
			idx[a]++
			if idx[a] < shape[a] {
				break
			}
			idx[a] = 0
		}
	}
}
