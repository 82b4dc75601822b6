package ops

import (
	"fmt"
	"hash"
	"hash/fnv"
	"math"
	"slices"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// This file holds the binary elementwise kernels (Add, Sub, Mul, Div, PRelu)
// with numpy broadcasting, and the value and index helpers that every
// kernel in unary.go, softmax.go and reduce.go shares.

// binaryKinds lists the binary ops Binary accepts.
var binaryKinds = map[string]bool{"Add": true, "Sub": true, "Mul": true, "Div": true, "Pow": true, "PRelu": true,
	"Max": true, "Min": true, "Equal": true, "Less": true, "Greater": true}

// comparisons are the binary kinds whose result is 1 or 0 (true or false):
// piecewise constant, so no gradient flows through them.
var comparisons = map[string]bool{"Equal": true, "Less": true, "Greater": true}

// Binary applies Add, Sub, Mul, Div or PRelu (x<0 ? slope*x : x,
// slope broadcast to x) with numpy broadcasting; gradients reduce over
// broadcast axes. It also takes Pow with a tensor exponent, y = a^b, whose
// gradients are ∂y/∂a = b·a^(b-1) and ∂y/∂b = a^b·ln a (0 where a = 0, NaN
// where a < 0, as ln is); unary covers the common constant exponent. Max
// and Min pass the gradient to the larger (smaller) operand, half to each
// where they are equal (torch.maximum and torch.minimum do so, from
// memory). Equal, Less and Greater give 1 where the comparison holds and 0
// elsewhere, and no gradient.
//
// Shapes are aligned on their last axis and every pair of sizes must be
// equal or contain a 1 (ONNX Broadcasting.md, multidirectional). For PRelu
// the broadcast is unidirectional: the slope b must broadcast to the shape
// of x, and the output has the shape of x.
func Binary(a, b *G.Node, op string) (out *G.Node, err error) {
	if a == nil || b == nil {
		return nil, fmt.Errorf("nn: %s: nil operand", op)
	}
	if !binaryKinds[op] {
		return nil, fmt.Errorf("nn: binary op %q: %w", op, errUnknownOp)
	}
	dt, err := dtypeOf(op, a)
	if err != nil {
		return nil, err
	}
	if dtb, err := dtypeOf(op, b); err != nil {
		return nil, err
	} else if dtb != dt {
		return nil, fmt.Errorf("nn: %s: operands have element types %v and %v, want the same", op, dt, dtb)
	}
	as, bs := []int(a.Shape()), []int(b.Shape())
	os, err := broadcastShape(as, bs)
	if err != nil {
		return nil, fmt.Errorf("nn: %s: %w", op, err)
	}
	if op == "PRelu" && !slices.Equal(os, as) {
		return nil, fmt.Errorf("nn: PRelu: slope shape %v does not broadcast to input shape %v", bs, as)
	}
	bop := &binaryOp{kind: op, dt: dt, aShape: as, bShape: bs, outShape: os,
		aType: a.Type(), bType: b.Type(), outType: nodeType(dt, len(os)),
		fixed: [2]bool{fixed(a) || comparisons[op], fixed(b) || comparisons[op]}}
	return G.ApplyOp(bop, a, b)
}

// broadcastShape returns the numpy broadcast of two shapes.
func broadcastShape(a, b []int) ([]int, error) {
	n := max(len(a), len(b))
	out := make([]int, n)
	for i := 1; i <= n; i++ {
		da, db := 1, 1
		if i <= len(a) {
			da = a[len(a)-i]
		}
		if i <= len(b) {
			db = b[len(b)-i]
		}
		switch {
		case da == db, db == 1:
			out[n-i] = da
		case da == 1:
			out[n-i] = db
		default:
			return nil, fmt.Errorf("%w: shapes %v and %v differ at axis %d from the end (%d vs %d)", ErrShape, a, b, i, da, db)
		}
	}
	return out, nil
}

// broadcastStrides returns, for each axis of out, the element stride of
// a row-major array of shape in (aligned on the last axis), or 0 where in is
// broadcast along that axis.
func broadcastStrides(in, out []int) []int {
	st := make([]int, len(out))
	s := 1
	for i := 1; i <= len(out); i++ {
		if i > len(in) {
			break
		}
		d := in[len(in)-i]
		if d != 1 || out[len(out)-i] == 1 {
			st[len(out)-i] = s
		}
		s *= d
	}
	return st
}

// eachRow walks shape row by row in row-major order. For every row (all
// axes but the last) it calls fn with the offset of the row in the output
// and the matching offsets in two broadcast operands with strides sa and
// sb. A rank-0 shape is a single row of length 1.
func eachRow(shape, sa, sb []int, fn func(o, ia, ib int)) {
	r := len(shape)
	if r == 0 {
		fn(0, 0, 0)
		return
	}
	for _, d := range shape {
		if d == 0 {
			return
		}
	}
	n := shape[r-1]
	idx := make([]int, r-1)
	o, ia, ib := 0, 0, 0
	for {
		fn(o, ia, ib)
		o += n
		k := r - 2
		for ; k >= 0; k-- {
			idx[k]++
			ia += sa[k]
			ib += sb[k]
			if idx[k] < shape[k] {
				break
			}
			ia -= sa[k] * shape[k]
			ib -= sb[k] * shape[k]
			idx[k] = 0
		}
		if k < 0 {
			return
		}
	}
}

// binaryFunc returns y = f(a, b) for a binary op.
func binaryFunc[T float](kind string) func(a, b T) T {
	switch kind {
	case "Add":
		return func(a, b T) T { return a + b }
	case "Sub":
		return func(a, b T) T { return a - b }
	case "Mul":
		return func(a, b T) T { return a * b }
	case "Div":
		return func(a, b T) T { return a / b }
	case "Pow":
		return func(a, b T) T { return T(math.Pow(float64(a), float64(b))) }
	case "Max":
		return func(a, b T) T {
			if a != a || b != b {
				return a + b // NaN propagates
			}
			return max(a, b)
		}
	case "Min":
		return func(a, b T) T {
			if a != a || b != b {
				return a + b
			}
			return min(a, b)
		}
	case "Equal":
		return func(a, b T) T { return truth[T](a == b) }
	case "Less":
		return func(a, b T) T { return truth[T](a < b) }
	case "Greater":
		return func(a, b T) T { return truth[T](a > b) }
	default: // PRelu
		return func(x, s T) T {
			if x < 0 {
				return s * x
			}
			return x
		}
	}
}

// binaryGrad returns g·∂f/∂a (which == 0) or g·∂f/∂b (which == 1).
func binaryGrad[T float](kind string, which int) func(a, b, g T) T {
	switch kind + fmt.Sprint(which) {
	case "Add0", "Add1", "Sub0":
		return func(a, b, g T) T { return g }
	case "Sub1":
		return func(a, b, g T) T { return -g }
	case "Mul0":
		return func(a, b, g T) T { return g * b }
	case "Mul1":
		return func(a, b, g T) T { return g * a }
	case "Div0":
		return func(a, b, g T) T { return g / b }
	case "Div1": // ∂(a/b)/∂b = -a/b²
		return func(a, b, g T) T { return -g * a / (b * b) }
	case "Pow0":
		return func(a, b, g T) T {
			if b == 0 {
				return 0
			}
			return g * b * T(math.Pow(float64(a), float64(b-1)))
		}
	case "Pow1":
		return func(a, b, g T) T {
			if a == 0 {
				return 0
			}
			return g * T(math.Pow(float64(a), float64(b))*math.Log(float64(a)))
		}
	case "Max0", "Min1":
		return func(a, b, g T) T { return g * split[T](a > b, a == b) }
	case "Max1", "Min0":
		return func(a, b, g T) T { return g * split[T](b > a, a == b) }
	case "PRelu0":
		return func(x, s, g T) T {
			if x < 0 {
				return g * s
			}
			return g
		}
	default: // PRelu1
		return func(x, s, g T) T {
			if x < 0 {
				return g * x
			}
			return 0
		}
	}
}

// truth is 1 for true and 0 for false.
func truth[T float](b bool) T {
	if b {
		return 1
	}
	return 0
}

// split is the share of the gradient of max(a, b) that goes to a: 1 where
// a wins, a half where they tie, 0 where b wins.
func split[T float](wins, tie bool) T {
	switch {
	case wins:
		return 1
	case tie:
		return 0.5
	}
	return 0
}

// binaryOp is the forward op of Binary.
type binaryOp struct {
	kind                     string
	dt                       tensor.Dtype
	aShape, bShape, outShape []int
	aType, bType, outType    hm.Type
	// fixed marks operands no runtime input reaches (see fixed):
	// their gradients are never built.
	fixed [2]bool
}

func (op *binaryOp) Arity() int        { return 2 }
func (op *binaryOp) Type() hm.Type     { return hm.NewFnType(op.aType, op.bType, op.outType) }
func (op *binaryOp) ReturnsPtr() bool  { return op.OverwritesInput() >= 0 }
func (op *binaryOp) CallsExtern() bool { return false }

// OverwritesInput names an operand that has the output's shape: output
// element k reads element k of it, so the kernel may write over it.
func (op *binaryOp) OverwritesInput() int {
	switch {
	case slices.Equal(op.aShape, op.outShape):
		return 0
	case slices.Equal(op.bShape, op.outShape):
		return 1
	}
	return -1
}
func (op *binaryOp) String() string { return op.kind }
func (op *binaryOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "elem.%s%v%v%v%v", op.kind, op.dt, op.aShape, op.bShape, op.fixed)
}
func (op *binaryOp) Hashcode() uint32 { return hashOp(op) }
func (op *binaryOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return tensor.Shape(op.outShape).Clone(), nil
}
func (op *binaryOp) DiffWRT(int) []bool { return []bool{!op.fixed[0], !op.fixed[1]} }

