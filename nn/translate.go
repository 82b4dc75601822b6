package nn

import (
	"github.com/apportion/apportion/nn/internal/ops"

	"fmt"
	"math"
	"slices"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"github.com/apportion/apportion/onnxlite"
)

// builder translates the nodes of one Static graph into one gorgonia
// graph. Shapes come from onnxlite.Infer: after every node the result is
// reshaped to the inferred shape when gorgonia's differs only in layout of
// ones (gorgonia keeps rank-0 values as one-element vectors, for example).
type builder struct {
	g      *G.ExprGraph
	dt     tensor.Dtype
	st     *onnxlite.Static
	opset  int64
	vals   map[string]*G.Node
	consts int
	// fused holds the Relu nodes already applied by the Conv or Gemm
	// before them (fuse_relu.go).
	fused map[*onnxlite.Node]bool
	// requested are the values the program returns, which a fusion must
	// not hide.
	requested []string
}

func newBuilder(st *onnxlite.Static, dt tensor.Dtype, m *onnxlite.Model) *builder {
	return &builder{g: G.NewGraph(), dt: dt, st: st, opset: m.OpsetVersion(""), vals: map[string]*G.Node{}}
}

// value returns the node of an ONNX value, creating constant nodes on first use.
func (b *builder) value(name string) (*G.Node, error) {
	if n, ok := b.vals[name]; ok {
		return n, nil
	}
	t, ok := b.st.Consts[name]
	if !ok {
		return nil, fmt.Errorf("value %q is not computed by any translated node", name)
	}
	if !numeric(t.DType) {
		return nil, fmt.Errorf("%w: constant %q of element type %v in arithmetic", onnxlite.ErrUnsupported, name, t.DType)
	}
	vals, err := t.Float64s()
	if err != nil {
		return nil, fmt.Errorf("constant %q: %w", name, err)
	}
	n := b.constant(t.Shape(), vals, name)
	b.vals[name] = n
	return n, nil
}

func (b *builder) constant(shape []int, vals []float64, name string) *G.Node {
	b.consts++
	gs := gShape(shape)
	return G.NewTensor(b.g, b.dt, len(gs), G.WithShape(gs...), G.WithValue(ops.Dense(b.dt, gs, vals)), G.WithName(fmt.Sprintf("%s%d:%s", ops.ConstPrefix, b.consts, name)))
}

// scalar is a one-element constant that broadcasts against any tensor.
func (b *builder) scalar(v float64) *G.Node {
	return b.constant([]int{1}, []float64{v}, fmt.Sprint(v))
}

func (b *builder) input(n *onnxlite.Node, i int) (*G.Node, error) {
	if i >= len(n.Inputs) || n.Inputs[i] == "" {
		return nil, fmt.Errorf("input %d is missing", i)
	}
	return b.value(n.Inputs[i])
}

func (b *builder) has(n *onnxlite.Node, i int) bool {
	return i < len(n.Inputs) && n.Inputs[i] != ""
}

func (b *builder) shape(name string) []int { return b.st.Values[name].Shape }

// constInts returns the elements of a constant integer input.
func (b *builder) constInts(n *onnxlite.Node, i int, what string) ([]int, error) {
	t, ok := b.st.Consts[n.Inputs[i]]
	if !ok {
		return nil, fmt.Errorf("%w: %s (input %d, %q) must be a constant, got a run-time value", onnxlite.ErrUnsupported, what, i, n.Inputs[i])
	}
	v, err := t.Int64s()
	if err != nil {
		return nil, fmt.Errorf("%s: %w", what, err)
	}
	return ints(v), nil
}

// constFloats returns the elements of a constant input.
func (b *builder) constFloats(n *onnxlite.Node, i int, what string) ([]float64, error) {
	t, ok := b.st.Consts[n.Inputs[i]]
	if !ok {
		return nil, fmt.Errorf("%w: %s (input %d, %q) must be a constant, got a run-time value", onnxlite.ErrUnsupported, what, i, n.Inputs[i])
	}
	v, err := t.Float64s()
	if err != nil {
		return nil, fmt.Errorf("%s: %w", what, err)
	}
	return v, nil
}

func ints(v []int64) []int {
	if v == nil {
		return nil
	}
	out := make([]int, len(v))
	for i, x := range v {
		out[i] = int(x)
	}
	return out
}

// set records x as the node of value name, reshaped to the inferred shape.
func (b *builder) set(name string, x *G.Node) error {
	if name == "" {
		return nil
	}
	vs, ok := b.st.Values[name]
	if !ok {
		return fmt.Errorf("output %q has no inferred shape", name)
	}
	want := gShape(vs.Shape)
	got := x.Shape()
	if !got.Eq(want) {
		if got.TotalSize() != want.TotalSize() {
			return fmt.Errorf("%w: output %q computed with shape %v, shape inference gives %v", ErrEngine, name, got, vs.Shape)
		}
		r, err := G.Reshape(x, want)
		if err != nil {
			return fmt.Errorf("reshaping %q from %v to %v: %w", name, got, want, err)
		}
		x = r
	}
	b.vals[name] = x
	return nil
}

