package onnxlite

import (
	"fmt"
	"math"
	"reflect"
	"slices"
)

// maxFloatFold bounds the element count of float Add/Sub/Mul/Div/Neg that
// Infer evaluates; larger float arithmetic stays in the graph for nn.
const maxFloatFold = 4096

// foldable are the operators Infer evaluates when all their inputs are constant.
var foldable = map[string]bool{
	"Shape": true, "Gather": true, "Slice": true, "Squeeze": true, "Unsqueeze": true,
	"Concat": true, "Cast": true, "Constant": true, "ConstantOfShape": true, "Range": true,
	"Reshape": true, "Identity": true, "Flatten": true,
	"Add": true, "Sub": true, "Mul": true, "Div": true, "Neg": true,
}

func isIntType(dt DataType) bool {
	switch dt {
	case Int8, Uint8, Int16, Uint16, Int32, Uint32, Int64, Uint64:
		return true
	}
	return false
}

// canFold reports whether the node, whose inputs are all constant, is evaluated.
func canFold(c *nodeCtx) bool {
	op := c.n.OpType
	if !foldable[op] {
		return false
	}
	switch op {
	case "Add", "Sub", "Mul", "Div", "Neg":
		dt := Undefined
		total := int64(0)
		for i, t := range c.consts {
			if t == nil {
				continue
			}
			if i == 0 {
				dt = t.DType
			} else if t.DType != dt {
				return false
			}
			total = max(total, t.NumElements())
		}
		if isIntType(dt) {
			return true
		}
		return (dt == Float || dt == Double) && total <= maxFloatFold
	case "Cast":
		to, err := castTarget(c)
		return err == nil && c.consts[0] != nil && castable(c.consts[0].DType) && castable(to)
	}
	return true
}

// castable are the element types the folding Cast converts between exactly.
func castable(dt DataType) bool {
	return isIntType(dt) || dt == Float || dt == Double || dt == Bool
}

// foldShape evaluates Shape: the inferred shape of its input, sliced by start
// and end (opset 15; both clamp to [0, rank], negative values count from the end).
func foldShape(c *nodeCtx) ([]*Tensor, error) {
	x, err := c.need(0)
	if err != nil {
		return nil, err
	}
	r := int64(len(x.Shape))
	clamp := func(v int64) int64 {
		if v < 0 {
			v += r
		}
		return min(max(v, 0), r)
	}
	start, end := int64(0), r
	if c.opset >= 15 {
		start = clamp(c.n.AttrInt("start", 0))
		if a := c.n.Attr("end"); a != nil {
			end = clamp(a.I)
		}
	}
	vals := []int64{}
	for i := start; i < end; i++ {
		vals = append(vals, int64(x.Shape[i]))
	}
	return c.tensors(newTensor(Int64, []int{len(vals)}, vals))
}

// tensors wraps one result in a slice, turning a construction error into a node error.
func (c *nodeCtx) tensors(t *Tensor, err error) ([]*Tensor, error) {
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	return []*Tensor{t}, nil
}

func newTensor(dt DataType, shape []int, data any) (*Tensor, error) {
	dims := make([]int64, len(shape))
	for i, d := range shape {
		dims[i] = int64(d)
	}
	return NewTensor("", dt, dims, data)
}

// fold evaluates a node whose inputs are all constant.
func fold(c *nodeCtx) ([]*Tensor, error) {
	var x *Tensor
	if len(c.consts) > 0 {
		x = c.consts[0]
	}
	needX := func() error {
		if x == nil {
			return c.errorf("expected input 0, got none")
		}
		return nil
	}
	switch c.n.OpType {
	case "Constant":
		return foldConstant(c)
	case "ConstantOfShape":
		return foldConstantOfShape(c)
	case "Range":
		return foldRange(c)
	case "Add", "Sub", "Mul", "Div", "Neg":
		return foldArith(c)
	}
	if err := needX(); err != nil {
		return nil, err
	}
	switch c.n.OpType {
	case "Identity":
		return c.tensors(NewTensor("", x.DType, slices.Clone(x.Dims), x.Data))
	case "Reshape", "Flatten", "Squeeze", "Unsqueeze":
		// The shape rule validates the target shape; the data is shared as it is.
		vs, err := c.outShapes()
		if err != nil {
			return nil, err
		}
		return c.tensors(newTensor(x.DType, vs[0].Shape, x.Data))
	case "Cast":
		to, err := castTarget(c)
		if err != nil {
			return nil, err
		}
		data, err := castData(x, to)
		if err != nil {
			return nil, c.errorf("%v", err)
		}
		return c.tensors(NewTensor("", to, slices.Clone(x.Dims), data))
	case "Concat":
		return foldConcat(c)
	case "Gather":
		return foldGather(c)
	case "Slice":
		return foldSlice(c)
	}
	return nil, c.errorf("no folding rule")
}

