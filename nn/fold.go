package nn

import (
	"github.com/apportion/apportion/nn/internal/ops"

	"fmt"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"github.com/apportion/apportion/onnxlite"
)

// evaluator returns the onnxlite.Evaluator with which a Network folds the
// nodes whose inputs are all constant: each such node is translated alone
// into a graph of the ops a program runs, run once, and its outputs become
// constants. Floating-point results are computed in the Network's element
// type, so a folded value has the bits the program would have computed at
// run time, and kept in that type; integer and boolean ones in float64,
// exact below 2^53 (larger values are refused).
func (nw *Network) evaluator() onnxlite.Evaluator {
	dt := tensor.Float32
	if nw.opts.DType == Float64 {
		dt = tensor.Float64
	}
	return func(n *onnxlite.Node, opset int64, inputs []*onnxlite.Tensor, outs []onnxlite.ValueShape) ([]*onnxlite.Tensor, error) {
		return evaluate(dt, n, opset, inputs, outs)
	}
}

func evaluate(dt tensor.Dtype, n *onnxlite.Node, opset int64, inputs []*onnxlite.Tensor, outs []onnxlite.ValueShape) (res []*onnxlite.Tensor, err error) {
	defer recoverEngine("constant folding", &err)
	for _, o := range outs {
		if o.DType != onnxlite.Undefined && !isFloat(o.DType) {
			dt = tensor.Float64
		}
	}
	m := &onnxlite.Model{Opsets: []onnxlite.OpsetImport{{Version: opset}}, Graph: &onnxlite.Graph{Nodes: []*onnxlite.Node{n}}}
	st := &onnxlite.Static{Model: m, Values: map[string]onnxlite.ValueShape{}, Consts: map[string]*onnxlite.Tensor{}}
	for i, t := range inputs {
		if t == nil {
			continue
		}
		st.Values[n.Inputs[i]] = onnxlite.ValueShape{DType: t.DType, Shape: t.Shape()}
		st.Consts[n.Inputs[i]] = t
	}
	for i, o := range n.Outputs {
		if o != "" {
			st.Values[o] = outs[i]
		}
	}
	st.Nodes = m.Graph.Nodes
	b := newBuilder(st, dt, m)
	if err := b.node(n); err != nil {
		return nil, err
	}
	mc := &machine{g: b.g, dt: dt}
	var keep G.Nodes
	for _, o := range n.Outputs {
		if o == "" || prod(st.Values[o].Shape) == 0 {
			continue
		}
		x, err := b.value(o)
		if err != nil {
			return nil, err
		}
		keep = append(keep, x)
	}
	if err := mc.compile(keep); err != nil {
		return nil, err
	}
	if err := mc.exec(); err != nil {
		return nil, err
	}
	res = make([]*onnxlite.Tensor, len(n.Outputs))
	for i, o := range n.Outputs {
		if o == "" {
			continue
		}
		vs := st.Values[o]
		var vals []float64
		if prod(vs.Shape) > 0 {
			x, _ := b.value(o)
			if vals, err = ops.Floats(mc.vals[mc.slot[x]]); err != nil {
				return nil, err
			}
		}
		dims := make([]int64, len(vs.Shape))
		for j, d := range vs.Shape {
			dims[j] = int64(d)
		}
		kept := vs.DType
		if isFloat(kept) {
			// The engine's precision: the bits a program computes.
			kept = onnxlite.Float
			if dt == tensor.Float64 {
				kept = onnxlite.Double
			}
		}
		if res[i], err = onnxlite.FromFloat64s(o, kept, dims, vals); err != nil {
			return nil, fmt.Errorf("%w: folding %v", onnxlite.ErrUnsupported, err)
		}
	}
	return res, nil
}
