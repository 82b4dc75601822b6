package nn

import (
	"context"
	"fmt"
	"slices"

	"github.com/apportion/apportion/onnxlite"
)

// Selection picks the output a Head differentiates and the input it
// differentiates with respect to.
type Selection struct {
	// Output is the name of a graph output; empty means the first output.
	Output string
	// Logits selects the input of the Softmax, LogSoftmax or Sigmoid node
	// that produces Output instead of Output itself (an error when Output is
	// produced by another operator).
	Logits bool
	// Input names the runtime input gradients are taken with respect to;
	// empty means the first floating-point input. The model's other inputs
	// are held at given values (Head.With).
	Input string
}

// Head is one output of a Network seen as a function of one of its runtime
// inputs, flattened per sample: the float64 view that attribution methods
// use. The other inputs, if any, are held at the values With gives. It is
// safe for concurrent use.
type Head struct {
	nw       *Network
	value    string   // the ONNX value it reads
	outputs  []string // {value}, the outputs of its requests
	wrt      int      // the input differentiated, an index into nw.feeds
	inShape  []int    // per sample
	inSize   int
	outShape []int // per sample
	outSize  int
	path     *pathPlans   // built on first use by the exact path integral
	sums     *prefixPlans // found on first use by the gradient sums
	// others holds one sample of each other run-time input (nil at wrt)
	// and otherShapes its shape, and held the compile-time inputs, once
	// With has set them.
	others      [][]float64
	otherShapes [][]int
	held        *heldValues
	bound       bool // the other inputs have values (or there are none)
	sel         Selection
}

// Head returns the view of the output chosen by sel as a function of the
// input sel names. That input's per-sample shape must be fully known (see
// Options.InputShapes); gradients are taken with respect to it. When the
// model has other runtime inputs, the Head returned needs their values
// (With) before it runs.
func (nw *Network) Head(sel Selection) (h *Head, err error) {
	defer recoverEngine("nn: head", &err)
	wrt, err := nw.attributed(sel.Input)
	if err != nil {
		return nil, fmt.Errorf("nn: head: %w", err)
	}
	h = &Head{nw: nw, wrt: wrt, sel: sel, bound: len(nw.feeds) == 1 && len(nw.held) == 0,
		path: &pathPlans{}, sums: &prefixPlans{}}
	if len(nw.held) > 0 {
		// The shapes depend on the compile-time inputs' values: With
		// infers them.
		shapes, ok := nw.sampleShapes(1)
		if !ok {
			return nil, fmt.Errorf("nn: head: input %q: %w: per-sample shape %s is not fully known; give it in Options.InputShapes", nw.feeds[wrt].Name, ErrShape, shapeString(nw.declared[wrt], true))
		}
		h.inShape = shapes[wrt][1:]
		h.inSize = prod(h.inShape)
		return h, nil
	}
	if err := h.infer(); err != nil {
		return nil, err
	}
	return h, nil
}

// attributed returns the index in feeds of the input named name, or of the
// first floating-point input for "".
func (nw *Network) attributed(name string) (int, error) {
	for i, p := range nw.feeds {
		if name != "" && p.Name == name && !isFloat(p.DType) && p.DType != onnxlite.Undefined {
			return 0, fmt.Errorf("%w: input %q holds %v values (token ids, indices), which have no gradient", ErrBadRequest, name, p.DType)
		}
		if (name == "" && isFloat(p.DType)) || (name != "" && p.Name == name) {
			return i, nil
		}
	}
	for _, p := range nw.held {
		if p.Name == name {
			return 0, fmt.Errorf("%w: input %q holds parameters of the model (a shape, axes, sizes), which have no gradient", ErrBadRequest, name)
		}
	}
	if name == "" {
		return 0, fmt.Errorf("%w: the model has no floating-point input to take gradients with respect to (inputs: %s)", ErrBadRequest, portNames(nw.inputs))
	}
	return 0, fmt.Errorf("%w: no runtime input %q (inputs: %s)", ErrBadRequest, name, portNames(nw.inputs))
}