// foldConstant reads the Constant node's single value attribute.
func foldConstant(c *nodeCtx) ([]*Tensor, error) {
	if len(c.n.Attrs) != 1 {
		return nil, c.errorf("expected exactly one value attribute, got %d attributes", len(c.n.Attrs))
	}
	a := c.n.Attrs[0]
	switch a.Name {
	case "value":
		if a.T == nil {
			return nil, c.errorf("value: expected a tensor, got attribute type %d", a.Type)
		}
		if err := checkTensor(a.T); err != nil {
			return nil, c.errorf("value: %v", err)
		}
		return c.tensors(NewTensor("", a.T.DType, slices.Clone(a.T.Dims), a.T.Data))
	case "value_float":
		return c.tensors(NewTensor("", Float, []int64{}, []float32{a.F}))
	case "value_floats":
		return c.tensors(NewTensor("", Float, []int64{int64(len(a.Floats))}, slices.Clone(a.Floats)))
	case "value_int":
		return c.tensors(NewTensor("", Int64, []int64{}, []int64{a.I}))
	case "value_ints":
		return c.tensors(NewTensor("", Int64, []int64{int64(len(a.Ints))}, slices.Clone(a.Ints)))
	case "value_string":
		return c.tensors(NewTensor("", String, []int64{}, [][]byte{[]byte(a.S)}))
	case "value_strings":
		data := make([][]byte, len(a.Strings))
		for i, s := range a.Strings {
			data[i] = []byte(s)
		}
		return c.tensors(NewTensor("", String, []int64{int64(len(data))}, data))
	case "sparse_value":
		return nil, c.errorf("sparse_value: sparse constants are not supported: %w", ErrUnsupported)
	}
	return nil, c.errorf("attribute %q: expected value, value_float(s), value_int(s) or value_string(s)", a.Name)
}

// foldConstantOfShape fills the shape given by input 0 with the one-element
// value attribute (float32 zero by default).
func foldConstantOfShape(c *nodeCtx) ([]*Tensor, error) {
	dims, err := c.requiredInts(0, "shape")
	if err != nil {
		return nil, err
	}
	shape := make([]int, len(dims))
	for i, d := range dims {
		if d < 0 {
			return nil, c.errorf("shape %v: expected non-negative dims", dims)
		}
		shape[i] = int(d)
	}
	if err := checkValueLimits(c.n.Outputs[0], ValueShape{Shape: shape}); err != nil {
		return nil, c.wrap(err)
	}
	fill := reflect.ValueOf(float32(0))
	dt := Float
	if a := c.n.Attr("value"); a != nil {
		if a.T == nil || checkTensor(a.T) != nil || a.T.NumElements() != 1 {
			return nil, c.errorf("value: expected a one-element tensor")
		}
		dt = a.T.DType
		fill = reflect.ValueOf(a.T.Data).Index(0)
	}
	n := prod(shape)
	data := reflect.MakeSlice(sliceType(dt), n, n)
	for i := 0; i < n; i++ {
		data.Index(i).Set(fill)
	}
	return c.tensors(newTensor(dt, shape, data.Interface()))
}

