package ops

import (
	"fmt"
	"hash"
	"slices"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// An index map is the linear map y = W·x (+ a fill) that the operators
// which move, repeat or resample elements compute: Slice, Split, Expand,
// Tile, Gather with constant indices, Resize and Upsample. Output element k
// of a block is
//
//	y[k] = Σ_{t ∈ taps(k)} w_t·x[col_t]     (w_t = 1 when the map has no weights)
//
// or Fill when k has no taps (tf_crop_and_resize samples outside the
// input). Blocks are the trailing axes from From on; the leading axes are
// shared by input and output and walked in step. The gradient is the
// transposed map: dL/dx[col_t] += w_t·dL/dy[k], nothing for filled
// elements.
type indexMap struct {
	name              string
	inShape, outShape []int
	from              int     // first axis of a block
	rows              []int32 // taps of output k: rows[k] to rows[k+1]
	cols              []int32 // input element (within the block) of each tap
	w                 []float64
	fill              float64
}

// block returns the number of elements of shape from axis from on.
func block(shape []int, from int) int { return shapeSize(shape[from:]) }

// newIndexMap starts a map of one tap per output element, which add fills in.
func newIndexMap(name string, in, out []int, from int) *indexMap {
	return &indexMap{name: name, inShape: slices.Clone(in), outShape: slices.Clone(out), from: from,
		rows: make([]int32, 0, block(out, from)+1)}
}

// applyIndexMap adds the op of m to the graph, reading x.
func applyIndexMap(x *G.Node, m *indexMap) (*G.Node, error) {
	dt, err := dtypeOf(m.name, x)
	if err != nil {
		return nil, err
	}
	if !slices.Equal(x.Shape(), m.inShape) {
		return nil, fmt.Errorf("nn: %s: %w: input of shape %v, expected %v", m.name, ErrShape, x.Shape(), m.inShape)
	}
	if shapeSize(m.outShape) > maxElems || len(m.cols) > maxElems {
		return nil, fmt.Errorf("nn: %s: %w", m.name, errTooLarge)
	}
	op := &indexMapOp{m: m, dt: dt, inType: x.Type(), outType: nodeType(dt, len(m.outShape)), constX: fixed(x)}
	return G.ApplyOp(op, x)
}

// indexMapOp computes y = W·x for an index map.
type indexMapOp struct {
	m               *indexMap
	dt              tensor.Dtype
	inType, outType hm.Type
	constX          bool
}

func (op *indexMapOp) Arity() int           { return 1 }
func (op *indexMapOp) Type() hm.Type        { return hm.NewFnType(op.inType, op.outType) }
func (op *indexMapOp) ReturnsPtr() bool     { return false }
func (op *indexMapOp) CallsExtern() bool    { return false }
func (op *indexMapOp) OverwritesInput() int { return -1 }
func (op *indexMapOp) String() string {
	return fmt.Sprintf("%s%v→%v", op.m.name, op.m.inShape, op.m.outShape)
}

// WriteHash hashes the op by identity: two maps of one shape pair may
// differ (two slices of one tensor).
func (op *indexMapOp) WriteHash(h hash.Hash) { fmt.Fprintf(h, "indexmap.%p%v", op.m, op.dt) }
func (op *indexMapOp) Hashcode() uint32      { return hashOp(op) }
func (op *indexMapOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return tensor.Shape(op.m.outShape).Clone(), nil
}
func (op *indexMapOp) DiffWRT(int) []bool { return []bool{!op.constX} }

func (op *indexMapOp) SymDiff(inputs G.Nodes, _, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 1 {
		return nil, fmt.Errorf("nn: %s gradient: got %d inputs, want 1", op.m.name, len(inputs))
	}
	if op.constX {
		return G.Nodes{nil}, nil
	}
	d, err := G.ApplyOp(&indexMapBackOp{op}, grad)
	if err != nil {
		return nil, fmt.Errorf("nn: %s gradient: %w", op.m.name, err)
	}
	return G.Nodes{d}, nil
}

func (op *indexMapOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *indexMapOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 1 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 1", op.m.name, len(vs))
	}
	if op.dt == tensor.Float32 {
		return indexMapRun[float32](op, p, vs[0])
	}
	return indexMapRun[float64](op, p, vs[0])
}

