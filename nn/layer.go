package nn

import (
	"context"
	"fmt"
	"slices"

	"github.com/apportion/apportion/onnxlite"
)

// Value describes one value a Network computes from its input: a name a
// Layer can be taken at.
type Value struct {
	// Name is the ONNX value name, as exported.
	Name string
	// Op is the operator of the node that produces it.
	Op string
	// Shape is the shape of one sample, without the batch dimension.
	Shape []int
	// DType is its element type.
	DType onnxlite.DataType
}

// staticAtOne infers the graph of a Network with one run-time input (and
// no compile-time input) at batch 1, as Head does; shape is the input's
// per-sample shape.
func (nw *Network) staticAtOne() (st *onnxlite.Static, shape []int, err error) {
	if len(nw.feeds) != 1 || len(nw.held) != 0 {
		return nil, nil, fmt.Errorf("%w: the model's values are listed for a model of one run-time input, this one has %d (%s)", ErrBadRequest, len(nw.inputs), portNames(nw.inputs))
	}
	shapes, ok := nw.sampleShapes(1)
	if !ok {
		return nil, nil, fmt.Errorf("%w: the per-sample input shape is not fully known; give it in Options.InputShapes", ErrShape)
	}
	if len(shapes[0]) == 0 || shapes[0][0] != 1 {
		return nil, nil, fmt.Errorf("%w: input %q has shape %v at batch 1; expected a leading batch dimension", ErrShape, nw.feeds[0].Name, shapes[0])
	}
	st, err = nw.inferFor(shapes, nil)
	if err != nil {
		st, err = nw.infer(nw.model, shapes, nil)
	}
	return st, shapes[0][1:], err
}

// Values lists, in graph order, the values the Network computes at run
// time from its inputs (values that shape inference folds into constants
// are left out), each with the operator that produces it and its
// per-sample shape. Values whose first dimension is not the batch are left
// out too.
func (nw *Network) Values() (vals []Value, err error) {
	defer recoverEngine("nn: values", &err)
	st, _, err := nw.staticAtOne()
	if err != nil {
		return nil, fmt.Errorf("nn: values: %w", err)
	}
	for _, n := range st.Nodes {
		for _, o := range n.Outputs {
			v, ok := st.Values[o]
			if o == "" || !ok || len(v.Shape) == 0 || v.Shape[0] != 1 {
				continue
			}
			vals = append(vals, Value{Name: o, Op: n.OpType, Shape: slices.Clone(v.Shape[1:]), DType: v.DType})
		}
	}
	return vals, nil
}

// Layer is one output of a Network seen as a function of an intermediate
// value V instead of the input: g with F(x) = g(V(x)), the rest of the
// graph downstream of V. Values that the rest of the graph reads besides
// V and that are computed from the input without passing through V (the
// other branch of a skip connection, say) are held fixed at their values
// for the sample (see At). It is safe for concurrent use.
//
// Every value of the graph can be a Layer's V, including the output of a
// Conv or Gemm that the compiler runs together with the Relu reading it.
type Layer struct {
	value   string
	op      string
	shape   []int
	nw      *Network // the whole graph, for V(x)
	inShape []int    // its input's per-sample shape
	cut     *Head    // g, with the fixed values as further inputs
	fixed   []string // the values held fixed
	fshape  [][]int  // their per-sample shapes
}

// Layer returns the output chosen by sel as a function of the value
// called value. Its InputShape is V's per-sample shape.
// Layers are kept: a second call with the same arguments returns the
// same Layer, whose programs are already compiled.
func (nw *Network) Layer(value string, sel Selection) (l *Layer, err error) {
	defer recoverEngine("nn: layer", &err)
	key := fmt.Sprintf("%q %q %v", value, sel.Output, sel.Logits)
	nw.mu.Lock()
	l, ok := nw.layers[key]
	nw.mu.Unlock()
	if ok {
		return l, nil
	}
	if l, err = nw.newLayer(value, sel); err != nil {
		return nil, err
	}
	nw.mu.Lock()
	defer nw.mu.Unlock()
	if k, ok := nw.layers[key]; ok {
		return k, nil
	}
	if nw.layers == nil {
		nw.layers = map[string]*Layer{}
	}
	nw.layers[key] = l
	return l, nil
}

