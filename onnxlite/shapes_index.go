package onnxlite

import (
	"fmt"
	"math"
	"slices"
)

// The shape rules of the indexing and broadcasting operators: Gather, Slice,
// Split, Expand, Tile, Where, the comparisons and the variadic elementwise
// operators.

// addIndexRules adds the rules of this file to shapeRules.
func addIndexRules() {
	for op, r := range map[string]shapeRule{
		"Gather": {2, ruleGather}, "Slice": {1, ruleSlice}, "Split": {1, ruleSplit},
		"Expand": {2, ruleExpand}, "Tile": {2, ruleTile}, "Where": {3, ruleWhere},
		"Equal": {2, ruleCompare}, "Less": {2, ruleCompare}, "Greater": {2, ruleCompare},
		"Min": {1, ruleVariadic}, "Max": {1, ruleVariadic}, "Sum": {1, ruleVariadic}, "Mean": {1, ruleVariadic},
	} {
		shapeRules[op] = r
	}
}

// ruleGather: out = data[:axis] + indices.shape + data[axis+1:].
func ruleGather(c *nodeCtx) ([]ValueShape, error) {
	x, ind := c.in[0], c.in[1]
	if !isIntType(ind.DType) {
		return nil, c.errorf("indices: expected an integer tensor, got %v", ind.DType)
	}
	if len(x.Shape) == 0 {
		return nil, c.errorf("expected data of rank ≥ 1, got a scalar")
	}
	ax, err := normAxis(c.n.AttrInt("axis", 0), len(x.Shape))
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	return []ValueShape{{x.DType, slices.Concat(x.Shape[:ax], ind.Shape, x.Shape[ax+1:])}}, nil
}

// GatherAxis returns the axis of a Gather node over data of rank r, in [0, r).
func GatherAxis(n *Node, r int) (int, error) {
	return normAxis(n.AttrInt("axis", 0), r)
}

// SliceParams is the resolved geometry of a Slice node: output element k
// along axis a reads input element Start[a] + k·Step[a]; Shape is the
// output shape. Axes the node does not slice have Start 0 and Step 1.
type SliceParams struct {
	Start, Step []int
	Shape       []int
}

func ruleSlice(c *nodeCtx) ([]ValueShape, error) {
	p, err := sliceParams(c)
	if err != nil {
		return nil, err
	}
	return []ValueShape{{c.in[0].DType, p.Shape}}, nil
}

// sliceParams resolves Slice's starts, ends, axes and steps (attributes
// before opset 10, inputs from it). Per the ONNX specification, negative
// starts and ends count from the end, and they clamp to [0, dim] for
// positive steps and [−1, dim−1] for negative ones.
func sliceParams(c *nodeCtx) (SliceParams, error) {
	xs := c.in[0].Shape
	var starts, ends, axes, steps []int64
	if c.opset < 10 {
		starts, ends, axes = c.n.AttrInts("starts", nil), c.n.AttrInts("ends", nil), c.n.AttrInts("axes", nil)
		if starts == nil || ends == nil {
			return SliceParams{}, c.errorf("expected the starts and ends attributes (opset %d), got starts %v, ends %v", c.opset, starts, ends)
		}
	} else {
		var err error
		if starts, err = c.requiredInts(1, "starts"); err != nil {
			return SliceParams{}, err
		}
		if ends, err = c.requiredInts(2, "ends"); err != nil {
			return SliceParams{}, err
		}
		if axes, _, err = c.constInts(3, "axes"); err != nil {
			return SliceParams{}, err
		}
		if steps, _, err = c.constInts(4, "steps"); err != nil {
			return SliceParams{}, err
		}
	}
	if len(starts) != len(ends) {
		return SliceParams{}, c.errorf("starts %v and ends %v: expected the same length", starts, ends)
	}
	if axes == nil {
		for i := range starts {
			axes = append(axes, int64(i))
		}
	}
	if steps == nil {
		steps = slices.Repeat([]int64{1}, len(starts))
	}
	if len(axes) != len(starts) || len(steps) != len(starts) {
		return SliceParams{}, c.errorf("starts %v, ends %v, axes %v, steps %v: expected equal lengths", starts, ends, axes, steps)
	}
	r := len(xs)
	p := SliceParams{Start: make([]int, r), Step: slices.Repeat([]int{1}, r), Shape: slices.Clone(xs)}
	seen := make([]bool, r)
	for i, a := range axes {
		ax, err := normAxis(a, r)
		if err != nil {
			return SliceParams{}, c.errorf("axes %v: %v", axes, err)
		}
		if seen[ax] {
			return SliceParams{}, c.errorf("axes %v: axis %d repeats", axes, a)
		}
		seen[ax] = true
		d := int64(xs[ax])
		s, e, st := starts[i], ends[i], steps[i]
		if st == 0 {
			return SliceParams{}, c.errorf("steps %v: expected non-zero steps", steps)
		}
		if s < 0 {
			s += d
		}
		if e < 0 {
			e += d
		}
		var n int64
		st = max(st, -math.MaxInt64)
		if st > 0 {
			s, e = min(max(s, 0), d), min(max(e, 0), d)
			if e > s {
				n = (e-s-1)/st + 1
			}
		} else {
			s, e = min(max(s, -1), d-1), min(max(e, -1), d-1)
			if s > e {
				n = (s-e-1)/(-st) + 1
			}
		}
		if n == 0 {
			s = 0 // an empty axis reads nothing
		}
		p.Start[ax], p.Step[ax], p.Shape[ax] = int(s), int(max(min(st, math.MaxInt32), math.MinInt32)), int(n)
	}
	return p, nil
}