func (op *binaryOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 2 {
		return nil, fmt.Errorf("nn: %s gradient: got %d inputs, want 2", op.kind, len(inputs))
	}
	out := make(G.Nodes, 2)
	for w := 0; w < 2; w++ {
		if op.fixed[w] {
			continue
		}
		d := &binaryDiffOp{binaryOp: op, which: w}
		n, err := G.ApplyOp(d, inputs[0], inputs[1], grad)
		if err != nil {
			return nil, fmt.Errorf("nn: %s gradient: %w", op.kind, err)
		}
		out[w] = n
	}
	return out, nil
}

func (op *binaryOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *binaryOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 2 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 2", op.kind, len(vs))
	}
	if op.dt == tensor.Float32 {
		return binaryRun[float32](op, p, vs)
	}
	return binaryRun[float64](op, p, vs)
}

func binaryRun[T float](op *binaryOp, p G.Value, vs []G.Value) (G.Value, error) {
	a, err := valuesOf[T](op.kind, vs[0], op.aShape)
	if err != nil {
		return nil, err
	}
	b, err := valuesOf[T](op.kind, vs[1], op.bShape)
	if err != nil {
		return nil, err
	}
	// Output element k reads element k of an operand of the output's shape,
	// so y may be such an operand, never a broadcast one.
	same, other := sortOperands(shapeSize(op.outShape), a, b)
	v, y := allocOutput[T](p, op.dt, op.outShape, same[:], other[:]...)
	f := binaryFunc[T](op.kind)
	code := arithCode(op.kind)
	if len(a) == len(y) && len(b) == len(y) {
		if !arithRow(code, y, a, b, 1, 1) {
			for i := range y {
				y[i] = f(a[i], b[i])
			}
		}
		return wrap(v, y), nil
	}
	sa := broadcastStrides(op.aShape, op.outShape)
	sb := broadcastStrides(op.bShape, op.outShape)
	n, la, lb := 1, 0, 0
	if r := len(op.outShape); r > 0 {
		n, la, lb = op.outShape[r-1], sa[r-1], sb[r-1]
	}
	eachRow(op.outShape, sa, sb, func(o, ia, ib int) {
		row := y[o : o+n]
		if arithRow(code, row, a[ia:], b[ib:], la, lb) {
			return
		}
		for j := range row {
			row[j] = f(a[ia+j*la], b[ib+j*lb])
		}
	})
	return wrap(v, y), nil
}