func normAxis(axis, rank int) (int, error) {
	if axis < -rank || axis >= rank || (rank == 0 && axis != 0) {
		return 0, fmt.Errorf("axis %d out of range for rank %d", axis, rank)
	}
	if axis < 0 {
		axis += rank
	}
	return axis, nil
}

func ones(n int) []int {
	s := make([]int, n)
	for i := range s {
		s[i] = 1
	}
	return s
}

// translations maps every operator nn computes at run time to the builder
// method that translates its nodes. With the operators onnxlite folds away
// (onnxlite.FoldOnly) it is the set of operators nn runs (Unsupported).
var translations = map[string]func(b *builder, n *onnxlite.Node, out string) error{
	"Identity": (*builder).identity, "Dropout": (*builder).identity, "Constant": (*builder).constantNode,
	"Gelu": (*builder).unary, "Mish": (*builder).unary, "ThresholdedRelu": (*builder).unary,
	"Reciprocal": (*builder).unary, "Sign": (*builder).unary, "Floor": (*builder).unary,
	"Ceil": (*builder).unary, "Round": (*builder).unary,
	"Max": (*builder).variadic, "Min": (*builder).variadic, "Sum": (*builder).variadic, "Mean": (*builder).variadic,
	"Equal": (*builder).binary, "Less": (*builder).binary, "Greater": (*builder).binary,
	"ReduceMax": (*builder).reduce, "ReduceMin": (*builder).reduce, "ReduceL2": (*builder).reduce,
	"ReduceLogSumExp": (*builder).reduce,
	"Slice":           (*builder).slice, "Gather": (*builder).gather, "Split": (*builder).split,
	"Expand": (*builder).expand, "Tile": (*builder).tile, "Where": (*builder).where,
	"Resize": (*builder).resize, "Upsample": (*builder).resize,
	"LayerNormalization": (*builder).layerNorm, "GroupNormalization": (*builder).groupNorm,
	"InstanceNormalization": (*builder).instanceNorm,
	"Cast":                  (*builder).cast,
	"Reshape":               (*builder).alias, "Flatten": (*builder).alias, "Squeeze": (*builder).alias, "Unsqueeze": (*builder).alias,
	"Transpose": (*builder).transpose, "Concat": (*builder).concat,
	"Gemm": (*builder).gemm, "MatMul": (*builder).matmul,
	"BatchNormalization": (*builder).batchNorm,
	"Softmax":            (*builder).softmax, "LogSoftmax": (*builder).softmax,
	"Relu": (*builder).unary, "Sigmoid": (*builder).unary, "Tanh": (*builder).unary, "Softsign": (*builder).unary,
	"Erf": (*builder).unary, "Abs": (*builder).unary, "Sqrt": (*builder).unary, "Exp": (*builder).unary,
	"Log": (*builder).unary, "Neg": (*builder).unary, "HardSwish": (*builder).unary, "Softplus": (*builder).unary,
	"LeakyRelu": (*builder).unary, "Elu": (*builder).unary, "Celu": (*builder).unary, "Selu": (*builder).unary,
	"HardSigmoid": (*builder).unary,
	"Pow":         (*builder).pow, "Clip": (*builder).clip,
	"Add": (*builder).binary, "Sub": (*builder).binary, "Mul": (*builder).binary, "Div": (*builder).binary,
	"PRelu":     (*builder).binary,
	"ReduceSum": (*builder).reduce, "ReduceMean": (*builder).reduce,
	"Conv":    (*builder).conv,
	"MaxPool": (*builder).pool, "AveragePool": (*builder).pool,
	"GlobalAveragePool": (*builder).globalPool, "GlobalMaxPool": (*builder).globalPool,
	"Pad": (*builder).pad,
}

// Unsupported lists the nodes of m whose operator nn does not run, in graph
// order, without failing: operators onnxlite does not support
// (onnxlite.Unsupported), and those onnxlite supports but nn neither
// translates nor has onnxlite fold away. Compile refuses a model with such
// nodes, reporting all of them in one *onnxlite.UnsupportedError. A node of
// a supported operator may still be refused when its inputs or attributes
// ask for something nn does not compute (a fold-only operator on run-time
// data, Dropout in training mode). It returns nil for a nil model or graph.
func Unsupported(m *onnxlite.Model) []onnxlite.UnsupportedOp {
	if m == nil || m.Graph == nil {
		return nil
	}
	var out []onnxlite.UnsupportedOp
	for i, n := range m.Graph.Nodes {
		if n == nil || runs(n) {
			continue
		}
		u := onnxlite.UnsupportedOp{Op: n.OpType, Domain: n.Domain, Node: n.Name}
		if defaultDomain(n.Domain) {
			u.Domain = ""
		}
		if u.Node == "" {
			u.Node = fmt.Sprintf("#%d", i)
		}
		out = append(out, u)
	}
	return out
}

// runs reports whether nn runs n's operator: onnxlite supports it, and nn
// translates it or onnxlite folds it away.
func runs(n *onnxlite.Node) bool {
	return onnxlite.IsSupported(n.Domain, n.OpType) && (translations[n.OpType] != nil || onnxlite.FoldOnly(n.OpType))
}