// infer finds the value h reads and its per-sample shape, at batch 1.
func (h *Head) infer() error {
	nw := h.nw
	shapes, ok := nw.sampleShapes(1)
	if !ok {
		return fmt.Errorf("nn: head: input %q: %w: per-sample shape %s is not fully known; give it in Options.InputShapes", nw.feeds[h.wrt].Name, ErrShape, shapeString(nw.declared[h.wrt], true))
	}
	for i, s := range shapes {
		if len(s) == 0 {
			return fmt.Errorf("nn: head: input %q: %w: a scalar input has no batch dimension", nw.feeds[i].Name, ErrShape)
		}
		if s[0] != 1 {
			return fmt.Errorf("nn: head: input %q: %w: the model fixes the batch dimension to %d; a Head needs a free batch or a batch of 1", nw.feeds[i].Name, ErrShape, s[0])
		}
	}
	st, err := nw.inferFor(shapes, h.held)
	if err != nil {
		// Not batch-consistent after relaxing: the model as exported at batch 1.
		st, err = nw.infer(nw.model, shapes, h.held)
		if err != nil {
			return modelError("nn: head", err)
		}
	}
	sel := h.sel
	out := sel.Output
	if out == "" {
		if len(st.Outputs) == 0 {
			return fmt.Errorf("nn: head: %w: the model has no outputs", ErrBadRequest)
		}
		out = st.Outputs[0]
	}
	found := false
	for _, o := range st.Outputs {
		found = found || o == out
	}
	if !found {
		return fmt.Errorf("nn: head: %w: no graph output %q (outputs: %q)", ErrBadRequest, out, st.Outputs)
	}
	value := out
	if sel.Logits {
		var prod string
		for _, n := range st.Model.Graph.Nodes {
			for _, o := range n.Outputs {
				if o == out {
					prod = n.OpType
					if prod == "Softmax" || prod == "LogSoftmax" || prod == "Sigmoid" {
						value = n.Inputs[0]
					}
				}
			}
		}
		if value == out {
			if prod == "" {
				prod = "no node (a graph input or constant)"
			}
			return fmt.Errorf("nn: head: %w: Logits needs output %q to be produced by Softmax, LogSoftmax or Sigmoid, it is produced by %s", ErrBadRequest, out, prod)
		}
	}
	vs, ok := st.Values[value]
	if !ok || len(vs.Shape) == 0 || vs.Shape[0] != 1 {
		return fmt.Errorf("nn: head: %w: value %q has shape %v at batch 1; expected a leading batch dimension of 1", ErrShape, value, vs.Shape)
	}
	if !isFloat(vs.DType) {
		return fmt.Errorf("nn: head: value %q: %w: element type %v", value, ErrBadRequest, vs.DType)
	}
	h.value, h.outputs = value, []string{value}
	h.inShape, h.outShape = shapes[h.wrt][1:], vs.Shape[1:]
	h.inSize, h.outSize = prod(h.inShape), prod(h.outShape)
	return nil
}

