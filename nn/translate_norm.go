package nn

import (
	"github.com/apportion/apportion/nn/internal/ops"

	"fmt"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"github.com/apportion/apportion/onnxlite"
)

// The translations of the normalization operators: standardisation over
// rows of consecutive elements (ops.Normalize), then the scale and bias
// with broadcasting.

// epsilon reads a normalization's epsilon attribute: a float32, as the
// model stores it (1e-5 by default).
func epsilon(n *onnxlite.Node) float64 { return float64(n.AttrFloat("epsilon", 1e-5)) }

// affine returns y·scale + bias, with scale and bias the node's inputs of
// those indices (an omitted one left out), each reshaped to shape (when
// not nil) to broadcast against y.
func (b *builder) affine(y *G.Node, n *onnxlite.Node, scale, bias int, shape []int) (*G.Node, error) {
	for _, step := range []struct {
		i    int
		kind string
	}{{scale, "Mul"}, {bias, "Add"}} {
		if step.i < 0 || !b.has(n, step.i) {
			continue
		}
		p, err := b.input(n, step.i)
		if err != nil {
			return nil, err
		}
		if shape != nil {
			if p, err = G.Reshape(p, tensor.Shape(shape)); err != nil {
				return nil, err
			}
		}
		if y, err = ops.Binary(y, p, step.kind); err != nil {
			return nil, err
		}
	}
	return y, nil
}

// layerNorm translates LayerNormalization-17: Y normalises X over the axes
// from axis on (Ba et al. 2016, eq. 4), times Scale plus B; the optional
// Mean and InvStdDev outputs are the row means and 1/√(σ² + ε).
func (b *builder) layerNorm(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	xs := b.shape(n.Inputs[0])
	axis, err := normAxis(int(n.AttrInt("axis", -1)), len(xs))
	if err != nil {
		return err
	}
	eps := epsilon(n)
	y, err := ops.Normalize(x, prod(xs[axis:]), eps)
	if err != nil {
		return err
	}
	if y, err = b.affine(y, n, 1, 2, nil); err != nil {
		return err
	}
	if err := b.set(out, y); err != nil {
		return err
	}
	if len(n.Outputs) > 1 && (n.Outputs[1] != "" || len(n.Outputs) > 2 && n.Outputs[2] != "") {
		return b.layerNormStats(n, x, xs, axis, eps)
	}
	return nil
}

// layerNormStats computes LayerNormalization's Mean and InvStdDev outputs.
func (b *builder) layerNormStats(n *onnxlite.Node, x *G.Node, xs []int, axis int, eps float64) error {
	var axes []int
	for i := axis; i < len(xs); i++ {
		axes = append(axes, i)
	}
	mean, err := ops.ReduceBy(x, axes, true, "ReduceMean")
	if err != nil {
		return err
	}
	d, err := ops.Binary(x, mean, "Sub")
	if err != nil {
		return err
	}
	if d, err = ops.Binary(d, d, "Mul"); err != nil {
		return err
	}
	v, err := ops.ReduceBy(d, axes, true, "ReduceMean")
	if err != nil {
		return err
	}
	if v, err = ops.Binary(v, b.scalar(eps), "Add"); err != nil {
		return err
	}
	if v, err = ops.Unary(v, "Sqrt", 0, 0); err != nil {
		return err
	}
	inv, err := ops.Unary(v, "Reciprocal", 0, 0)
	if err != nil {
		return err
	}
	if err := b.set(n.Outputs[1], mean); err != nil {
		return err
	}
	if len(n.Outputs) > 2 {
		return b.set(n.Outputs[2], inv)
	}
	return nil
}

// instanceNorm translates InstanceNormalization: each channel of each
// sample normalised over its spatial axes (Ulyanov et al. 2016, eq. 2),
// times scale plus B per channel.
func (b *builder) instanceNorm(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	xs := b.shape(n.Inputs[0])
	y, err := ops.Normalize(x, prod(xs[2:]), epsilon(n))
	if err != nil {
		return err
	}
	if y, err = b.affine(y, n, 1, 2, append([]int{xs[1]}, ones(len(xs)-2)...)); err != nil {
		return err
	}
	return b.set(out, y)
}

// groupNorm translates GroupNormalization: the channels of each sample in
// num_groups groups, each group normalised over its channels and spatial
// axes (Wu & He 2018, eq. 1–2), then scaled and shifted per channel
// (opset 21) or per group (opset 18, each group's value applying to its
// channels).
func (b *builder) groupNorm(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	xs := b.shape(n.Inputs[0])
	g := int(n.AttrInt("num_groups", 0))
	if g < 1 || xs[1]%g != 0 {
		return fmt.Errorf("GroupNormalization: num_groups %d for %d channels", g, xs[1])
	}
	y, err := ops.Normalize(x, xs[1]/g*prod(xs[2:]), epsilon(n))
	if err != nil {
		return err
	}
	spatial := ones(len(xs) - 2)
	if b.opset >= 21 {
		if y, err = b.affine(y, n, 1, 2, append([]int{xs[1]}, spatial...)); err != nil {
			return err
		}
		return b.set(out, y)
	}
	// Per group: (G) viewed as (G, 1, 1…) against y viewed as (N, G, C/G·S…).
	grouped := []int{xs[0], g, xs[1] / g * prod(xs[2:])}
	if y, err = G.Reshape(y, tensor.Shape(grouped)); err != nil {
		return err
	}
	if y, err = b.affine(y, n, 1, 2, []int{g, 1}); err != nil {
		return err
	}
	return b.set(out, y)
}