func indexMapRun[T float](op *indexMapOp, p, xv G.Value) (G.Value, error) {
	m := op.m
	x, err := valuesOf[T](m.name, xv, m.inShape)
	if err != nil {
		return nil, err
	}
	v, y := allocOutput[T](p, op.dt, m.outShape, nil, spanOf(x))
	ib, ob := block(m.inShape, m.from), block(m.outShape, m.from)
	fill := T(m.fill)
	for o := 0; o < shapeSize(m.outShape[:m.from]); o++ {
		xs, ys := x[o*ib:(o+1)*ib], y[o*ob:(o+1)*ob]
		for k := range ys {
			lo, hi := m.rows[k], m.rows[k+1]
			switch {
			case lo == hi:
				ys[k] = fill
			case m.w == nil && hi == lo+1:
				ys[k] = xs[m.cols[lo]]
			case m.w == nil:
				var s float64
				for t := lo; t < hi; t++ {
					s += float64(xs[m.cols[t]])
				}
				ys[k] = T(s)
			default:
				var s float64
				for t := lo; t < hi; t++ {
					s += m.w[t] * float64(xs[m.cols[t]])
				}
				ys[k] = T(s)
			}
		}
	}
	return wrap(v, y), nil
}

// indexMapBackOp computes dL/dx = Wᵀ·dL/dy.
type indexMapBackOp struct{ *indexMapOp }

func (op *indexMapBackOp) Type() hm.Type  { return hm.NewFnType(op.outType, op.inType) }
func (op *indexMapBackOp) String() string { return "∂" + op.indexMapOp.String() }
func (op *indexMapBackOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "indexmapback.%p%v", op.m, op.dt)
}
func (op *indexMapBackOp) Hashcode() uint32 { return hashOp(op) }
func (op *indexMapBackOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return tensor.Shape(op.m.inShape).Clone(), nil
}
func (op *indexMapBackOp) DiffWRT(int) []bool { return []bool{false} }
func (op *indexMapBackOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("nn: %v: %w", op, errSecondOrder)
}
func (op *indexMapBackOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

func (op *indexMapBackOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 1 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 1", op, len(vs))
	}
	if op.dt == tensor.Float32 {
		return indexMapBack[float32](op, p, vs[0])
	}
	return indexMapBack[float64](op, p, vs[0])
}

func indexMapBack[T float](op *indexMapBackOp, p, gv G.Value) (G.Value, error) {
	m := op.m
	g, err := valuesOf[T](m.name, gv, m.outShape)
	if err != nil {
		return nil, err
	}
	v, d := allocOutput[T](p, op.dt, m.inShape, nil, spanOf(g))
	clear(d)
	ib, ob := block(m.inShape, m.from), block(m.outShape, m.from)
	for o := 0; o < shapeSize(m.outShape[:m.from]); o++ {
		ds, gs := d[o*ib:(o+1)*ib], g[o*ob:(o+1)*ob]
		for k, gk := range gs {
			for t := m.rows[k]; t < m.rows[k+1]; t++ {
				if m.w == nil {
					ds[m.cols[t]] += gk
				} else {
					ds[m.cols[t]] += T(m.w[t] * float64(gk))
				}
			}
		}
	}
	return wrap(v, d), nil
}

// strides returns the row-major element strides of shape.
func strides(shape []int) []int {
	st := make([]int, len(shape))
	s := 1
	for i := len(shape) - 1; i >= 0; i-- {
		st[i] = s
		s *= shape[i]
	}
	return st
}