// With returns a copy of h whose other inputs are held at the values of
// one sample: inputs has one tensor per Network.Inputs entry, in order; the
// entry of the input h differentiates is ignored (nil is fine), the other
// run-time inputs are one sample each (a batch of 1, or the per-sample
// shape), and compile-time inputs have their declared shape. Every
// evaluation of the copy feeds those values alongside each sample of the
// differentiated input.
func (h *Head) With(inputs []*onnxlite.Tensor) (hw *Head, err error) {
	defer recoverEngine("nn: head", &err)
	nw := h.nw
	if len(inputs) != len(nw.inputs) {
		return nil, fmt.Errorf("nn: head: %w: expected %d inputs (%s), got %d", ErrBadRequest, len(nw.inputs), portNames(nw.inputs), len(inputs))
	}
	c := *h
	c.others = make([][]float64, len(nw.feeds))
	c.otherShapes = make([][]int, len(nw.feeds))
	var fixed []*onnxlite.Tensor
	k := 0
	for i, t := range inputs {
		p := nw.inputs[i]
		if nw.unread[i] {
			continue
		}
		if p.CompileTime {
			fixed = append(fixed, t)
			continue
		}
		j := k
		k++
		if j == h.wrt {
			continue
		}
		if t == nil {
			return nil, fmt.Errorf("nn: head: input %q: %w: no value given", p.Name, ErrBadRequest)
		}
		vals, err := nw.feedValues(t, p)
		if err != nil {
			return nil, fmt.Errorf("nn: head: input %q: %w", p.Name, err)
		}
		want := p.Shape
		shape := t.Shape()
		if len(shape) == len(want)+1 && shape[0] == 1 {
			shape = shape[1:]
		}
		ok := len(shape) == len(want)
		for a := 0; ok && a < len(want); a++ {
			ok = want[a] < 0 || shape[a] == want[a]
		}
		if !ok || prod(shape) != len(vals) {
			return nil, fmt.Errorf("nn: head: input %q: %w: expected one sample of shape %v, got %v", p.Name, ErrShape, want, t.Shape())
		}
		c.others[j], c.otherShapes[j] = vals, shape
	}
	if c.held, err = nw.newHeld(fixed); err != nil {
		return nil, fmt.Errorf("nn: head: %w", err)
	}
	c.bound = true
	if len(nw.held) > 0 {
		// The value and shapes may change with the held values: the copy
		// builds its own plans (which such a model does not offer).
		c.path, c.sums = &pathPlans{}, &prefixPlans{}
		if err := c.infer(); err != nil {
			return nil, err
		}
	}
	return &c, nil
}

// InputShape returns the per-sample input shape.
func (h *Head) InputShape() []int { return append([]int(nil), h.inShape...) }

// OutputSize returns the number of output scalars per sample.
func (h *Head) OutputSize() int { return h.outSize }

// OutputShape returns the per-sample shape of the selected value.
func (h *Head) OutputShape() []int { return append([]int(nil), h.outShape...) }

// Value returns the name of the ONNX value the Head reads (the logits value
// when Selection.Logits was set).
func (h *Head) Value() string { return h.value }

func (h *Head) check(x []float64, n int) error {
	if !h.bound {
		return fmt.Errorf("%w: the model's other inputs (%s) need values: see Head.With", ErrBadRequest, portNames(h.nw.inputs))
	}
	if n <= 0 {
		return fmt.Errorf("%w: expected a batch of at least 1 sample, got %d", ErrBadRequest, n)
	}
	if h.inSize == 0 || n > len(x)/max(h.inSize, 1) || len(x) != n*h.inSize {
		return fmt.Errorf("%w: %d samples of shape %v need %d values, got %d", ErrShape, n, h.inShape, n*h.inSize, len(x))
	}
	return checkFinite(x, h.inSize)
}

// feed returns the shapes and values of every run-time input for n samples
// x of the differentiated input, the other inputs repeated per sample.
func (h *Head) feed(x []float64, n int) ([][]int, [][]float64) {
	nw := h.nw
	shapes := make([][]int, len(nw.feeds))
	data := make([][]float64, len(nw.feeds))
	batched := func(per []int) []int {
		s := make([]int, len(per)+1)
		s[0] = n
		copy(s[1:], per)
		return s
	}
	for i := range nw.feeds {
		if i == h.wrt {
			shapes[i], data[i] = batched(h.inShape), x
			continue
		}
		one := h.others[i]
		shapes[i] = batched(h.otherShapes[i])
		data[i] = make([]float64, 0, n*len(one))
		for range n {
			data[i] = append(data[i], one...)
		}
	}
	return shapes, data
}

