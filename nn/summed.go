package nn

import (
	"context"
	"fmt"
	"sync"

	"github.com/apportion/apportion/nn/internal/asm/f32"
	"github.com/apportion/apportion/onnxlite"
)

// Sums of gradients. Integrated gradients and SmoothGrad need only a
// weighted sum of input gradients, Σ_i w_i ∇F(x_i). When the input goes
// first through a chain of affine operations P (a Gemm, MatMul or Conv
// with constant weights, with the elementwise arithmetic, BatchNorm,
// padding and pooling of path_plan.go around it) that nothing else reads,
// ∇F(x_i) = Pᵀ ∇G(P(x_i)) for the rest of the network G, so
//
//	Σ_i w_i ∇F(x_i) = Pᵀ (Σ_i w_i ∇G(z_i)),   z_i = P(x_i)
//
// and P's input-gradient product runs once, on the weighted sum, instead
// of once per point. Along a straight path x_i = a + α_i (b − a) the
// forward pass through P is affine in α too: z_i = P(a) + α_i (P(b) − P(a)).

// affinePrefix is the chain of affine operations the Head's input goes
// through first.
type affinePrefix struct {
	value string             // the chain's output: the input of the rest
	shape []int              // its per-sample shape
	p64   *pathPlan[float64] // the chain, for the pullback and paths
	p32   *pathPlan[float32] // the chain in float32, for float32 networks
	rest  *denseRest         // the network after the chain, when it is dense; nil otherwise
}

// prefixPlans holds a Head's affine prefix, found on first use.
type prefixPlans struct {
	once sync.Once
	p    *affinePrefix // nil: none
}

// summingPrefix is the affine prefix GradientSum and PathGradientSum pull
// their sums back through, or nil for point-by-point sums. Pulling the sum
// back once saves the prefix's input gradient per point, but the sum is
// formed on the prefix's output in float64, one row per point. Where that
// output is wider than the input (every model of the benchmark zoo:
// 30 → 64, 100 → 256, a first convolution with more channels out than in)
// and the rest runs on the graph engine, moving those rows costs more than
// the products saved: point by point, IG-64 took 0.53–0.59 ms instead of
// 0.75–0.92 on the 100-256-256-10 MLP, 2.9–3.1 instead of 5.1–7.5 on
// CNN-S and 20–25 instead of 30–33 on CNN-M, SmoothGrad-50 likewise (one
// thread, Intel Xeon with AVX-512, medians of alternating runs). When the
// rest is a dense chain (denseRest), which costs no graph, the sums go
// through the prefix whatever its width: on the MLP, IG-64 took 0.28–0.30
// ms instead of 0.32–0.33 (three alternating runs on a loaded machine).
func (h *Head) summingPrefix() *affinePrefix {
	p := h.prefix()
	if p == nil || (prod(p.shape) > h.inSize && p.rest == nil) {
		return nil
	}
	return p
}

// prefix returns the Head's affine prefix, or nil when the input is read
// by anything else first (or the chain would end at the Head's value), or
// the model has other inputs.
func (h *Head) prefix() *affinePrefix {
	pp := h.sums
	pp.once.Do(func() {
		if !h.single() {
			return
		}
		var err error
		defer recoverEngine("nn: affine prefix", &err)
		shapes := [][]int{append([]int{1}, h.inShape...)}
		st, err := onnxlite.Infer(h.nw.model, h.nw.inputMap(shapes))
		if err != nil {
			return
		}
		pp.p = findPrefix(st, h.nw.model, h.value, h.nw.opts.DType)
		if pp.p != nil {
			pp.p.rest = findDenseRest(st, h.nw.model, pp.p.value, h.value, h.nw.opts.DType)
		}
	})
	return pp.p
}

// findPrefix walks from the single runtime input through nodes that are
// the only reader of the value before them and affine, up to the last one
// before a node of another kind.
func findPrefix(st *onnxlite.Static, m *onnxlite.Model, value string, dt DType) *affinePrefix {
	if len(st.Inputs) != 1 {
		return nil
	}
	readers := map[string]int{}
	for _, n := range st.Nodes {
		for _, in := range n.Inputs {
			readers[in]++
		}
	}
	for _, o := range st.Outputs {
		readers[o]++
	}
	nodes := needed(st.Nodes, []string{value})
	cur := st.Inputs[0]
	var chain []*onnxlite.Node
	for _, n := range nodes {
		if constantOnly(n, st) {
			continue
		}
		if len(n.Outputs) == 0 || n.Outputs[0] == value || readers[cur] != 1 || !readsOnly(n, cur, st) || !affineOp(n.OpType) {
			break
		}
		chain = append(chain, n)
		cur = n.Outputs[0]
	}
	vs := st.Values[cur].Shape
	if len(chain) == 0 || len(vs) == 0 || vs[0] != 1 {
		return nil
	}
	p := &affinePrefix{value: cur, shape: vs[1:]}
	var err error
	if p.p64, err = chainPlan[float64](st, m, chain, cur); err != nil {
		return nil
	}
	if dt == Float32 {
		if p.p32, err = chainPlan[float32](st, m, chain, cur); err != nil {
			return nil
		}
	}
	return p
}