// foldRange: output[i] = start + i·delta for i < max(⌈(limit − start)/delta⌉, 0)
// (ONNX Range, opset 11).
func foldRange(c *nodeCtx) ([]*Tensor, error) {
	var ts [3]*Tensor
	for i, what := range []string{"start", "limit", "delta"} {
		if c.input(i) == nil {
			return nil, c.errorf("expected input %s, got none", what)
		}
		ts[i] = c.consts[i]
		if ts[i].NumElements() != 1 {
			return nil, c.errorf("%s: expected a scalar, got dims %v", what, ts[i].Dims)
		}
		if ts[i].DType != ts[0].DType {
			return nil, c.errorf("%s is %v: expected %v like start", what, ts[i].DType, ts[0].DType)
		}
	}
	dt := ts[0].DType
	if isIntType(dt) {
		var v [3]int64
		for i, t := range ts {
			x, err := t.Int64s()
			if err != nil {
				return nil, c.errorf("%v", err)
			}
			v[i] = x[0]
		}
		if v[2] == 0 {
			return nil, c.errorf("delta: expected a non-zero step, got 0")
		}
		if est := (float64(v[1]) - float64(v[0])) / float64(v[2]); est > float64(DefaultLimits.MaxTensorElements) {
			return nil, c.wrap(&LimitError{Limit: "MaxTensorElements", Value: int64(min(est, math.MaxInt64/2)), Max: DefaultLimits.MaxTensorElements})
		}
		span, step := v[1]-v[0], v[2]
		n := int64(0)
		if span != 0 && (span > 0) == (step > 0) {
			n = (abs64(span) + abs64(step) - 1) / abs64(step)
		}
		if n > DefaultLimits.MaxTensorElements {
			return nil, c.wrap(&LimitError{Limit: "MaxTensorElements", Value: n, Max: DefaultLimits.MaxTensorElements})
		}
		out := make([]int64, n)
		for i := range out {
			out[i] = v[0] + int64(i)*step
		}
		return c.tensors(newTensor(dt, []int{int(n)}, intsAs(dt, out)))
	}
	if dt != Float && dt != Double {
		return nil, c.errorf("expected an integer, FLOAT or DOUBLE range, got %v", dt)
	}
	var v [3]float64
	for i, t := range ts {
		x, err := t.Float64s()
		if err != nil {
			return nil, c.errorf("%v", err)
		}
		v[i] = x[0]
	}
	if v[2] == 0 || math.IsNaN(v[0]+v[1]+v[2]) || math.IsInf(v[0]+v[1]+v[2], 0) {
		return nil, c.errorf("expected finite start, limit and a non-zero finite delta, got %v, %v, %v", v[0], v[1], v[2])
	}
	nf := math.Max(math.Ceil((v[1]-v[0])/v[2]), 0)
	if nf > float64(DefaultLimits.MaxTensorElements) {
		return nil, c.wrap(&LimitError{Limit: "MaxTensorElements", Value: int64(min(nf, math.MaxInt64/2)), Max: DefaultLimits.MaxTensorElements})
	}
	n := int(nf)
	out := make([]float64, n)
	for i := range out {
		out[i] = v[0] + float64(i)*v[2]
	}
	return c.tensors(newTensor(dt, []int{n}, floatsAs(dt, out)))
}

func abs64(v int64) int64 {
	if v < 0 {
		return -v
	}
	return v
}

// intsAs converts int64 values to the Go slice type of the integer type dt
// (wrapping like a C conversion for the narrower types).
func intsAs(dt DataType, v []int64) any {
	switch dt {
	case Int8:
		return convert(v, func(x int64) int8 { return int8(x) })
	case Uint8:
		return convert(v, func(x int64) uint8 { return uint8(x) })
	case Int16:
		return convert(v, func(x int64) int16 { return int16(x) })
	case Uint16:
		return convert(v, func(x int64) uint16 { return uint16(x) })
	case Int32:
		return convert(v, func(x int64) int32 { return int32(x) })
	case Uint32:
		return convert(v, func(x int64) uint32 { return uint32(x) })
	case Uint64:
		return convert(v, func(x int64) uint64 { return uint64(x) })
	case Bool:
		return convert(v, func(x int64) bool { return x != 0 })
	}
	return v
}

// floatsAs converts float64 values to FLOAT (rounding to nearest) or DOUBLE.
func floatsAs(dt DataType, v []float64) any {
	if dt == Float {
		return convert(v, func(x float64) float32 { return float32(x) })
	}
	return v
}