// binaryDiffOp computes the gradient of a broadcast binary op with
// respect to input which, summed over the axes along which that input was
// broadcast: inputs (a, b, g), output shaped like input which.
type binaryDiffOp struct {
	*binaryOp
	which int
}

func (op *binaryDiffOp) Arity() int { return 3 }

// OverwritesInput is the incoming gradient when input which was not
// broadcast: then each element of the result reads only its own element of g.
func (op *binaryDiffOp) OverwritesInput() int {
	if slices.Equal(op.wrtShape(), op.outShape) {
		return 2
	}
	return -1
}
func (op *binaryDiffOp) ReturnsPtr() bool { return op.OverwritesInput() >= 0 }
func (op *binaryDiffOp) wrtShape() []int {
	if op.which == 1 {
		return op.bShape
	}
	return op.aShape
}
func (op *binaryDiffOp) Type() hm.Type {
	t := op.aType
	if op.which == 1 {
		t = op.bType
	}
	return hm.NewFnType(op.aType, op.bType, op.outType, t)
}
func (op *binaryDiffOp) String() string { return fmt.Sprintf("∂%s/∂x%d", op.kind, op.which) }
func (op *binaryDiffOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "elem.d%s.%d%v%v%v", op.kind, op.which, op.dt, op.aShape, op.bShape)
}
func (op *binaryDiffOp) Hashcode() uint32 { return hashOp(op) }
func (op *binaryDiffOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	if op.which == 1 {
		return tensor.Shape(op.bShape).Clone(), nil
	}
	return tensor.Shape(op.aShape).Clone(), nil
}
func (op *binaryDiffOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *binaryDiffOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 3 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 3", op, len(vs))
	}
	if op.dt == tensor.Float32 {
		return binaryDiffRun[float32](op, p, vs)
	}
	return binaryDiffRun[float64](op, p, vs)
}

