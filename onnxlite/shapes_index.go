package onnxlite

import (
	"fmt"
	"slices"
)

// The shape rules of the broadcasting operators: Where, the comparisons and
// the variadic elementwise operators.

// addIndexRules adds the rules of this file to shapeRules.
func addIndexRules() {
	for op, r := range map[string]shapeRule{
		"Where": {3, ruleWhere},
		"Equal": {2, ruleCompare}, "Less": {2, ruleCompare}, "Greater": {2, ruleCompare},
		"Min": {1, ruleVariadic}, "Max": {1, ruleVariadic}, "Sum": {1, ruleVariadic}, "Mean": {1, ruleVariadic},
	} {
		shapeRules[op] = r
	}
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