// castData converts x's elements to type to. Float to integer truncates toward
// zero, as C and numpy's astype do (common practice; the ONNX Cast spec leaves
// out-of-range values undefined, and those are refused here); any non-zero
// value casts to true.
func castData(x *Tensor, to DataType) (any, error) {
	if isIntType(x.DType) || x.DType == Bool {
		v, err := x.Int64s()
		if err != nil {
			return nil, err
		}
		if to == Float || to == Double {
			return floatsAs(to, convert(v, func(i int64) float64 { return float64(i) })), nil
		}
		return intsAs(to, v), nil
	}
	f, err := x.Float64s()
	if err != nil {
		return nil, err
	}
	if to == Float || to == Double {
		return floatsAs(to, f), nil
	}
	if to == Bool {
		return convert(f, func(v float64) bool { return v != 0 }), nil
	}
	out := make([]int64, len(f))
	for i, v := range f {
		t := math.Trunc(v)
		if math.IsNaN(v) || t < -9.223372036854775808e18 || t >= 9.223372036854775808e18 {
			return nil, fmt.Errorf("element %d = %v does not fit %v", i, v, to)
		}
		out[i] = int64(t)
	}
	return intsAs(to, out), nil
}

// foldArith evaluates Add, Sub, Mul, Div and Neg with numpy broadcasting.
// Integers use int64 arithmetic and Div truncates toward zero (C99 §6.5.5, as
// Go's / does; the ONNX runtime kernels divide that way, from memory); float
// is computed in float64 and rounded once to FLOAT, which for + − × ÷ gives the
// correctly rounded binary32 result (Figueroa 1995, "When is double rounding
// innocuous?").
func foldArith(c *nodeCtx) ([]*Tensor, error) {
	a := c.consts[0]
	if a == nil {
		return nil, c.errorf("expected input 0, got none")
	}
	if c.n.OpType == "Neg" {
		if isIntType(a.DType) {
			v, _ := a.Int64s()
			return c.tensors(NewTensor("", a.DType, slices.Clone(a.Dims), intsAs(a.DType, convert(v, func(x int64) int64 { return -x }))))
		}
		v, _ := a.Float64s()
		return c.tensors(NewTensor("", a.DType, slices.Clone(a.Dims), floatsAs(a.DType, convert(v, func(x float64) float64 { return -x }))))
	}
	vs, err := c.outShapes()
	if err != nil {
		return nil, err
	}
	out := vs[0].Shape
	if err := checkValueLimits(c.n.Outputs[0], vs[0]); err != nil {
		return nil, c.wrap(err)
	}
	b := c.consts[1]
	ia := broadcastIndex(a.Shape(), out)
	ib := broadcastIndex(b.Shape(), out)
	if c.opset < 7 {
		ib = legacyIndex(c, b.Shape(), out)
	}
	if isIntType(a.DType) {
		av, err := a.Int64s()
		if err != nil {
			return nil, c.errorf("%v", err)
		}
		bv, err := b.Int64s()
		if err != nil {
			return nil, c.errorf("%v", err)
		}
		r, err := arith(c.n.OpType, av, bv, ia, ib)
		if err != nil {
			return nil, c.errorf("%v", err)
		}
		return c.tensors(newTensor(a.DType, out, intsAs(a.DType, r)))
	}
	av, _ := a.Float64s()
	bv, _ := b.Float64s()
	r, err := arith(c.n.OpType, av, bv, ia, ib)
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	return c.tensors(newTensor(a.DType, out, floatsAs(a.DType, r)))
}

// arith computes r[i] = av[ia[i]] op bv[ib[i]] for op Add, Sub, Mul or Div.
// An integer division by zero is an error; a float one follows IEEE 754.
func arith[T int64 | float64](op string, av, bv []T, ia, ib []int) ([]T, error) {
	r := make([]T, len(ia))
	_, integer := any(r).([]int64)
	for i := range r {
		x, y := av[ia[i]], bv[ib[i]]
		switch op {
		case "Add":
			r[i] = x + y
		case "Sub":
			r[i] = x - y
		case "Mul":
			r[i] = x * y
		case "Div":
			if integer && y == 0 {
				return nil, fmt.Errorf("integer division by zero at element %d", i)
			}
			r[i] = x / y
		}
	}
	return r, nil
}

// broadcastIndex maps each row-major position of out to the position of the
// element of an input of shape s (numpy broadcasting, right-aligned).
func broadcastIndex(s, out []int) []int {
	n := prod(out)
	idx := make([]int, n)
	off := len(out) - len(s)
	for p := 0; p < n; p++ {
		rem, src, stride := p, 0, 1
		for ax := len(out) - 1; ax >= 0; ax-- {
			coord := rem % out[ax]
			rem /= out[ax]
			if k := ax - off; k >= 0 {
				if s[k] != 1 {
					src += coord * stride
				}
				stride *= s[k]
			}
		}
		idx[p] = src
	}
	return idx
}