// copyMap returns the map of an operator whose output element at
// coordinates (c_0, …) reads input element (src_0(c_0), …): one tap per
// element, the axes independent. src[a][j] is the input coordinate along
// axis a of output coordinate j.
func copyMap(name string, in []int, src [][]int) *indexMap {
	out := make([]int, len(src))
	for a, s := range src {
		out[a] = len(s)
	}
	// The leading axes that read themselves in order are shared.
	from := 0
	for from < len(in) && len(src[from]) == in[from] && isIdentity(src[from]) {
		from++
	}
	m := newIndexMap(name, in, out, from)
	ist := strides(in[from:])
	oshape := out[from:]
	n := shapeSize(oshape)
	m.cols = make([]int32, 0, n)
	idx := make([]int, len(oshape))
	for k := 0; k < n; k++ {
		off := 0
		for a, c := range idx {
			off += src[from+a][c] * ist[a]
		}
		m.rows = append(m.rows, int32(k))
		m.cols = append(m.cols, int32(off))
		for a := len(idx) - 1; a >= 0; a-- {
			if idx[a]++; idx[a] < oshape[a] {
				break
			}
			idx[a] = 0
		}
	}
	m.rows = append(m.rows, int32(n))
	return m
}

func isIdentity(s []int) bool {
	for i, v := range s {
		if v != i {
			return false
		}
	}
	return true
}

// Slice takes the elements start[a] + k·step[a], k < shape[a], along each
// axis a of x (ONNX Slice, with the geometry resolved: steps may be
// negative). The gradient puts dL/dy back where each element came from.
func Slice(x *G.Node, start, step, shape []int) (*G.Node, error) {
	in := []int(x.Shape())
	if len(start) != len(in) || len(step) != len(in) || len(shape) != len(in) {
		return nil, fmt.Errorf("nn: Slice: %w: expected %d starts, steps and sizes for input %v", ErrShape, len(in), in)
	}
	src := make([][]int, len(in))
	for a := range in {
		src[a] = make([]int, shape[a])
		for k := range src[a] {
			i := start[a] + k*step[a]
			if i < 0 || i >= in[a] {
				return nil, fmt.Errorf("nn: Slice: %w: element %d of axis %d reads index %d of %d", ErrShape, k, a, i, in[a])
			}
			src[a][k] = i
		}
	}
	return applyIndexMap(x, copyMap("Slice", in, src))
}

// Broadcast stretches x to shape (numpy broadcasting, unidirectional: x's
// axes, aligned on the right, are 1 or equal to shape's): ONNX Expand once
// the output shape is known. The gradient sums over the stretched axes.
func Broadcast(x *G.Node, shape []int) (*G.Node, error) {
	in := []int(x.Shape())
	if len(in) > len(shape) {
		return nil, fmt.Errorf("nn: Expand: %w: input %v has more axes than %v", ErrShape, in, shape)
	}
	pad := len(shape) - len(in)
	src := make([][]int, len(shape))
	full := make([]int, len(shape))
	for a := range shape {
		d := 1
		if a >= pad {
			d = in[a-pad]
		}
		full[a] = d
		if d != 1 && d != shape[a] {
			return nil, fmt.Errorf("nn: Expand: %w: input %v does not stretch to %v", ErrShape, in, shape)
		}
		src[a] = make([]int, shape[a])
		if d != 1 {
			for k := range src[a] {
				src[a][k] = k
			}
		}
	}
	if pad > 0 {
		r, err := G.Reshape(x, tensor.Shape(full))
		if err != nil {
			return nil, err
		}
		x = r
	}
	return applyIndexMap(x, copyMap("Expand", full, src))
}

// Take gathers, along axis of x, the entries indices (already in [0, d),
// constant), as ONNX Gather with constant indices: the output has x's shape
// with axis replaced by len(indices) (the caller reshapes to the indices'
// shape). The gradient adds dL/dy onto the rows taken, once per time taken.
func Take(x *G.Node, axis int, indices []int) (*G.Node, error) {
	in := []int(x.Shape())
	if axis < 0 || axis >= len(in) {
		return nil, fmt.Errorf("nn: Gather: %w: axis %d for input %v", ErrShape, axis, in)
	}
	src := make([][]int, len(in))
	for a := range in {
		if a == axis {
			for _, i := range indices {
				if i < 0 || i >= in[a] {
					return nil, fmt.Errorf("nn: Gather: %w: index %d out of range for axis %d of %v", ErrShape, i, a, in)
				}
			}
			src[a] = slices.Clone(indices)
			continue
		}
		src[a] = make([]int, in[a])
		for k := range src[a] {
			src[a][k] = k
		}
	}
	return applyIndexMap(x, copyMap("Gather", in, src))
}