// defaultDomain reports whether domain names the default ONNX operator set.
func defaultDomain(domain string) bool { return domain == "" || domain == "ai.onnx" }

// node translates one ONNX node.
func (b *builder) node(n *onnxlite.Node) error {
	translate := translations[n.OpType]
	switch {
	case !defaultDomain(n.Domain) || !onnxlite.IsSupported(n.Domain, n.OpType):
		return fmt.Errorf("%w: operator %s", onnxlite.ErrUnsupported, n.OpType)
	case translate == nil:
		return fmt.Errorf("%w: operator %s has no run-time translation (it must be folded into a constant)", onnxlite.ErrUnsupported, n.OpType)
	}
	out := ""
	if len(n.Outputs) > 0 {
		out = n.Outputs[0]
	}
	for _, o := range n.Outputs {
		if dt := b.st.Values[o].DType; o != "" && !numeric(dt) {
			return fmt.Errorf("%w: run-time value %q of element type %v", onnxlite.ErrUnsupported, o, dt)
		}
	}
	if b.fused[n] {
		return nil
	}
	return translate(b, n, out)
}

// identity translates Identity and Dropout (inference: the identity). A
// Dropout in training mode (is_test 0 before opset 7, training_mode true
// from 12) with a non-zero ratio drops random elements, which is refused.
func (b *builder) identity(n *onnxlite.Node, out string) error {
	if n.OpType == "Dropout" {
		training := n.AttrInt("is_test", 1) == 0 && b.opset < 7
		if b.opset >= 12 && b.has(n, 2) {
			v, err := b.constFloats(n, 2, "training_mode")
			if err != nil {
				return err
			}
			ratio := []float64{0.5}
			if b.has(n, 1) {
				if ratio, err = b.constFloats(n, 1, "ratio"); err != nil {
					return err
				}
			}
			training = len(v) == 1 && v[0] != 0 && len(ratio) == 1 && ratio[0] != 0
		}
		if training {
			return fmt.Errorf("%w: Dropout in training mode drops elements at random; export the model in inference mode", onnxlite.ErrUnsupported)
		}
	}
	return b.alias(n, out)
}

// constantNode makes the node of a Constant's value.
func (b *builder) constantNode(_ *onnxlite.Node, out string) error {
	_, err := b.value(out)
	return err
}

// cast translates a Cast of a run-time value. The engine holds every value
// in its one floating-point type, integers and booleans included, so a
// Cast to a floating-point type at least as wide as the engine's passes the
// value unchanged; a narrower one rounds (float16, bfloat16, and float32 on
// the float64 engine); a Cast to an integer type truncates toward zero
// (onnxlite's folding does the same, common practice) and one to BOOL
// gives 1 for every non-zero value.
func (b *builder) cast(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	from := b.st.Values[n.Inputs[0]].DType
	to := b.st.Values[out].DType
	var kind string
	switch {
	case to == from:
	case to == onnxlite.Bool:
		kind = "CastBool"
	case !isFloat(to) && isFloat(from):
		kind = "CastInt"
	case to == onnxlite.Float16:
		kind = "CastFloat16"
	case to == onnxlite.BFloat16:
		kind = "CastBFloat16"
	case to == onnxlite.Float && b.dt == tensor.Float64:
		kind = "CastFloat"
	}
	if kind == "" {
		return b.set(out, x)
	}
	y, err := ops.Unary(x, kind, 0, 0)
	if err != nil {
		return err
	}
	return b.set(out, y)
}

// alias makes out the node of n's first input (reshaped to out's inferred
// shape by set): Reshape, Flatten, Squeeze, Unsqueeze.
func (b *builder) alias(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	return b.set(out, x)
}

func (b *builder) globalPool(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	if r := len(b.shape(n.Inputs[0])); r < 3 || r > 4 {
		return fmt.Errorf("%w: %s on rank-%d input (1-D and 2-D spatial data only)", onnxlite.ErrUnsupported, n.OpType, r)
	}
	y, err := ops.GlobalPool(x, n.OpType == "GlobalMaxPool")
	if err != nil {
		return err
	}
	return b.set(out, y)
}

func (b *builder) transpose(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	r := len(b.shape(n.Inputs[0]))
	perm, err := transposePerm(n, r)
	if err != nil {
		return err
	}
	if r <= 1 {
		return b.set(out, x)
	}
	y, err := G.Transpose(x, perm...)
	if err != nil {
		return err
	}
	return b.set(out, y)
}

// transposePerm reads the permutation of Transpose node n on rank r
// (default: the axes reversed).
func transposePerm(n *onnxlite.Node, r int) ([]int, error) {
	perm := ints(n.AttrInts("perm", nil))
	if perm == nil {
		perm = make([]int, r)
		for i := range perm {
			perm[i] = r - 1 - i
		}
	}
	if len(perm) != r {
		return nil, fmt.Errorf("perm %v: expected %d entries for rank %d", perm, r, r)
	}
	return perm, nil
}