// legacyIndex is broadcastIndex for the opset 1–6 broadcast attribute, where
// B aligns with A's axes starting at axis.
func legacyIndex(c *nodeCtx, s, out []int) []int {
	start := len(out) - len(s)
	if a := c.n.Attr("axis"); a != nil && len(s) > 0 {
		start, _ = normAxis(a.I, len(out))
	}
	padded := make([]int, len(out))
	for i := range padded {
		padded[i] = 1
	}
	copy(padded[start:], s)
	return broadcastIndex(padded, out)
}

// foldConcat joins constant inputs along axis.
func foldConcat(c *nodeCtx) ([]*Tensor, error) {
	vs, err := c.outShapes()
	if err != nil {
		return nil, err
	}
	ax, _ := normAxis(c.n.AttrInt("axis", 1), len(vs[0].Shape))
	out := vs[0].Shape
	if err := checkValueLimits(c.n.Outputs[0], vs[0]); err != nil {
		return nil, c.wrap(err)
	}
	outer := prod(out[:ax])
	data := reflect.MakeSlice(sliceType(vs[0].DType), 0, prod(out))
	for o := 0; o < outer; o++ {
		for _, t := range c.consts {
			block := prod(t.Shape()[ax:])
			src := reflect.ValueOf(t.Data)
			data = reflect.AppendSlice(data, src.Slice(o*block, (o+1)*block))
		}
	}
	return c.tensors(newTensor(vs[0].DType, out, data.Interface()))
}

// foldGather: out = data[:axis] + indices.shape + data[axis+1:], taking the
// slices data[..., indices[j], ...]; negative indices count from the end.
func foldGather(c *nodeCtx) ([]*Tensor, error) {
	if c.input(1) == nil {
		return nil, c.errorf("expected the indices input, got none")
	}
	x, it := c.consts[0], c.consts[1]
	ind, err := it.Int64s()
	if err != nil {
		return nil, c.errorf("indices: expected an integer tensor, got %v", it.DType)
	}
	xs := x.Shape()
	if len(xs) == 0 {
		return nil, c.errorf("expected data of rank ≥ 1, got a scalar")
	}
	ax, err := normAxis(c.n.AttrInt("axis", 0), len(xs))
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	dim := int64(xs[ax])
	out := slices.Concat(xs[:ax], it.Shape(), xs[ax+1:])
	if err := checkValueLimits(c.n.Outputs[0], ValueShape{Shape: out}); err != nil {
		return nil, c.wrap(err)
	}
	outer, inner := prod(xs[:ax]), prod(xs[ax+1:])
	src := reflect.ValueOf(x.Data)
	data := reflect.MakeSlice(src.Type(), 0, prod(out))
	for o := 0; o < outer; o++ {
		for j, k := range ind {
			if k < -dim || k >= dim {
				return nil, c.errorf("indices[%d] = %d out of range: expected %d to %d for axis %d of %v", j, k, -dim, dim-1, ax, xs)
			}
			if k < 0 {
				k += dim
			}
			base := (o*int(dim) + int(k)) * inner
			data = reflect.AppendSlice(data, src.Slice(base, base+inner))
		}
	}
	return c.tensors(newTensor(x.DType, out, data.Interface()))
}

// foldSlice evaluates Slice with the geometry sliceParams resolves.
func foldSlice(c *nodeCtx) ([]*Tensor, error) {
	x := c.consts[0]
	xs := x.Shape()
	sp, err := sliceParams(c)
	if err != nil {
		return nil, err
	}
	r, out := len(xs), sp.Shape
	src := reflect.ValueOf(x.Data)
	total := prod(out)
	data := reflect.MakeSlice(src.Type(), total, total)
	strides := make([]int, r)
	acc := 1
	for ax := r - 1; ax >= 0; ax-- {
		strides[ax] = acc
		acc *= xs[ax]
	}
	for p := 0; p < total; p++ {
		rem, off := p, 0
		for ax := r - 1; ax >= 0; ax-- {
			coord := rem % out[ax]
			rem /= out[ax]
			off += (sp.Start[ax] + coord*sp.Step[ax]) * strides[ax]
		}
		data.Index(p).Set(src.Index(off))
	}
	return c.tensors(newTensor(x.DType, out, data.Interface()))
}