// ruleSplit: the parts of input 0 along axis, one per output. Their sizes
// are the split attribute (before opset 13) or input 1 (from it); without
// them the axis is cut into equal parts, or from opset 18 into num_outputs
// parts of ⌈d/num_outputs⌉ with a smaller last one.
func ruleSplit(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	ax, sizes, err := splitSizes(c)
	if err != nil {
		return nil, err
	}
	out := make([]ValueShape, len(sizes))
	for i, n := range sizes {
		s := slices.Clone(x.Shape)
		s[ax] = n
		out[i] = ValueShape{x.DType, s}
	}
	return out, nil
}

func splitSizes(c *nodeCtx) (axis int, sizes []int, err error) {
	xs := c.in[0].Shape
	if len(xs) == 0 {
		return 0, nil, c.errorf("expected an input of rank ≥ 1, got a scalar")
	}
	if axis, err = normAxis(c.n.AttrInt("axis", 0), len(xs)); err != nil {
		return 0, nil, c.errorf("%v", err)
	}
	d, parts := xs[axis], len(c.n.Outputs)
	var split []int64
	if c.opset < 13 {
		split = c.n.AttrInts("split", nil)
		if split == nil && c.input(1) != nil { // Split-1 took the sizes as an input
			if split, err = c.requiredInts(1, "split"); err != nil {
				return 0, nil, err
			}
		}
	} else if split, _, err = c.constInts(1, "split"); err != nil {
		return 0, nil, err
	}
	num := c.n.Attr("num_outputs")
	switch {
	case len(split) > 0:
		if num != nil && c.opset >= 18 {
			return 0, nil, c.errorf("expected the split input or num_outputs, got both")
		}
		if len(split) != parts {
			return 0, nil, c.errorf("split %v: expected %d sizes, one per output", split, parts)
		}
		total := int64(0)
		for _, v := range split {
			if v < 0 {
				return 0, nil, c.errorf("split %v: expected non-negative sizes", split)
			}
			total += v
			sizes = append(sizes, int(v))
		}
		if total != int64(d) {
			return 0, nil, c.errorf("split %v: the sizes add up to %d, expected axis %d's length %d", split, total, axis, d)
		}
	case num != nil && c.opset >= 18:
		if num.I < 1 || num.I != int64(parts) {
			return 0, nil, c.errorf("num_outputs %d: expected the node's %d outputs", num.I, parts)
		}
		chunk := (d + parts - 1) / parts
		for i := 0; i < parts; i++ {
			sizes = append(sizes, max(min(chunk, d-i*chunk), 0))
		}
	default:
		if parts == 0 || d%parts != 0 {
			return 0, nil, c.errorf("axis %d of length %d: expected it to divide into %d equal parts", axis, d, parts)
		}
		sizes = slices.Repeat([]int{d / parts}, parts)
	}
	return axis, sizes, nil
}

