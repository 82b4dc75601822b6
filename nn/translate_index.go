package nn

import (
	"github.com/apportion/apportion/nn/internal/ops"

	"fmt"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"github.com/apportion/apportion/onnxlite"
)

// The translations of the operators that select, repeat and resample
// elements: Slice, Gather, Split, Expand, Tile, Where, Resize and Upsample,
// and of the variadic elementwise operators. Their geometry (bounds, sizes,
// scales) comes from onnxlite, resolved as its shape rules resolved it.

// variadic translates Sum, Mean, Max and Min of one or more inputs into a
// chain of broadcasting binary operations (Mean: the sum divided by the
// count).
func (b *builder) variadic(n *onnxlite.Node, out string) error {
	kind := map[string]string{"Sum": "Add", "Mean": "Add", "Max": "Max", "Min": "Min"}[n.OpType]
	var acc *G.Node
	count := 0
	for i := range n.Inputs {
		if !b.has(n, i) {
			continue
		}
		x, err := b.input(n, i)
		if err != nil {
			return err
		}
		count++
		if acc == nil {
			acc = x
			continue
		}
		if acc, err = ops.Binary(acc, x, kind); err != nil {
			return err
		}
	}
	if acc == nil {
		return fmt.Errorf("%s: expected at least one input", n.OpType)
	}
	if n.OpType == "Mean" && count > 1 {
		y, err := ops.Binary(acc, b.scalar(float64(count)), "Div")
		if err != nil {
			return err
		}
		acc = y
	}
	return b.set(out, acc)
}

func (b *builder) slice(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	p, err := b.st.SliceParams(n)
	if err != nil {
		return err
	}
	y, err := ops.Slice(x, p.Start, p.Step, p.Shape)
	if err != nil {
		return err
	}
	return b.set(out, y)
}

// gather takes constant indices into the graph as a fixed selection, and
// runs indices computed at run time (token ids) through the Gather op.
func (b *builder) gather(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	xs := b.shape(n.Inputs[0])
	axis, err := onnxlite.GatherAxis(n, len(xs))
	if err != nil {
		return err
	}
	if t, ok := b.st.Consts[n.Inputs[1]]; ok {
		v, err := t.Int64s()
		if err != nil {
			return fmt.Errorf("indices: %w", err)
		}
		idx := make([]int, len(v))
		for i, k := range v {
			if k < -int64(xs[axis]) || k >= int64(xs[axis]) {
				return fmt.Errorf("indices[%d] = %d out of range for axis %d of %v", i, k, axis, xs)
			}
			if k < 0 {
				k += int64(xs[axis])
			}
			idx[i] = int(k)
		}
		y, err := ops.Take(x, axis, idx)
		if err != nil {
			return err
		}
		return b.set(out, y)
	}
	ind, err := b.input(n, 1)
	if err != nil {
		return err
	}
	y, err := ops.Gather(x, ind, axis)
	if err != nil {
		return err
	}
	return b.set(out, y)
}

// split translates each output of Split as a slice of the input.
func (b *builder) split(n *onnxlite.Node, _ string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	axis, sizes, err := b.st.SplitSizes(n)
	if err != nil {
		return err
	}
	xs := b.shape(n.Inputs[0])
	off := 0
	for i, o := range n.Outputs {
		start, step, shape := make([]int, len(xs)), ones(len(xs)), append([]int(nil), xs...)
		start[axis], shape[axis] = off, sizes[i]
		off += sizes[i]
		if o == "" {
			continue
		}
		if sizes[i] == 0 {
			if err := b.empty(o); err != nil {
				return err
			}
			continue
		}
		y, err := ops.Slice(x, start, step, shape)
		if err != nil {
			return err
		}
		if err := b.set(o, y); err != nil {
			return err
		}
	}
	return nil
}

// empty makes value name, which has no elements, a constant.
func (b *builder) empty(name string) error {
	vs := b.st.Values[name]
	b.vals[name] = b.constant(vs.Shape, nil, name)
	return nil
}

func (b *builder) expand(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	shape := b.shape(out)
	if x.Shape().Eq(tensor.Shape(shape)) {
		return b.set(out, x)
	}
	y, err := ops.Broadcast(x, shape)
	if err != nil {
		return err
	}
	return b.set(out, y)
}

// tile repeats x along each axis: x of shape (s₀, s₁, …) is viewed as
// (1, s₀, 1, s₁, …), stretched to (r₀, s₀, r₁, s₁, …) and viewed as
// (r₀s₀, r₁s₁, …), so the gradient sums the copies.
func (b *builder) tile(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	xs, os := b.shape(n.Inputs[0]), b.shape(out)
	var view, stretched []int
	for i, d := range xs {
		r := 1
		if d > 0 {
			r = os[i] / d
		}
		view = append(view, 1, d)
		stretched = append(stretched, r, d)
	}
	if len(xs) == 0 {
		return b.set(out, x)
	}
	v, err := G.Reshape(x, tensor.Shape(view))
	if err != nil {
		return err
	}
	y, err := ops.Broadcast(v, stretched)
	if err != nil {
		return err
	}
	return b.set(out, y)
}

func (b *builder) where(n *onnxlite.Node, out string) error {
	var in [3]*G.Node
	for i := range in {
		x, err := b.input(n, i)
		if err != nil {
			return err
		}
		in[i] = x
	}
	y, err := ops.Where(in[0], in[1], in[2])
	if err != nil {
		return err
	}
	return b.set(out, y)
}

// resize translates Resize and Upsample with the geometry onnxlite
// resolves.
func (b *builder) resize(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	p, err := b.st.ResizeParams(n)
	if err != nil {
		return err
	}
	xs := b.shape(n.Inputs[0])
	spec := ops.ResampleSpec{Mode: p.Mode, Coord: p.Coord, Nearest: p.Nearest, CubicA: p.CubicA,
		ExcludeOutside: p.ExcludeOutside, Extrapolation: p.Extrapolation, Antialias: p.Antialias}
	for a, d := range xs {
		spec.Axes = append(spec.Axes, ops.ResampleAxis{In: d, Out: p.Shape[a], Scale: p.Scale[a],
			Width: p.Width[a], RoiStart: p.RoiStart[a], RoiEnd: p.RoiEnd[a]})
	}
	y, err := ops.Resample(x, spec)
	if err != nil {
		return err
	}
	return b.set(out, y)
}