func binaryDiffRun[T float](op *binaryDiffOp, p G.Value, vs []G.Value) (G.Value, error) {
	a, err := valuesOf[T](op.kind, vs[0], op.aShape)
	if err != nil {
		return nil, err
	}
	b, err := valuesOf[T](op.kind, vs[1], op.bShape)
	if err != nil {
		return nil, err
	}
	g, err := valuesOf[T](op.kind, vs[2], op.outShape)
	if err != nil {
		return nil, err
	}
	shape := op.wrtShape()
	df := binaryGrad[T](op.kind, op.which)
	var v G.Value
	var d []T
	if size := shapeSize(shape); size == len(g) {
		// One term per element of d: d may be g, or the operand it
		// differentiates for, but no broadcast operand.
		same, other := sortOperands(size, a, b, g)
		v, d = allocOutput[T](p, op.dt, shape, same[:], other[:]...)
	} else {
		// Summing over broadcast axes needs a buffer that no input shares.
		v, d = allocOutput[T](p, op.dt, shape, nil, spanOf(a), spanOf(b), spanOf(g))
	}
	// g·∂f/∂x for Add, Sub and Mul as one row operation on g: dg (which
	// operand g meets), its stride, and the op; pass is set when the
	// gradient is g itself.
	pass := false
	dcode, dwith := -1, 0 // arithMul with b (0) or a (1)
	switch op.kind + fmt.Sprint(op.which) {
	case "Add0", "Add1", "Sub0":
		pass = true
	case "Mul0":
		dcode, dwith = arithMul, 0
	case "Mul1":
		dcode, dwith = arithMul, 1
	}
	if len(a) == len(g) && len(b) == len(g) {
		switch {
		case pass:
			copy(d, g)
		case dcode >= 0 && dwith == 0:
			arithRow(dcode, d, g, b, 1, 1)
		case dcode >= 0:
			arithRow(dcode, d, g, a, 1, 1)
		default:
			for i := range d {
				d[i] = df(a[i], b[i], g[i])
			}
		}
		return wrap(v, d), nil
	}
	sa := broadcastStrides(op.aShape, op.outShape)
	sb := broadcastStrides(op.bShape, op.outShape)
	n, la, lb := 1, 0, 0
	if r := len(op.outShape); r > 0 {
		n, la, lb = op.outShape[r-1], sa[r-1], sb[r-1]
	}
	if len(d) == len(g) {
		// Input which was not broadcast: one term per element.
		if pass {
			copy(d, g)
			return wrap(v, d), nil
		}
		eachRow(op.outShape, sa, sb, func(o, ia, ib int) {
			switch {
			case dcode >= 0 && dwith == 0 && arithRow(dcode, d[o:o+n], g[o:], b[ib:], 1, lb):
				return
			case dcode >= 0 && dwith == 1 && arithRow(dcode, d[o:o+n], g[o:], a[ia:], 1, la):
				return
			}
			for j := range n {
				d[o+j] = df(a[ia+j*la], b[ib+j*lb], g[o+j])
			}
		})
		return wrap(v, d), nil
	}
	clear(d)
	eachRow(op.outShape, sa, sb, func(o, ia, ib int) {
		row := g[o : o+n]
		if op.which == 0 {
			for j, gj := range row {
				d[ia+j*la] += df(a[ia+j*la], b[ib+j*lb], gj)
			}
			return
		}
		for j, gj := range row {
			d[ib+j*lb] += df(a[ia+j*la], b[ib+j*lb], gj)
		}
	})
	return wrap(v, d), nil
}