func (b *builder) concat(n *onnxlite.Node, out string) error {
	r := len(b.shape(out))
	axis, err := normAxis(int(n.AttrInt("axis", 0)), r)
	if err != nil {
		return err
	}
	var xs []*G.Node
	for i, name := range n.Inputs {
		if name == "" {
			continue
		}
		if s := b.shape(name); len(s) > axis && s[axis] == 0 {
			continue // empty along the axis: contributes nothing
		}
		x, err := b.input(n, i)
		if err != nil {
			return err
		}
		xs = append(xs, x)
	}
	if len(xs) == 0 {
		return fmt.Errorf("%w: Concat of empty tensors only", onnxlite.ErrUnsupported)
	}
	if len(xs) == 1 {
		return b.set(out, xs[0])
	}
	y, err := G.Concat(axis, xs...)
	if err != nil {
		return err
	}
	return b.set(out, y)
}

// gemm computes Y = alpha·op(A)·op(B) + beta·C (ONNX Gemm). alpha goes
// into the product, and a constant C that broadcasts along the rows (the
// usual bias) into it as a row beta·C that the product accumulates onto
// (gemmBias): one op forward, one backward. Other C go through an Add.
func (b *builder) gemm(n *onnxlite.Node, out string) error {
	a, err := b.input(n, 0)
	if err != nil {
		return err
	}
	bb, err := b.input(n, 1)
	if err != nil {
		return err
	}
	sa, sb := b.shape(n.Inputs[0]), b.shape(n.Inputs[1])
	if len(sa) != 2 || len(sb) != 2 {
		return fmt.Errorf("Gemm: expected rank-2 A and B, got %v and %v", sa, sb)
	}
	tA, tB := n.AttrInt("transA", 0) != 0, n.AttrInt("transB", 0) != 0
	cols := sb[1]
	if tB {
		cols = sb[0]
	}
	alpha := float64(n.AttrFloat("alpha", 1))
	beta := float64(n.AttrFloat("beta", 1))
	bias, fused, err := b.gemmBias(n, beta, cols)
	if err != nil {
		return err
	}
	if fused || !b.has(n, 2) || beta == 0 {
		relu := b.fusedRelu(n)
		y, err := ops.Gemm(a, bb, tA, tB, alpha, bias, relu != nil)
		if err != nil {
			return err
		}
		if relu != nil {
			return b.setFused(relu, y)
		}
		return b.set(out, y)
	}
	y, err := ops.Gemm(a, bb, tA, tB, alpha, nil, false)
	if err != nil {
		return err
	}
	c, err := b.input(n, 2)
	if err != nil {
		return err
	}
	if beta != 1 {
		if c, err = ops.Binary(c, b.scalar(beta), "Mul"); err != nil {
			return err
		}
	}
	if y, err = ops.Binary(y, c, "Add"); err != nil {
		return err
	}
	return b.set(out, y)
}

// matmul follows numpy.matmul: rank-1 operands gain a unit axis, leading
// (batch) axes broadcast.
func (b *builder) matmul(n *onnxlite.Node, out string) error {
	a, err := b.input(n, 0)
	if err != nil {
		return err
	}
	bb, err := b.input(n, 1)
	if err != nil {
		return err
	}
	sa := append([]int(nil), b.shape(n.Inputs[0])...)
	sb := append([]int(nil), b.shape(n.Inputs[1])...)
	if len(sa) == 0 || len(sb) == 0 {
		return fmt.Errorf("MatMul of a scalar")
	}
	if len(sa) == 1 {
		sa = []int{1, sa[0]}
	}
	if len(sb) == 1 {
		sb = []int{sb[0], 1}
	}
	reshape := func(x *G.Node, s []int) (*G.Node, error) {
		if x.Shape().Eq(tensor.Shape(s)) {
			return x, nil
		}
		return G.Reshape(x, tensor.Shape(s))
	}
	ra, rb := len(sa), len(sb)
	k := sa[ra-1]
	switch {
	case rb == 2:
		// (..., M, K)·(K, N): fold the leading axes of A into its rows.
		if a, err = reshape(a, []int{prod(sa) / k, k}); err != nil {
			return err
		}
		if bb, err = reshape(bb, sb); err != nil {
			return err
		}
		y, err := ops.MatMul(a, bb, false, false)
		if err != nil {
			return err
		}
		return b.set(out, y)
	case ra == 2:
		// (M, K)·(..., K, N) = ((..., N, K)·(M, K)ᵀ) with the last two axes swapped.
		nn := sb[rb-1]
		batch := prod(sb[:rb-2])
		if bb, err = reshape(bb, []int{batch, k, nn}); err != nil {
			return err
		}
		bt, err := G.Transpose(bb, 0, 2, 1)
		if err != nil {
			return err
		}
		if bt, err = G.Reshape(bt, tensor.Shape{batch * nn, k}); err != nil {
			return err
		}
		y, err := ops.MatMul(bt, a, false, true) // (batch·N, M)
		if err != nil {
			return err
		}
		if y, err = G.Reshape(y, tensor.Shape{batch, nn, sa[0]}); err != nil {
			return err
		}
		if y, err = G.Transpose(y, 0, 2, 1); err != nil {
			return err
		}
		return b.set(out, y)
	case slices.Equal(sa[:ra-2], sb[:rb-2]):
		batch := prod(sa[:ra-2])
		if a, err = reshape(a, []int{batch, sa[ra-2], k}); err != nil {
			return err
		}
		if bb, err = reshape(bb, []int{batch, sb[rb-2], sb[rb-1]}); err != nil {
			return err
		}
		y, err := ops.MatMul(a, bb, false, false)
		if err != nil {
			return err
		}
		return b.set(out, y)
	}
	return fmt.Errorf("%w: MatMul with broadcast batch axes %v and %v", onnxlite.ErrUnsupported, sa, sb)
}

