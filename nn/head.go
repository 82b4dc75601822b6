package nn

import (
	"context"
	"fmt"
	"slices"

	"github.com/apportion/apportion/onnxlite"
)

// Selection picks the output a Head differentiates.
type Selection struct {
	// Output is the name of a graph output; empty means the first output.
	Output string
	// Logits selects the input of the Softmax, LogSoftmax or Sigmoid node
	// that produces Output instead of Output itself (an error when Output is
	// produced by another operator).
	Logits bool
}

// Head is one output of a Network seen as a function of the Network's single
// runtime input, flattened per sample: the float64 view that attribution
// methods use. It is safe for concurrent use.
type Head struct {
	nw       *Network
	value    string   // the ONNX value it reads
	outputs  []string // {value}, the outputs of its requests
	inShape  []int    // per sample
	inSize   int
	outShape []int // per sample
	outSize  int
	path     *pathPlans   // built on first use by the exact path integral
	sums     *prefixPlans // found on first use by the gradient sums
}

// Head returns the view of the output chosen by sel. The Network must have
// exactly one runtime input whose per-sample shape is fully known (see
// Options.InputShapes); gradients are taken with respect to it.
func (nw *Network) Head(sel Selection) (h *Head, err error) {
	defer recoverEngine("nn: head", &err)
	if len(nw.inputs) != 1 {
		return nil, fmt.Errorf("nn: head: %w: gradients are taken w.r.t. a single runtime input; the model has %d (%s)", ErrBadRequest, len(nw.inputs), portNames(nw.inputs))
	}
	shapes, ok := nw.sampleShapes(1)
	if !ok {
		return nil, fmt.Errorf("nn: head: input %q: %w: per-sample shape %s is not fully known; give it in Options.InputShapes", nw.inputs[0].Name, ErrShape, shapeString(nw.declared[0], true))
	}
	if len(shapes[0]) == 0 {
		return nil, fmt.Errorf("nn: head: input %q: %w: a scalar input has no batch dimension", nw.inputs[0].Name, ErrShape)
	}
	if shapes[0][0] != 1 {
		return nil, fmt.Errorf("nn: head: input %q: %w: the model fixes the batch dimension to %d; a Head needs a free batch or a batch of 1", nw.inputs[0].Name, ErrShape, shapes[0][0])
	}
	st, err := nw.inferFor(shapes)
	if err != nil {
		// Not batch-consistent after relaxing: the model as exported at batch 1.
		st, err = onnxStaticAtOne(nw, shapes)
		if err != nil {
			return nil, fmt.Errorf("nn: head: %w", err)
		}
	}
	out := sel.Output
	if out == "" {
		if len(st.Outputs) == 0 {
			return nil, fmt.Errorf("nn: head: %w: the model has no outputs", ErrBadRequest)
		}
		out = st.Outputs[0]
	}
	found := false
	for _, o := range st.Outputs {
		found = found || o == out
	}
	if !found {
		return nil, fmt.Errorf("nn: head: %w: no graph output %q (outputs: %q)", ErrBadRequest, out, st.Outputs)
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
			return nil, fmt.Errorf("nn: head: %w: Logits needs output %q to be produced by Softmax, LogSoftmax or Sigmoid, it is produced by %s", ErrBadRequest, out, prod)
		}
	}
	vs, ok := st.Values[value]
	if !ok || len(vs.Shape) == 0 || vs.Shape[0] != 1 {
		return nil, fmt.Errorf("nn: head: %w: value %q has shape %v at batch 1; expected a leading batch dimension of 1", ErrShape, value, vs.Shape)
	}
	if !isFloat(vs.DType) {
		return nil, fmt.Errorf("nn: head: value %q: %w: element type %v", value, ErrBadRequest, vs.DType)
	}
	h = &Head{nw: nw, value: value, outputs: []string{value}, inShape: shapes[0][1:], outShape: vs.Shape[1:], path: &pathPlans{}, sums: &prefixPlans{}}
	h.inSize, h.outSize = prod(h.inShape), prod(h.outShape)
	return h, nil
}

func onnxStaticAtOne(nw *Network, shapes [][]int) (*onnxlite.Static, error) {
	return onnxlite.Infer(nw.model, nw.inputMap(shapes))
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
	if n <= 0 {
		return fmt.Errorf("%w: expected a batch of at least 1 sample, got %d", ErrBadRequest, n)
	}
	if h.inSize == 0 || n > len(x)/max(h.inSize, 1) || len(x) != n*h.inSize {
		return fmt.Errorf("%w: %d samples of shape %v need %d values, got %d", ErrShape, n, h.inShape, n*h.inSize, len(x))
	}
	return checkFinite(x, h.inSize)
}

func (h *Head) shapes(n int) [][]int {
	return [][]int{append([]int{n}, h.inShape...)}
}

// Forward evaluates n samples held in x (n·∏InputShape values, row-major)
// and returns their n·OutputSize outputs.
func (h *Head) Forward(ctx context.Context, x []float64, n int) (out []float64, err error) {
	defer recoverEngine("nn: head forward", &err)
	if err := h.check(x, n); err != nil {
		return nil, fmt.Errorf("nn: head forward: %w", err)
	}
	outs, _, _, err := h.nw.runReq(ctx, h.shapes(n), [][]float64{x}, request{outputs: h.outputs}, nil)
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
	outs, _, grad, err := h.nw.runReq(ctx, h.shapes(n), [][]float64{x}, request{outputs: h.outputs, grad: true}, mask)
	if err != nil {
		return nil, nil, fmt.Errorf("nn: head gradient: %w", err)
	}
	return outs[0], grad, nil
}

// Gradient is a convenience over Head: for the single runtime input x (full
// shape, first dimension the batch) it returns the selected output (full
// shape) and, per sample i, ∂out[i, target[i]]/∂x[i] with x's shape, both as
// Double tensors.
func (nw *Network) Gradient(ctx context.Context, x *onnxlite.Tensor, sel Selection, target []int) (out, grad *onnxlite.Tensor, err error) {
	defer recoverEngine("nn: gradient", &err)
	h, err := nw.Head(sel)
	if err != nil {
		return nil, nil, err
	}
	if x == nil {
		return nil, nil, fmt.Errorf("nn: gradient: %w: nil input tensor", ErrBadRequest)
	}
	vals, err := tensorFloats(x)
	if err != nil {
		return nil, nil, fmt.Errorf("nn: gradient: input %q: %w", nw.inputs[0].Name, err)
	}
	shape := x.Shape()
	if len(shape) != len(h.inShape)+1 || !slices.Equal(shape[1:], h.inShape) {
		return nil, nil, fmt.Errorf("nn: gradient: input %q: %w: expected shape [N %v], got %v", nw.inputs[0].Name, ErrShape, h.inShape, shape)
	}
	o, g, err := h.Gradient(ctx, vals, shape[0], target)
	if err != nil {
		return nil, nil, err
	}
	return makeTensor(h.value, Float64, append([]int{shape[0]}, h.outShape...), o),
		makeTensor(nw.inputs[0].Name, Float64, shape, g), nil
}