func (nw *Network) newLayer(value string, sel Selection) (*Layer, error) {
	st, inShape, err := nw.staticAtOne()
	if err != nil {
		return nil, fmt.Errorf("nn: layer: %w", err)
	}
	out, err := selectedValue(st, sel)
	if err != nil {
		return nil, fmt.Errorf("nn: layer: %w", err)
	}
	cut, l, err := cutAt(st, value, out)
	if err != nil {
		return nil, fmt.Errorf("nn: layer %q: %w", value, err)
	}
	l.nw, l.inShape = nw, inShape
	opts := nw.opts
	opts.InputShapes = nil
	cnw, err := Compile(cut, opts)
	if err != nil {
		return nil, fmt.Errorf("nn: layer %q: the graph after it: %w", value, err)
	}
	l.cut, err = cnw.Head(Selection{Output: out, Input: value})
	if err != nil {
		return nil, fmt.Errorf("nn: layer %q: %w", value, err)
	}
	return l, nil
}

// selectedValue returns the value sel selects in st: a graph output, or
// with Logits the input of the Softmax, LogSoftmax or Sigmoid producing it.
func selectedValue(st *onnxlite.Static, sel Selection) (string, error) {
	out := sel.Output
	if out == "" {
		if len(st.Outputs) == 0 {
			return "", fmt.Errorf("%w: the model has no outputs", ErrBadRequest)
		}
		out = st.Outputs[0]
	}
	if !slices.Contains(st.Outputs, out) {
		return "", fmt.Errorf("%w: no graph output %q (outputs: %q)", ErrBadRequest, out, st.Outputs)
	}
	if !sel.Logits {
		return out, nil
	}
	for _, n := range st.Nodes {
		if slices.Contains(n.Outputs, out) && (n.OpType == "Softmax" || n.OpType == "LogSoftmax" || n.OpType == "Sigmoid") {
			return n.Inputs[0], nil
		}
	}
	return "", fmt.Errorf("%w: Logits needs output %q to be produced by Softmax, LogSoftmax or Sigmoid", ErrBadRequest, out)
}

// cutAt returns the graph downstream of value in st as a model of its own,
// whose inputs are value and the values held fixed, and whose output is
// out; and the Layer without its heads.
func cutAt(st *onnxlite.Static, value, out string) (*onnxlite.Model, *Layer, error) {
	producer := map[string]*onnxlite.Node{}
	for _, n := range st.Nodes {
		for _, o := range n.Outputs {
			producer[o] = n
		}
	}
	src := producer[value]
	switch {
	case src != nil:
	case slices.Contains(st.Inputs, value):
		return nil, nil, fmt.Errorf("%w: it is the model's input; explain without a layer to attribute to it", ErrBadRequest)
	case st.Consts[value] != nil:
		return nil, nil, fmt.Errorf("%w: it is computed from the weights alone and does not depend on the input", ErrBadRequest)
	default:
		return nil, nil, fmt.Errorf("%w: the model has no such value", ErrBadRequest)
	}
	vs := st.Values[value]
	if len(vs.Shape) == 0 || vs.Shape[0] != 1 {
		return nil, nil, fmt.Errorf("%w: its shape %v has no batch dimension", ErrShape, vs.Shape)
	}
	if !isFloat(vs.DType) {
		return nil, nil, fmt.Errorf("%w: element type %v; a layer holds floating-point values", ErrBadRequest, vs.DType)
	}
	// Values computed from the runtime inputs, and those computed from V.
	runtime, down := map[string]bool{}, map[string]bool{value: true}
	for _, in := range st.Inputs {
		runtime[in] = true
	}
	for _, n := range st.Nodes {
		rt, dn := false, false
		for _, in := range n.Inputs {
			rt = rt || runtime[in]
			dn = dn || (down[in] && n != src)
		}
		for _, o := range n.Outputs {
			runtime[o] = runtime[o] || rt
			down[o] = down[o] || dn
		}
	}
	if !down[out] {
		return nil, nil, fmt.Errorf("%w: output %q does not depend on it", ErrBadRequest, out)
	}
	var nodes []*onnxlite.Node
	for _, n := range needed(st.Nodes, []string{out}) {
		keep := !slices.ContainsFunc(n.Outputs, func(o string) bool { return runtime[o] })
		for _, o := range n.Outputs {
			keep = keep || (down[o] && n != src)
		}
		if keep {
			nodes = append(nodes, n)
		}
	}
	made := map[string]bool{}
	for _, n := range nodes {
		for _, o := range n.Outputs {
			made[o] = true
		}
	}
	l := &Layer{value: value, op: src.OpType, shape: slices.Clone(vs.Shape[1:])}
	var inits []*onnxlite.Tensor
	seen := map[string]bool{value: true}
	for _, n := range nodes {
		for _, in := range n.Inputs {
			if in == "" || made[in] || seen[in] {
				continue
			}
			seen[in] = true
			if t := st.Consts[in]; t != nil {
				c := *t
				c.Name = in
				inits = append(inits, &c)
				continue
			}
			fv := st.Values[in]
			if !isFloat(fv.DType) || len(fv.Shape) == 0 || fv.Shape[0] != 1 {
				return nil, nil, fmt.Errorf("%w: node %q (%s) after it also reads %q (%v), computed from the input without passing through it, which can only be held fixed when it is a floating-point value with a batch dimension", ErrBadRequest, n.Name, n.OpType, in, fv)
			}
			l.fixed = append(l.fixed, in)
			l.fshape = append(l.fshape, slices.Clone(fv.Shape[1:]))
		}
	}
	port := func(name string) *onnxlite.ValueInfo {
		v := st.Values[name]
		dims := []onnxlite.Dim{{Param: "batch"}}
		for _, d := range v.Shape[1:] {
			dims = append(dims, onnxlite.Dim{Value: int64(d), HasValue: true})
		}
		return &onnxlite.ValueInfo{Name: name, Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: v.DType, Shape: dims, HasShape: true}}
	}
	g := &onnxlite.Graph{Name: "after " + value, Nodes: nodes, Initializers: inits, Inputs: []*onnxlite.ValueInfo{port(value)}}
	for _, f := range l.fixed {
		g.Inputs = append(g.Inputs, port(f))
	}
	g.Outputs = []*onnxlite.ValueInfo{{Name: out, Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: st.Values[out].DType}}}
	m := *st.Model
	m.Graph = g
	m.Metadata = nil
	return &m, l, nil
}