// Forward evaluates n samples held in x (n·∏InputShape values, row-major)
// and returns their n·OutputSize outputs.
func (h *Head) Forward(ctx context.Context, x []float64, n int) (out []float64, err error) {
	defer recoverEngine("nn: head forward", &err)
	if err := h.check(x, n); err != nil {
		return nil, fmt.Errorf("nn: head forward: %w", err)
	}
	shapes, data := h.feed(x, n)
	outs, _, _, err := h.nw.runReq(ctx, shapes, data, request{outputs: h.outputs, wrt: h.wrt, held: h.held}, nil)
	if err != nil {
		return nil, fmt.Errorf("nn: head forward: %w", err)
	}
	return outs[0], nil
}

// Gradient evaluates n samples and returns their outputs (n·OutputSize) and,
// for each sample i, ∂out[i, target[i]]/∂x[i] (n·∏InputShape values). All
// samples share one forward and one backward pass (per chunk of at most
// Options.MaxBatch samples): the loss L = Σ_i out[i, target[i]] is formed with
// a one-hot mask, and since samples do not interact, ∂L/∂x[i] is exactly
// sample i's gradient.
func (h *Head) Gradient(ctx context.Context, x []float64, n int, target []int) (out, grad []float64, err error) {
	defer recoverEngine("nn: head gradient", &err)
	if err := h.check(x, n); err != nil {
		return nil, nil, fmt.Errorf("nn: head gradient: %w", err)
	}
	if len(target) != n {
		return nil, nil, fmt.Errorf("nn: head gradient: %w: expected %d targets (one per sample), got %d", ErrBadRequest, n, len(target))
	}
	mask := make([]float64, n*h.outSize)
	for i, t := range target {
		if t < 0 || t >= h.outSize {
			return nil, nil, fmt.Errorf("nn: head gradient: %w: target[%d] = %d, expected 0 ≤ target < %d", ErrBadRequest, i, t, h.outSize)
		}
		mask[i*h.outSize+t] = 1
	}
	shapes, data := h.feed(x, n)
	outs, _, grad, err := h.nw.runReq(ctx, shapes, data, request{outputs: h.outputs, grad: true, wrt: h.wrt, held: h.held}, mask)
	if err != nil {
		return nil, nil, fmt.Errorf("nn: head gradient: %w", err)
	}
	return outs[0], grad, nil
}

// Gradient is a convenience over Head, for a model whose only runtime input
// is the one sel names (by default the first floating-point input): for x
// (full shape, first dimension the batch) it returns the selected output
// (full shape) and, per sample i, ∂out[i, target[i]]/∂x[i] with x's shape,
// both as Double tensors.
func (nw *Network) Gradient(ctx context.Context, x *onnxlite.Tensor, sel Selection, target []int) (out, grad *onnxlite.Tensor, err error) {
	defer recoverEngine("nn: gradient", &err)
	h, err := nw.Head(sel)
	if err != nil {
		return nil, nil, err
	}
	if x == nil {
		return nil, nil, fmt.Errorf("nn: gradient: %w: nil input tensor", ErrBadRequest)
	}
	name := nw.feeds[h.wrt].Name
	vals, err := nw.feedValues(x, nw.feeds[h.wrt])
	if err != nil {
		return nil, nil, fmt.Errorf("nn: gradient: input %q: %w", name, err)
	}
	shape := x.Shape()
	if len(shape) != len(h.inShape)+1 || !slices.Equal(shape[1:], h.inShape) {
		return nil, nil, fmt.Errorf("nn: gradient: input %q: %w: expected shape [N %v], got %v", name, ErrShape, h.inShape, shape)
	}
	o, g, err := h.Gradient(ctx, vals, shape[0], target)
	if err != nil {
		return nil, nil, err
	}
	return makeTensor(h.value, Float64, append([]int{shape[0]}, h.outShape...), o),
		makeTensor(name, Float64, shape, g), nil
}
