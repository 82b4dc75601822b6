package nn

import (
	"context"
	"fmt"
	"sync"

	"github.com/apportion/apportion/nn/internal/asm/f32"
	"github.com/apportion/apportion/nn/internal/ops"
	"github.com/apportion/apportion/onnxlite"
)

// A dense rest. After the affine prefix of a multilayer perceptron (its
// first Gemm), the rest of the network is a chain of Relu and dense
// layers: Gemm, or MatMul with a constant weight and an optional constant
// bias added. For the gradient sums the graph engine runs that chain one
// op at a time, with its per-op bookkeeping, conversions and buffers; on a
// 100-256-256-10 perceptron those took about a third of an IG-64 call.
// denseRest runs the same chain directly on the kernels, with the same
// product for every layer (ops.Weights.Product is the function the Gemm op
// calls) and the same Relu and Relu-gradient kernels, in the same order:
// outputs and gradients have the graph's bits, row for row (tested).

// denseLayer is one layer of a dense rest: y = alpha·x·op(B) + bias,
// then max(y, 0) when relu.
type denseLayer struct {
	k, n  int
	alpha float32
	fwd   *ops.Weights // op(B), k×n
	bwd   *ops.Weights // op(B)ᵀ, n×k: the input gradient's product
	bias  []float32    // nil for none
	relu  bool
}

// denseRest is the chain from the affine prefix's output to the Head's
// value: a Relu on its input when relu0, then the layers.
type denseRest struct {
	in     int // values per sample of the chain's input
	relu0  bool
	layers []denseLayer
	work   sync.Pool // *denseWork
}

// denseWork holds one run's buffers: per layer its output values, and the
// gradients with respect to them.
type denseWork struct {
	vals, grads  [][]float32
	in, dz, seed []float32
}

// findDenseRest returns the dense rest from value from (the affine
// prefix's output, one row per sample) to value, or nil when the nodes in
// between are not such a chain, or the network is not float32.
func findDenseRest(st *onnxlite.Static, m *onnxlite.Model, from, value string, dt DType) *denseRest {
	if dt != Float32 {
		return nil
	}
	fs, ok := st.Values[from]
	if !ok || len(fs.Shape) != 2 || fs.Shape[0] != 1 {
		return nil
	}
	b := &builder{st: st, opset: m.OpsetVersion("")}
	r := &denseRest{in: fs.Shape[1]}
	cur, width := from, fs.Shape[1]
	nodes := needed(st.Nodes, []string{value})
	skip := map[*onnxlite.Node]bool{}
	for _, n := range needed(st.Nodes, []string{from}) {
		skip[n] = true
	}
	// Each node reads only the value before it: a chain, no branches.
	for _, n := range nodes {
		if skip[n] || constantOnly(n, st) {
			continue
		}
		if !defaultDomain(n.Domain) || len(n.Outputs) == 0 || !readsOnly(n, cur, st) {
			return nil
		}
		switch n.OpType {
		case "Relu":
			if len(r.layers) == 0 && !r.relu0 {
				r.relu0 = true
			} else if len(r.layers) > 0 && !r.layers[len(r.layers)-1].relu {
				r.layers[len(r.layers)-1].relu = true
			} else {
				return nil
			}
		case "Gemm", "MatMul":
			l, ok := denseNode(b, n, cur, width)
			if !ok {
				return nil
			}
			r.layers = append(r.layers, l)
			width = l.n
		case "Add":
			// A MatMul's bias: a constant row added to its output.
			if len(r.layers) == 0 {
				return nil
			}
			l := &r.layers[len(r.layers)-1]
			if l.bias != nil || l.relu {
				return nil
			}
			row, ok := biasRow(st, n, cur, l.n)
			if !ok {
				return nil
			}
			l.bias = row
		default:
			return nil
		}
		cur = n.Outputs[0]
		if cur == value {
			break
		}
	}
	vs, ok := st.Values[value]
	if cur != value || len(r.layers) == 0 || !ok || len(vs.Shape) != 2 || vs.Shape[1] != width {
		return nil
	}
	return r
}