// Name returns the name of the value V.
func (l *Layer) Name() string { return l.value }

// Op returns the operator that produces V.
func (l *Layer) Op() string { return l.op }

// InputShape returns V's per-sample shape.
func (l *Layer) InputShape() []int { return slices.Clone(l.shape) }

// Fixed returns the names of the values held fixed, nil when V alone
// separates the input from the output.
func (l *Layer) Fixed() []string { return slices.Clone(l.fixed) }

// Output returns the name of the value the Layer's heads read (the logits
// value when the Selection asked for it).
func (l *Layer) Output() string { return l.cut.value }

// SampleShape returns the per-sample shape of the Network's input.
func (l *Layer) SampleShape() []int { return slices.Clone(l.inShape) }

// Values returns V for n samples held in x (n·∏ of the Network's input
// shape values, row-major): n·∏InputShape values.
func (l *Layer) Values(ctx context.Context, x []float64, n int) (v []float64, err error) {
	defer recoverEngine("nn: layer values", &err)
	outs, err := l.run(ctx, x, n, []string{l.value})
	if err != nil {
		return nil, err
	}
	return outs[0], nil
}

func (l *Layer) run(ctx context.Context, x []float64, n int, names []string) ([][]float64, error) {
	size := prod(l.inShape)
	if n <= 0 || len(x) != n*size {
		return nil, fmt.Errorf("nn: layer %q: %w: %d samples of shape %v need %d values, got %d", l.value, ErrShape, n, l.inShape, n*size, len(x))
	}
	if err := checkFinite(x, size); err != nil {
		return nil, fmt.Errorf("nn: layer %q: %w", l.value, err)
	}
	shape := append([]int{n}, l.inShape...)
	outs, _, _, err := l.nw.runReq(ctx, [][]int{shape}, [][]float64{x}, request{outputs: names}, nil)
	if err != nil {
		return nil, fmt.Errorf("nn: layer %q: %w", l.value, err)
	}
	return outs, nil
}

// At returns the Layer for the sample x (one sample of the Network's
// input): a Head whose input is V, with the values held fixed at their
// values for x, and V(x). Head.Forward and Head.Gradient of the result
// evaluate g at any batch of values of V, each with the same fixed values.
func (l *Layer) At(ctx context.Context, x []float64) (h *Head, v []float64, err error) {
	defer recoverEngine("nn: layer", &err)
	outs, err := l.run(ctx, x, 1, append([]string{l.value}, l.fixed...))
	if err != nil {
		return nil, nil, err
	}
	if len(l.fixed) == 0 {
		return l.cut, outs[0], nil
	}
	ts := make([]*onnxlite.Tensor, 1, 1+len(l.fixed))
	for i, f := range l.fixed {
		ts = append(ts, makeTensor(f, Float64, append([]int{1}, l.fshape[i]...), outs[1+i]))
	}
	if h, err = l.cut.With(ts); err != nil {
		return nil, nil, err
	}
	return h, outs[0], nil
}

// OutputSize returns the number of output scalars per sample.
func (l *Layer) OutputSize() int { return l.cut.OutputSize() }

// Forward evaluates the selected output (see Output) for n samples x of
// the Network's input.
func (l *Layer) Forward(ctx context.Context, x []float64, n int) (out []float64, err error) {
	defer recoverEngine("nn: layer forward", &err)
	outs, err := l.run(ctx, x, n, []string{l.cut.value})
	if err != nil {
		return nil, err
	}
	return outs[0], nil
}