// suffixStatic is st with value from as its one input and without the
// nodes that compute it: the rest of the network after an affine prefix.
func suffixStatic(st *onnxlite.Static, from string) (*onnxlite.Static, error) {
	if _, ok := st.Values[from]; !ok {
		return nil, fmt.Errorf("%w: no value %q in the graph", ErrBadRequest, from)
	}
	drop := map[*onnxlite.Node]bool{}
	for _, n := range needed(st.Nodes, []string{from}) {
		drop[n] = true
	}
	cp := *st
	cp.Inputs = []string{from}
	cp.Nodes = nil
	for _, n := range st.Nodes {
		if !drop[n] {
			cp.Nodes = append(cp.Nodes, n)
		}
	}
	return &cp, nil
}

// readsOnly reports whether n's only run-time input is value (its other
// inputs are constants).
func readsOnly(n *onnxlite.Node, value string, st *onnxlite.Static) bool {
	found := false
	for _, in := range n.Inputs {
		switch {
		case in == "":
		case in == value:
			found = true
		default:
			if _, ok := st.Consts[in]; !ok {
				return false
			}
		}
	}
	return found
}

// constantOnly reports whether every input of n is a constant.
func constantOnly(n *onnxlite.Node, st *onnxlite.Static) bool {
	for _, in := range n.Inputs {
		if _, ok := st.Consts[in]; in != "" && !ok {
			return false
		}
	}
	return true
}

// affineOp reports whether the path plan translates op as an affine
// operation (or a reshape).
func affineOp(op string) bool {
	switch op {
	case "Gemm", "MatMul", "Conv", "Add", "Sub", "Mul", "Div", "Neg", "BatchNormalization",
		"Transpose", "Pad", "AveragePool", "GlobalAveragePool", "ReduceSum", "ReduceMean",
		"Identity", "Reshape", "Flatten", "Squeeze", "Unsqueeze", "Dropout", "Cast":
		return true
	}
	return false
}

// chainPlan is the path plan of the nodes of chain, whose output is out.
func chainPlan[T pathFloat](st *onnxlite.Static, m *onnxlite.Model, chain []*onnxlite.Node, out string) (*pathPlan[T], error) {
	pb := &planBuilder[T]{b: builder{st: st, opset: m.OpsetVersion("")}, slot: map[string]int{}}
	pb.newSlot(st.Inputs[0])
	for i, n := range chain {
		if err := pb.node(n, i); err != nil {
			return nil, err
		}
	}
	s, ok := pb.slot[out]
	if !ok {
		return nil, fmt.Errorf("value %q is not computed by the chain", out)
	}
	return &pathPlan[T]{ops: pb.ops, sizes: pb.sizes, output: s}, nil
}

// apply runs the chain on n rows of x and returns its output rows.
func (p *pathPlan[T]) apply(n int, x []T) []T {
	vals := make([][]T, len(p.sizes))
	vals[0] = x
	for _, op := range p.ops {
		out := make([]T, n*p.sizes[op.output()])
		op.forward(n, rows(vals, op.inputs()), out)
		vals[op.output()] = out
	}
	return vals[p.output]
}

// pullback returns the gradient with respect to the chain's input of
// Σ g·(chain output), for one row g.
func (p *pathPlan[T]) pullback(g []T) []T {
	grads := make([][]T, len(p.sizes))
	grads[p.output] = g
	for k := len(p.ops) - 1; k >= 0; k-- {
		op := p.ops[k]
		for _, s := range op.inputs() {
			if grads[s] == nil {
				grads[s] = make([]T, p.sizes[s])
			}
		}
		if grads[op.output()] != nil {
			op.backward(1, nil, grads[op.output()], rows(grads, op.inputs()))
		}
	}
	if grads[0] == nil {
		return make([]T, p.sizes[0])
	}
	return grads[0]
}