// denseNode reads Gemm or MatMul node n whose first input is cur, width
// values per sample, as a dense layer.
func denseNode(b *builder, n *onnxlite.Node, cur string, width int) (denseLayer, bool) {
	st := b.st
	if len(n.Inputs) < 2 || n.Inputs[0] != cur {
		return denseLayer{}, false
	}
	w, ok := st.Consts[n.Inputs[1]]
	if !ok || !isFloat(w.DType) {
		return denseLayer{}, false
	}
	ws := w.Shape()
	if len(ws) != 2 {
		return denseLayer{}, false
	}
	tB, alpha := false, 1.0
	var bias []float64
	if n.OpType == "Gemm" {
		if n.AttrInt("transA", 0) != 0 {
			return denseLayer{}, false
		}
		tB = n.AttrInt("transB", 0) != 0
		alpha = float64(n.AttrFloat("alpha", 1))
	} else if len(n.Inputs) != 2 {
		return denseLayer{}, false
	}
	k, cols := ws[0], ws[1]
	if tB {
		k, cols = cols, k
	}
	if k != width {
		return denseLayer{}, false
	}
	if n.OpType == "Gemm" && b.has(n, 2) {
		row, fused, err := b.gemmBias(n, float64(n.AttrFloat("beta", 1)), cols)
		if err != nil || (!fused && float64(n.AttrFloat("beta", 1)) != 0) {
			return denseLayer{}, false
		}
		bias = row
	}
	vals, err := w.Float64s()
	if err != nil {
		return denseLayer{}, false
	}
	b32 := make([]float32, len(vals))
	for i, v := range vals {
		b32[i] = float32(v)
	}
	l := denseLayer{k: k, n: cols, alpha: float32(alpha),
		fwd: ops.NewWeights(tB, cols, k, b32), bwd: ops.NewWeights(!tB, k, cols, b32)}
	if bias != nil {
		l.bias = make([]float32, cols)
		for j, v := range bias {
			l.bias[j] = float32(v)
		}
	}
	return l, true
}

// biasRow reads Add node n, one of whose inputs is cur, as a constant row
// of width values added to every row of cur: the other input has shape
// [width] or [1, width].
func biasRow(st *onnxlite.Static, n *onnxlite.Node, cur string, width int) ([]float32, bool) {
	if len(n.Inputs) != 2 {
		return nil, false
	}
	c := n.Inputs[1]
	if n.Inputs[1] == cur {
		c = n.Inputs[0]
	}
	t, ok := st.Consts[c]
	if !ok || !isFloat(t.DType) {
		return nil, false
	}
	s := t.Shape()
	if prod(s) != width || len(s) > 2 || (len(s) == 2 && s[0] != 1) {
		return nil, false
	}
	vals, err := t.Float64s()
	if err != nil {
		return nil, false
	}
	row := make([]float32, width)
	for j, v := range vals {
		row[j] = float32(v)
	}
	return row, true
}

// out is the number of values per sample of the chain's output.
func (r *denseRest) out() int { return r.layers[len(r.layers)-1].n }

// workFor returns buffers for n samples.
func (r *denseRest) workFor(n int) *denseWork {
	w, _ := r.work.Get().(*denseWork)
	if w == nil {
		w = &denseWork{vals: make([][]float32, len(r.layers)), grads: make([][]float32, len(r.layers))}
	}
	w.in = grow(w.in, n*r.in)
	w.dz = grow(w.dz, n*r.in)
	for i, l := range r.layers {
		w.vals[i] = grow(w.vals[i], n*l.n)
		w.grads[i] = grow(w.grads[i], n*l.k)
	}
	w.seed = grow(w.seed, n*r.out())
	return w
}