// The arithmetic ops that arithRow runs without a function call per element.
const (
	arithAdd = iota
	arithSub
	arithMul
	arithDiv
)

// arithCode returns the arith code of a binary op kind, or -1.
func arithCode(kind string) int {
	switch kind {
	case "Add":
		return arithAdd
	case "Sub":
		return arithSub
	case "Mul":
		return arithMul
	case "Div":
		return arithDiv
	}
	return -1
}

// arithRow stores y[j] = a[j·la] ∘ b[j·lb] for j < len(y), where ∘ is the
// op of code and each stride is 0 (a broadcast scalar, the bias case) or 1.
// It reports false, writing nothing, for other codes or strides. Every
// element is the one IEEE operation binaryFunc performs.
func arithRow[T float](code int, y, a, b []T, la, lb int) bool {
	n := len(y)
	if code < 0 || n == 0 || la < 0 || la > 1 || lb < 0 || lb > 1 || (la == 0 && lb == 0) {
		return false
	}
	switch {
	case la == 1 && lb == 1:
		a, b = a[:n], b[:n]
		switch code {
		case arithAdd:
			for i := range y {
				y[i] = a[i] + b[i]
			}
		case arithSub:
			for i := range y {
				y[i] = a[i] - b[i]
			}
		case arithMul:
			for i := range y {
				y[i] = a[i] * b[i]
			}
		default:
			for i := range y {
				y[i] = a[i] / b[i]
			}
		}
	case la == 1:
		a, s := a[:n], b[0]
		switch code {
		case arithAdd:
			for i := range y {
				y[i] = a[i] + s
			}
		case arithSub:
			for i := range y {
				y[i] = a[i] - s
			}
		case arithMul:
			for i := range y {
				y[i] = a[i] * s
			}
		default:
			for i := range y {
				y[i] = a[i] / s
			}
		}
	default:
		s, b := a[0], b[:n]
		switch code {
		case arithAdd:
			for i := range y {
				y[i] = s + b[i]
			}
		case arithSub:
			for i := range y {
				y[i] = s - b[i]
			}
		case arithMul:
			for i := range y {
				y[i] = s * b[i]
			}
		default:
			for i := range y {
				y[i] = s / b[i]
			}
		}
	}
	return true
}

// hashOp hashes an op by its WriteHash text.
func hashOp(op interface{ WriteHash(hash.Hash) }) uint32 {
	h := fnv.New32a()
	op.WriteHash(h)
	return h.Sum32()
}

// shapeSize returns the number of elements of a shape (1 for rank 0).
func shapeSize(s []int) int {
	n := 1
	for _, d := range s {
		n *= d
	}
	return n
}