// GradientSum returns the outputs of the n samples in x (n·OutputSize
// values) and the weighted sum of their input gradients,
//
//	Σ_i weight[i] · ∂out[i, target]/∂x[i]
//
// (∏InputShape values). When the input goes first through a chain of
// affine layers that nothing else reads, the sum is formed on the chain's
// output gradients, in float64 in sample order, and pulled back through the
// chain once, in float64; otherwise it sums the samples' input gradients
// in float64 in sample order. Either way the sum does not depend on how
// the samples are split into batches (Options.MaxBatch, Parallel).
func (h *Head) GradientSum(ctx context.Context, x []float64, n int, weight []float64, target int) (out, sum []float64, err error) {
	defer recoverEngine("nn: gradient sum", &err)
	if err := h.check(x, n); err != nil {
		return nil, nil, fmt.Errorf("nn: gradient sum: %w", err)
	}
	if err := h.checkSum(n, weight, target); err != nil {
		return nil, nil, fmt.Errorf("nn: gradient sum: %w", err)
	}
	p := h.summingPrefix()
	if p == nil {
		out, sums, err := h.sumPointwise(ctx, n, weight, nil, 1, target, func(i int, dst []float64) { copy(dst, x[i*h.inSize:(i+1)*h.inSize]) })
		return out, first(sums), err
	}
	var z []float64
	if p.p32 != nil {
		z32 := p.p32.apply(n, convertSlice[float32](x))
		if p.rest != nil {
			out, sums, err := h.sumDense(ctx, p, p.rest, n, func(lo, hi int, dst []float32) {
				copy(dst, z32[lo*len(z32)/n:hi*len(z32)/n])
			}, weight, nil, 1, target)
			return out, first(sums), err
		}
		z = make([]float64, len(z32))
		for i, v := range z32 {
			z[i] = float64(v)
		}
	} else {
		z = p.p64.apply(n, x)
	}
	out, sums, err := h.sumThrough(ctx, p, z, n, weight, nil, 1, target)
	return out, first(sums), err
}

// PathGradientSum is GradientSum at the n = len(alpha) points of the
// straight path x_i = from + alpha[i]·(to − from). With an affine chain
// first, the chain's outputs are formed in float64 as
// z_i = P(from) + alpha[i]·(P(to) − P(from)), exact up to rounding since
// P is affine.
func (h *Head) PathGradientSum(ctx context.Context, from, to, alpha, weight []float64, target int) (out, sum []float64, err error) {
	out, sums, err := h.PathGradientSums(ctx, from, to, alpha, weight, nil, 1, target)
	return out, first(sums), err
}

// PathGradientSums is PathGradientSum with the points in groups: point i
// belongs to group[i] (every point to group 0 when group is nil), and
// sums[g] is the weighted sum of the input gradients of group g's points,
// g < groups. Each sum has the bits PathGradientSum gives for its group's
// points alone, in their order: a sample's gradient does not depend on its
// batch, and each sum is formed in point order. One call serves rules
// whose nodes keep separate sums (the ends of the trapezoid rule) with one
// pass of the network instead of one per group.
func (h *Head) PathGradientSums(ctx context.Context, from, to, alpha, weight []float64, group []int, groups, target int) (out []float64, sums [][]float64, err error) {
	defer recoverEngine("nn: path gradient sum", &err)
	for _, v := range [][]float64{from, to} {
		if err := h.check(v, 1); err != nil {
			return nil, nil, fmt.Errorf("nn: path gradient sum: %w", err)
		}
	}
	n := len(alpha)
	if err := h.checkSum(n, weight, target); err != nil {
		return nil, nil, fmt.Errorf("nn: path gradient sum: %w", err)
	}
	if err := checkGroups(n, group, groups); err != nil {
		return nil, nil, fmt.Errorf("nn: path gradient sum: %w", err)
	}
	p := h.summingPrefix()
	if p == nil {
		return h.sumPointwise(ctx, n, weight, group, groups, target, func(i int, dst []float64) {
			for j := range dst {
				dst[j] = from[j] + alpha[i]*(to[j]-from[j])
			}
		})
	}
	ends := p.p64.apply(2, append(append([]float64(nil), from...), to...))
	size := len(ends) / 2
	u, v := ends[:size], ends[size:]
	d := make([]float64, size)
	for j := range d {
		d[j] = v[j] - u[j]
	}
	if p.rest != nil {
		// The values the graph below is given, z rounded to float32.
		return h.sumDense(ctx, p, p.rest, n, func(lo, hi int, dst []float32) {
			for i := lo; i < hi; i++ {
				f32.LerpNarrow(dst[(i-lo)*size:(i-lo+1)*size], u, d, alpha[i])
			}
		}, weight, group, groups, target)
	}
	z := make([]float64, n*size)
	for i, a := range alpha {
		zi := z[i*size : (i+1)*size]
		for j := range zi {
			zi[j] = u[j] + float64(a*d[j])
		}
	}
	return h.sumThrough(ctx, p, z, n, weight, group, groups, target)
}