// batchNorm folds inference-mode batch normalization,
// y = scale·(x − mean)/√(var + ε) + B (Ioffe & Szegedy 2015, Algorithm 2),
// into y = s·x + t with per-channel s = scale/√(var + ε) and t = B − mean·s.
func (b *builder) batchNorm(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	s, t, runtime, err := b.batchNormAffine(n)
	if err != nil {
		return err
	}
	sx := b.shape(n.Inputs[0])
	shape := append([]int{sx[1]}, ones(len(sx)-2)...)
	if runtime {
		return b.batchNormRuntime(n, out, x, shape, float64(n.AttrFloat("epsilon", 1e-5)))
	}
	y, err := ops.Binary(x, b.constant(shape, s, n.Inputs[1]+"/scale"), "Mul")
	if err != nil {
		return err
	}
	if y, err = ops.Binary(y, b.constant(shape, t, n.Inputs[2]+"/shift"), "Add"); err != nil {
		return err
	}
	return b.set(out, y)
}

// batchNormAffine returns the per-channel s and t of inference-mode
// BatchNormalization node n with constant parameters, y = s·x + t;
// runtime reports parameters computed at run time instead.
func (b *builder) batchNormAffine(n *onnxlite.Node) (s, t []float64, runtime bool, err error) {
	if n.AttrInt("training_mode", 0) != 0 {
		return nil, nil, false, fmt.Errorf("%w: BatchNormalization in training mode", onnxlite.ErrUnsupported)
	}
	for _, o := range n.Outputs[1:] {
		if o != "" {
			return nil, nil, false, fmt.Errorf("%w: BatchNormalization running statistics outputs", onnxlite.ErrUnsupported)
		}
	}
	sx := b.shape(n.Inputs[0])
	if len(sx) < 2 {
		return nil, nil, false, fmt.Errorf("BatchNormalization: expected input of rank ≥ 2, got %v", sx)
	}
	c := sx[1]
	for i := 1; i <= 4; i++ {
		if _, ok := b.st.Consts[n.Inputs[i]]; !ok {
			return nil, nil, true, nil
		}
	}
	var p [4][]float64
	for i, what := range []string{"scale", "B", "mean", "var"} {
		if p[i], err = b.constFloats(n, i+1, what); err != nil {
			return nil, nil, false, err
		}
	}
	for i := range p {
		if len(p[i]) != c {
			return nil, nil, false, fmt.Errorf("BatchNormalization: expected %d channel parameters, got %d", c, len(p[i]))
		}
	}
	eps := float64(n.AttrFloat("epsilon", 1e-5))
	s, t = make([]float64, c), make([]float64, c)
	for i := 0; i < c; i++ {
		s[i] = p[0][i] / math.Sqrt(p[3][i]+eps)
		t[i] = p[1][i] - p[2][i]*s[i]
	}
	return s, t, false, nil
}

// batchNormRuntime computes the same formula with graph operations when
// the parameters are run-time inputs: y = (x − mean)·scale/√(var + ε) + B.
func (b *builder) batchNormRuntime(n *onnxlite.Node, out string, x *G.Node, shape []int, eps float64) error {
	var p [4]*G.Node
	for i := range p {
		v, err := b.input(n, i+1)
		if err != nil {
			return err
		}
		if s := b.shape(n.Inputs[i+1]); len(s) != 1 || s[0] != shape[0] {
			return fmt.Errorf("BatchNormalization: expected parameter %d of shape [%d], got %v", i+1, shape[0], s)
		}
		if p[i], err = G.Reshape(v, tensor.Shape(shape)); err != nil {
			return err
		}
	}
	ve, err := ops.Binary(p[3], b.scalar(eps), "Add")
	if err != nil {
		return err
	}
	sd, err := ops.Unary(ve, "Sqrt", 0, 0)
	if err != nil {
		return err
	}
	y, err := ops.Binary(x, p[2], "Sub")
	if err != nil {
		return err
	}
	if y, err = ops.Binary(y, sd, "Div"); err != nil {
		return err
	}
	if y, err = ops.Binary(y, p[0], "Mul"); err != nil {
		return err
	}
	if y, err = ops.Binary(y, p[1], "Add"); err != nil {
		return err
	}
	return b.set(out, y)
}