// ruleExpand: the numpy broadcast of the input's shape and the shape input
// (either may have the lower rank; ones stretch).
func ruleExpand(c *nodeCtx) ([]ValueShape, error) {
	shape, err := c.requiredInts(1, "shape")
	if err != nil {
		return nil, err
	}
	target := make([]int, len(shape))
	for i, d := range shape {
		if d < 0 || d > DefaultLimits.MaxTensorElements {
			return nil, c.errorf("shape %v: expected non-negative dims", shape)
		}
		target[i] = int(d)
	}
	out, err := Broadcast(c.in[0].Shape, target)
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	return []ValueShape{{c.in[0].DType, out}}, nil
}

// ruleTile: out[i] = in[i]·repeats[i].
func ruleTile(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	reps, err := c.requiredInts(1, "repeats")
	if err != nil {
		return nil, err
	}
	if len(reps) != len(x.Shape) {
		return nil, c.errorf("repeats %v: expected one per axis of %v", reps, x.Shape)
	}
	out := make([]int, len(reps))
	for i, r := range reps {
		if r < 0 {
			return nil, c.errorf("repeats %v: expected non-negative values", reps)
		}
		v := int64(x.Shape[i]) * r
		if v > DefaultLimits.MaxTensorElements {
			return nil, c.wrap(&LimitError{Limit: "MaxTensorElements", Value: v, Max: DefaultLimits.MaxTensorElements})
		}
		out[i] = int(v)
	}
	return []ValueShape{{x.DType, out}}, nil
}

// ruleWhere: the broadcast of the condition, X and Y, of X's type.
func ruleWhere(c *nodeCtx) ([]ValueShape, error) {
	cond, x, y := c.in[0], c.in[1], c.in[2]
	if cond.DType != Bool {
		return nil, c.errorf("condition: expected a BOOL tensor, got %v", cond.DType)
	}
	if x.DType != y.DType {
		return nil, c.errorf("expected X and Y of one element type, got %v and %v", x.DType, y.DType)
	}
	out, err := Broadcast(cond.Shape, x.Shape)
	if err == nil {
		out, err = Broadcast(out, y.Shape)
	}
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	return []ValueShape{{x.DType, out}}, nil
}

// ruleCompare covers Equal, Less and Greater: a BOOL tensor of the two
// inputs' broadcast shape (the legacy broadcast attribute before opset 7).
func ruleCompare(c *nodeCtx) ([]ValueShape, error) {
	a, b := c.in[0], c.in[1]
	if a.DType != b.DType {
		return nil, c.errorf("expected both inputs of one element type, got %v and %v", a.DType, b.DType)
	}
	var out []int
	var err error
	if c.opset < 7 {
		out, err = legacyBroadcast(c, a.Shape, b.Shape)
		if err != nil {
			return nil, err
		}
	} else if out, err = Broadcast(a.Shape, b.Shape); err != nil {
		return nil, c.errorf("%v", err)
	}
	return []ValueShape{{Bool, out}}, nil
}

// ruleVariadic covers Min, Max, Sum and Mean: the broadcast of all inputs
// (at least one), of their common element type.
func ruleVariadic(c *nodeCtx) ([]ValueShape, error) {
	out := slices.Clone(c.in[0].Shape)
	dt := c.in[0].DType
	for i := 1; i < len(c.in); i++ {
		v, err := c.need(i)
		if err != nil {
			return nil, err
		}
		if v.DType != dt {
			return nil, c.errorf("input %d is %v: expected %v like input 0", i, v.DType, dt)
		}
		if out, err = Broadcast(out, v.Shape); err != nil {
			return nil, c.errorf("%v", fmt.Errorf("input %d: %w", i, err))
		}
	}
	return []ValueShape{{dt, out}}, nil
}