// checkGroups checks a grouping of n points into groups groups.
func checkGroups(n int, group []int, groups int) error {
	if groups < 1 {
		return fmt.Errorf("%w: %d groups, expected at least 1", ErrBadRequest, groups)
	}
	if group == nil {
		return nil
	}
	if len(group) != n {
		return fmt.Errorf("%w: %d group numbers for %d points", ErrBadRequest, len(group), n)
	}
	for i, g := range group {
		if g < 0 || g >= groups {
			return fmt.Errorf("%w: point %d in group %d, expected 0 ≤ group < %d", ErrBadRequest, i, g, groups)
		}
	}
	return nil
}

// groupOf is point i's group: group[i], or 0 when group is nil.
func groupOf(group []int, i int) int {
	if group == nil {
		return 0
	}
	return group[i]
}

// first is sums[0], or nil when there is none.
func first(sums [][]float64) []float64 {
	if len(sums) == 0 {
		return nil
	}
	return sums[0]
}

func (h *Head) checkSum(n int, weight []float64, target int) error {
	if n <= 0 || len(weight) != n {
		return fmt.Errorf("%w: %d weights for %d samples", ErrBadRequest, len(weight), n)
	}
	if target < 0 || target >= h.outSize {
		return fmt.Errorf("%w: target %d, expected 0 ≤ target < %d", ErrBadRequest, target, h.outSize)
	}
	return checkFinite(weight, 1)
}

// sumThrough runs the rest of the network on the chain outputs z of n
// samples, sums their gradients with respect to z with the weights, and
// pulls the sum back through the chain.
func (h *Head) sumThrough(ctx context.Context, p *affinePrefix, z []float64, n int, weight []float64, group []int, groups, target int) (out []float64, sums [][]float64, err error) {
	size := len(z) / n
	shape := append([]int{n}, p.shape...)
	mask := make([]float64, n*h.outSize)
	for i := range n {
		mask[i*h.outSize+target] = 1
	}
	outs, _, g, err := h.nw.runReq(ctx, [][]int{shape}, [][]float64{z}, request{outputs: h.outputs, grad: true, from: p.value}, mask)
	if err != nil {
		return nil, nil, fmt.Errorf("nn: gradient sum: %w", err)
	}
	s := make([][]float64, groups)
	for k := range s {
		s[k] = make([]float64, size)
	}
	for i, w := range weight {
		sk := s[groupOf(group, i)]
		for j, v := range g[i*size : (i+1)*size] {
			sk[j] += float64(w * v)
		}
	}
	sums = make([][]float64, groups)
	for k := range s {
		sums[k] = p.p64.pullback(s[k])
	}
	return outs[0], sums, nil
}

// sumPointwise sums the input gradients of n points by group (as
// PathGradientSums), point(i, dst) writing point i, in chunks of at most
// Options.MaxBatch.
func (h *Head) sumPointwise(ctx context.Context, n int, weight []float64, group []int, groups, target int, point func(i int, dst []float64)) (out []float64, sums [][]float64, err error) {
	sums = make([][]float64, groups)
	for k := range sums {
		sums[k] = make([]float64, h.inSize)
	}
	chunk := min(n, h.nw.opts.MaxBatch)
	x := make([]float64, chunk*h.inSize)
	tgt := make([]int, chunk)
	for i := range tgt {
		tgt[i] = target
	}
	for lo := 0; lo < n; lo += chunk {
		k := min(chunk, n-lo)
		for i := range k {
			point(lo+i, x[i*h.inSize:(i+1)*h.inSize])
		}
		o, g, err := h.Gradient(ctx, x[:k*h.inSize], k, tgt[:k])
		if err != nil {
			return nil, nil, err
		}
		out = append(out, o...)
		for i := range k {
			w, sum := weight[lo+i], sums[groupOf(group, lo+i)]
			for j, v := range g[i*h.inSize : (i+1)*h.inSize] {
				sum[j] += w * v
			}
		}
	}
	return out, sums, nil
}