// softmax: from opset 13 along one axis (default −1); before, the input is
// viewed as a matrix of ∏dims[:axis] rows (default axis 1) and normalised per row.
func (b *builder) softmax(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	s := b.shape(n.Inputs[0])
	r := len(s)
	log := n.OpType == "LogSoftmax"
	def := int64(-1)
	if b.opset < 13 {
		def = 1
	}
	axis, err := normAxis(int(n.AttrInt("axis", def)), r)
	if err != nil {
		return err
	}
	if b.opset >= 13 || axis == r-1 {
		y, err := ops.Softmax(x, axis, log)
		if err != nil {
			return err
		}
		return b.set(out, y)
	}
	rows := prod(s[:axis])
	m, err := G.Reshape(x, tensor.Shape{rows, prod(s) / rows})
	if err != nil {
		return err
	}
	y, err := ops.Softmax(m, 1, log)
	if err != nil {
		return err
	}
	return b.set(out, y)
}

func (b *builder) unary(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	alpha, beta := unaryParams(n)
	kind := n.OpType
	if kind == "Gelu" && n.AttrString("approximate", "none") == "tanh" {
		kind = "GeluTanh"
	}
	y, err := ops.Unary(x, kind, alpha, beta)
	if err != nil {
		return err
	}
	return b.set(out, y)
}

// unaryParams reads the attributes of an elementwise node with defaults:
// LeakyRelu's slope, Elu's and Celu's alpha, Selu's alpha and gamma,
// HardSigmoid's alpha and beta.
func unaryParams(n *onnxlite.Node) (alpha, beta float64) {
	switch n.OpType {
	case "LeakyRelu":
		alpha = float64(n.AttrFloat("alpha", 0.01))
	case "Elu", "Celu":
		alpha = float64(n.AttrFloat("alpha", 1))
	case "Selu":
		alpha = float64(n.AttrFloat("alpha", 1.67326319217681884765625))
		beta = float64(n.AttrFloat("gamma", 1.05070102214813232421875))
	case "HardSigmoid":
		alpha = float64(n.AttrFloat("alpha", 0.2))
		beta = float64(n.AttrFloat("beta", 0.5))
	case "ThresholdedRelu":
		alpha = float64(n.AttrFloat("alpha", 1))
	}
	return alpha, beta
}

func (b *builder) pow(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	if _, ok := b.st.Consts[n.Inputs[1]]; !ok {
		// A run-time exponent: y = x^e elementwise with broadcasting.
		e, err := b.input(n, 1)
		if err != nil {
			return err
		}
		y, err := ops.Binary(x, e, "Pow")
		if err != nil {
			return err
		}
		return b.set(out, y)
	}
	e, err := b.constFloats(n, 1, "exponent")
	if err != nil {
		return err
	}
	if len(e) == 0 {
		return fmt.Errorf("Pow: empty exponent")
	}
	for _, v := range e[1:] {
		if v != e[0] {
			// A constant exponent tensor: elementwise with broadcasting.
			en, err := b.input(n, 1)
			if err != nil {
				return err
			}
			y, err := ops.Binary(x, en, "Pow")
			if err != nil {
				return err
			}
			return b.set(out, y)
		}
	}
	y, err := ops.Unary(x, "Pow", e[0], 0)
	if err != nil {
		return err
	}
	return b.set(out, y)
}

func (b *builder) clip(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	lo, hi, runtime, err := b.clipBounds(n)
	if err != nil {
		return err
	}
	if runtime {
		return b.clipRuntime(n, out, x)
	}
	y, err := ops.Clip(x, lo, hi)
	if err != nil {
		return err
	}
	return b.set(out, y)
}

// clipBounds reads the bounds of Clip node n, ±Inf when absent, from its
// attributes (opset < 11) or its constant inputs; runtime reports a bound
// computed at run time instead.
func (b *builder) clipBounds(n *onnxlite.Node) (lo, hi float64, runtime bool, err error) {
	lo, hi = math.Inf(-1), math.Inf(1)
	if b.opset < 11 {
		if a := n.Attr("min"); a != nil {
			lo = float64(a.F)
		}
		if a := n.Attr("max"); a != nil {
			hi = float64(a.F)
		}
		return lo, hi, false, nil
	}
	for i := 1; i <= 2; i++ {
		if _, ok := b.st.Consts[n.Inputs[min(i, len(n.Inputs)-1)]]; b.has(n, i) && !ok {
			return lo, hi, true, nil
		}
	}
	for i, p := range []*float64{&lo, &hi} {
		if !b.has(n, i+1) {
			continue
		}
		v, err := b.constFloats(n, i+1, []string{"min", "max"}[i])
		if err != nil {
			return lo, hi, false, err
		}
		if len(v) != 1 {
			return lo, hi, false, fmt.Errorf("Clip: expected a scalar bound, got %d values", len(v))
		}
		*p = v[0]
	}
	return lo, hi, false, nil
}