// gradients runs the chain on the n rows of its input in w.in and writes
// the chain's output rows to out (n·out() values) and to dz the gradient
// of output target of each row with respect to its input row (n·in
// values). It computes what the graph computes for the same request (the
// Head's value with the selection mask at target as the loss): each
// layer's product, the Relu's mask on the output gradient, and the
// product with op(B)ᵀ, in float32. w.in is overwritten.
func (r *denseRest) gradients(w *denseWork, n, target int, out []float64, dz []float32) {
	x := w.in[:n*r.in]
	if r.relu0 {
		f32.Relu(x, x)
	}
	width := r.in
	for i := range r.layers {
		l := &r.layers[i]
		l.fwd.Product(n, l.alpha, x, width, l.bias, l.relu, w.vals[i])
		x, width = w.vals[i], l.n
	}
	f32.Widen(out[:n*width], x[:n*width])
	seed := w.seed[:n*width]
	clear(seed)
	for i := range n {
		seed[i*width+target] = 1
	}
	g := seed
	for i := len(r.layers) - 1; i >= 0; i-- {
		l := &r.layers[i]
		if l.relu {
			f32.ReluGrad(g, w.vals[i][:n*l.n], g)
		}
		dst := w.grads[i]
		if i == 0 {
			dst = dz
		}
		l.bwd.Product(n, l.alpha, g, l.n, nil, false, dst)
		g = dst[:n*l.k]
	}
	if r.relu0 {
		// Relu's input is positive where its output is.
		f32.ReluGrad(g, w.in[:n*r.in], g)
	}
}

// denseChunk is the number of samples one pass of a dense rest takes at
// most: its values and gradients stay in the second-level cache.
const denseChunk = 256

// sumDense is sumThrough with the rest of the network run as the dense
// chain r, on n samples whose chain inputs rows(lo, hi, dst) writes in
// float32 (samples lo..hi−1), in parts of at most denseChunk samples,
// Options.Parallel of them at once. The sums are formed in sample order
// whatever the parts, as sumThrough forms them.
func (h *Head) sumDense(ctx context.Context, p *affinePrefix, r *denseRest, n int, rows func(lo, hi int, dst []float32), weight []float64, group []int, groups, target int) (out []float64, sums [][]float64, err error) {
	size, outSize := r.in, r.out()
	if outSize != h.outSize {
		return nil, nil, fmt.Errorf("%w: dense rest of %d outputs for a value of %d", ErrEngine, outSize, h.outSize)
	}
	out = make([]float64, n*outSize)
	s := make([][]float64, groups)
	for k := range s {
		s[k] = make([]float64, size)
	}
	add := func(lo int, dz []float32) {
		for i := range len(dz) / size {
			f32.AddScaledWiden(s[groupOf(group, lo+i)], weight[lo+i], dz[i*size:(i+1)*size])
		}
	}
	chunk := min(n, denseChunk)
	par := min(h.nw.opts.Parallel, n)
	if par > 1 {
		chunk = min(chunk, (n+par-1)/par)
	}
	// run computes the part from sample lo: into shared (the gradients
	// of all n samples), or, when shared is nil, into the run's own
	// buffer, summed at once.
	run := func(lo int, shared []float32) {
		hi := min(n, lo+chunk)
		w := r.workFor(hi - lo)
		defer r.work.Put(w)
		rows(lo, hi, w.in)
		if shared != nil {
			r.gradients(w, hi-lo, target, out[lo*outSize:hi*outSize], shared[lo*size:hi*size])
			return
		}
		r.gradients(w, hi-lo, target, out[lo*outSize:hi*outSize], w.dz)
		add(lo, w.dz[:(hi-lo)*size])
	}
	if par <= 1 || chunk >= n {
		for lo := 0; lo < n; lo += chunk {
			if err := ctx.Err(); err != nil {
				return nil, nil, err
			}
			run(lo, nil)
		}
	} else {
		// Parts run at once; their gradients are summed after, in order.
		dz := make([]float32, n*size)
		next := make(chan int, (n+chunk-1)/chunk)
		for lo := 0; lo < n; lo += chunk {
			next <- lo
		}
		close(next)
		var wg sync.WaitGroup
		for range par {
			wg.Go(func() {
				for lo := range next {
					if ctx.Err() == nil {
						run(lo, dz)
					}
				}
			})
		}
		wg.Wait()
		if err := ctx.Err(); err != nil {
			return nil, nil, err
		}
		add(0, dz)
	}
	sums = make([][]float64, groups)
	for k := range s {
		sums[k] = p.p64.pullback(s[k])
	}
	return out, sums, nil
}