// clipRuntime handles Clip whose bounds are run-time values; an absent
// bound is ±Inf.
func (b *builder) clipRuntime(n *onnxlite.Node, out string, x *G.Node) error {
	var bounds [2]*G.Node
	for i, def := range []float64{math.Inf(-1), math.Inf(1)} {
		if !b.has(n, i+1) {
			bounds[i] = b.scalar(def)
			continue
		}
		v, err := b.input(n, i+1)
		if err != nil {
			return err
		}
		bounds[i] = v
	}
	y, err := ops.ClipBounds(x, bounds[0], bounds[1])
	if err != nil {
		return err
	}
	return b.set(out, y)
}

func (b *builder) binary(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	y, err := b.input(n, 1)
	if err != nil {
		return err
	}
	// Before opset 7, broadcast=1 aligns B with A starting at axis (default:
	// trailing alignment, which numpy broadcasting already does).
	if b.opset < 7 && n.AttrInt("broadcast", 0) != 0 && n.Attr("axis") != nil && n.OpType != "PRelu" {
		sa, sb := b.shape(n.Inputs[0]), b.shape(n.Inputs[1])
		axis, err := normAxis(int(n.AttrInt("axis", 0)), len(sa))
		if err != nil {
			return err
		}
		if pad := len(sa) - axis - len(sb); pad > 0 {
			if y, err = G.Reshape(y, tensor.Shape(append(append([]int(nil), sb...), ones(pad)...))); err != nil {
				return err
			}
		}
	}
	if n.OpType == "PRelu" {
		sx, ss := b.shape(n.Inputs[0]), b.shape(n.Inputs[1])
		if s := preluSlopeShape(sx, ss); len(s) != len(ss) {
			if y, err = G.Reshape(y, tensor.Shape(s)); err != nil {
				return err
			}
		}
	}
	z, err := ops.Binary(x, y, n.OpType)
	if err != nil {
		return err
	}
	return b.set(out, z)
}

// preluSlopeShape is the shape PRelu's slope of shape ss broadcasts with
// against x of shape sx: a per-channel slope of shape (C) applies to axis
// 1 (the ONNX PRelu before opset 7 and the common exporter layout).
func preluSlopeShape(sx, ss []int) []int {
	if len(ss) == 1 && len(sx) > 2 && ss[0] == sx[1] && ss[0] != sx[len(sx)-1] {
		return append([]int{ss[0]}, ones(len(sx)-2)...)
	}
	return ss
}

func (b *builder) reduce(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	axes, noop, err := b.st.ReduceAxes(n)
	if err != nil {
		return err
	}
	if noop {
		return b.set(out, x)
	}
	y, err := ops.ReduceBy(x, axes, n.AttrInt("keepdims", 1) != 0, n.OpType)
	if err != nil {
		return err
	}
	return b.set(out, y)
}

// spatialAttr reads a per-axis integer attribute, default def on each of k axes.
func spatialAttr(n *onnxlite.Node, name string, k int, def int) []int {
	v := ints(n.AttrInts(name, nil))
	if v == nil {
		v = make([]int, k)
		for i := range v {
			v[i] = def
		}
	}
	return v
}

func (b *builder) conv(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	w, err := b.input(n, 1)
	if err != nil {
		return err
	}
	var bias *G.Node
	if b.has(n, 2) {
		if bias, err = b.input(n, 2); err != nil {
			return err
		}
	}
	spec, err := b.convSpec(n)
	if err != nil {
		return err
	}
	relu := b.fusedRelu(n)
	spec.Relu = relu != nil
	y, err := ops.Conv(x, w, bias, spec)
	if err != nil {
		return err
	}
	if relu != nil {
		return b.setFused(relu, y)
	}
	return b.set(out, y)
}

// convSpec reads the attributes of Conv node n, pads resolved.
func (b *builder) convSpec(n *onnxlite.Node) (ops.ConvSpec, error) {
	sx, sw := b.shape(n.Inputs[0]), b.shape(n.Inputs[1])
	k := len(sx) - 2
	if k < 1 || k > 2 {
		return ops.ConvSpec{}, fmt.Errorf("%w: Conv on rank-%d input (1-D and 2-D spatial data only)", onnxlite.ErrUnsupported, len(sx))
	}
	kernel := ints(n.AttrInts("kernel_shape", nil))
	if kernel == nil {
		kernel = append([]int(nil), sw[2:]...)
	}
	strides := spatialAttr(n, "strides", k, 1)
	dil := spatialAttr(n, "dilations", k, 1)
	pads, err := ops.ResolvePads(n.AttrString("auto_pad", "NOTSET"), sx[2:], kernel, strides, dil, spatialAttr(n, "pads", 2*k, 0))
	if err != nil {
		return ops.ConvSpec{}, err
	}
	return ops.ConvSpec{Pads: pads, Strides: strides, Dilations: dil, Group: int(n.AttrInt("group", 1))}, nil
}

// poolSpec reads the attributes of MaxPool or AveragePool node n, pads
// resolved.
func (b *builder) poolSpec(n *onnxlite.Node) (ops.PoolSpec, error) {
	if len(n.Outputs) > 1 && n.Outputs[1] != "" {
		return ops.PoolSpec{}, fmt.Errorf("%w: MaxPool Indices output", onnxlite.ErrUnsupported)
	}
	if n.AttrInt("storage_order", 0) != 0 {
		return ops.PoolSpec{}, fmt.Errorf("%w: MaxPool storage_order 1", onnxlite.ErrUnsupported)
	}
	sx := b.shape(n.Inputs[0])
	k := len(sx) - 2
	if k < 1 || k > 2 {
		return ops.PoolSpec{}, fmt.Errorf("%w: %s on rank-%d input (1-D and 2-D spatial data only)", onnxlite.ErrUnsupported, n.OpType, len(sx))
	}
	kernel := ints(n.AttrInts("kernel_shape", nil))
	if len(kernel) != k {
		return ops.PoolSpec{}, fmt.Errorf("%s: expected kernel_shape with %d entries, got %v", n.OpType, k, kernel)
	}
	spec := ops.PoolSpec{
		Kernel:          kernel,
		Strides:         spatialAttr(n, "strides", k, 1),
		Dilations:       spatialAttr(n, "dilations", k, 1),
		CeilMode:        n.AttrInt("ceil_mode", 0) != 0,
		CountIncludePad: n.AttrInt("count_include_pad", 0) != 0,
	}
	var err error
	spec.Pads, err = ops.ResolvePads(n.AttrString("auto_pad", "NOTSET"), sx[2:], kernel, spec.Strides, spec.Dilations, spatialAttr(n, "pads", 2*k, 0))
	return spec, err
}

func (b *builder) pool(n *onnxlite.Node, out string) error {
	spec, err := b.poolSpec(n)
	if err != nil {
		return err
	}
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	var y *G.Node
	if n.OpType == "MaxPool" {
		y, err = ops.MaxPool(x, spec)
	} else {
		y, err = ops.AvgPool(x, spec)
	}
	if err != nil {
		return err
	}
	return b.set(out, y)
}

func (b *builder) pad(n *onnxlite.Node, out string) error {
	x, err := b.input(n, 0)
	if err != nil {
		return err
	}
	pads, mode, value, err := b.padArgs(n)
	if err != nil {
		return err
	}
	y, err := ops.Pad(x, pads, mode, value)
	if err != nil {
		return err
	}
	return b.set(out, y)
}

// padArgs reads the pads, mode and constant value of Pad node n, from its
// attributes or (opset ≥ 11) its constant inputs.
func (b *builder) padArgs(n *onnxlite.Node) (pads []int, mode string, value float64, err error) {
	if pads, err = b.st.Pads(n); err != nil {
		return nil, "", 0, err
	}
	mode = n.AttrString("mode", "constant")
	switch {
	case b.opset < 11:
		value = float64(n.AttrFloat("value", 0))
	case b.has(n, 2):
		v, err := b.constFloats(n, 2, "constant_value")
		if err != nil {
			return nil, "", 0, err
		}
		if len(v) != 1 {
			return nil, "", 0, fmt.Errorf("Pad: expected a scalar constant_value, got %d values", len(v))
		}
		value = v[0]
	}
	return pads, mode, value, nil
}

// makeTensor wraps engine results as a Float or Double tensor.
func makeTensor(name string, dt DType, shape []int, vals []float64) *onnxlite.Tensor {
	dims := make([]int64, len(shape))
	for i, d := range shape {
		dims[i] = int64(d)
	}
	if dt == Float64 {
		return &onnxlite.Tensor{Name: name, DType: onnxlite.Double, Dims: dims, Data: vals}
	}
	f := make([]float32, len(vals))
	for i, v := range vals {
		f[i] = float32(v)
	}
	return &onnxlite.Tensor{Name: name, DType: onnxlite.Float, Dims: dims, Data: f}
}

// gemmBias returns the row beta·C of Gemm node n, cols wide, when its C
// input is a model constant that broadcasts along the rows (shape [], [1],
// [N], [1, 1] or [1, N] for N = cols): fused reports whether it did. For
// float32 programs the row is rounded as the Mul and Add it replaces
// would: float32(C)·float32(beta) in float32.
func (b *builder) gemmBias(n *onnxlite.Node, beta float64, cols int) (bias []float64, fused bool, err error) {
	if !b.has(n, 2) || beta == 0 {
		return nil, false, nil
	}
	t, ok := b.st.Consts[n.Inputs[2]]
	if !ok || !isFloat(t.DType) {
		return nil, false, nil
	}
	s := t.Shape()
	size := prod(s)
	switch {
	case len(s) > 2 || len(s) == 2 && s[0] != 1:
		return nil, false, nil
	case size != 1 && size != cols:
		return nil, false, nil
	}
	vals, err := t.Float64s()
	if err != nil {
		return nil, false, fmt.Errorf("Gemm C %q: %w", n.Inputs[2], err)
	}
	bias = make([]float64, cols)
	for j := range bias {
		v := vals[0]
		if size != 1 {
			v = vals[j]
		}
		if b.dt == tensor.Float32 {
			bias[j] = float64(float32(v) * float32(beta))
		} else {
			bias[j] = v * beta
		}
	}
	return bias, true, nil
}
