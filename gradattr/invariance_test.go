package gradattr_test

import (
	"bytes"
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
)

// Implementation invariance (Sundararajan, Taly & Yan 2017, "Axiomatic
// attribution for deep networks", §2, Axiom: Implementation Invariance;
// section numbers from memory): two networks that compute the same function
// get the same attributions, however they are built. The graphs below are
// written as ONNX IR in Go, encoded with onnxlite.Encode and decoded again
// before nn compiles them, so each goes through the same path as a model
// file. They hold DOUBLE tensors and run on the float64 engine, so that the
// two builds differ only by float64 rounding (about 1e-16 relative) and
// their attributions must agree to 1e-9.

// invTol is the agreement required between attributions of two builds of
// one function: far above the float64 rounding of either build (ε = 2^-52
// ≈ 2.2e-16, IEEE 754 binary64), far below any real difference.
const invTol = 1e-9

// irBuilder writes a graph IR with one batched run-time input and one
// output, both of element type elem.
type irBuilder struct {
	t    testing.TB
	elem onnxlite.DataType
	g    *onnxlite.Graph
}

func newIR(t testing.TB, name string, elem onnxlite.DataType, in string, inDims []int64, out string, outDims []int64) *irBuilder {
	t.Helper()
	vi := func(name string, dims []int64) *onnxlite.ValueInfo {
		shape := []onnxlite.Dim{{Param: "N"}}
		for _, d := range dims {
			shape = append(shape, onnxlite.Dim{Value: d, HasValue: true})
		}
		return &onnxlite.ValueInfo{Name: name, Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: elem, Shape: shape, HasShape: true}}
	}
	return &irBuilder{t: t, elem: elem, g: &onnxlite.Graph{
		Name:    name,
		Inputs:  []*onnxlite.ValueInfo{vi(in, inDims)},
		Outputs: []*onnxlite.ValueInfo{vi(out, outDims)},
	}}
}

// init adds an initializer of the builder's element type.
func (b *irBuilder) init(name string, dims []int64, data []float64) string {
	b.t.Helper()
	var payload any = data
	if b.elem == onnxlite.Float {
		f := make([]float32, len(data))
		for i, v := range data {
			f[i] = float32(v)
		}
		payload = f
	}
	tt, err := onnxlite.NewTensor(name, b.elem, dims, payload)
	require.NoError(b.t, err)
	b.g.Initializers = append(b.g.Initializers, tt)
	return name
}

// node appends a node with one output called out and returns out.
func (b *irBuilder) node(op, out string, inputs []string, attrs ...*onnxlite.Attribute) string {
	b.g.Nodes = append(b.g.Nodes, &onnxlite.Node{Name: out, OpType: op, Inputs: inputs, Outputs: []string{out}, Attrs: attrs})
	return out
}

// model returns the IR after a round trip through Encode and Decode.
func (b *irBuilder) model() *onnxlite.Model {
	b.t.Helper()
	m := &onnxlite.Model{
		IRVersion:    8,
		Opsets:       []onnxlite.OpsetImport{{Version: 13}},
		ProducerName: "apportion-gradattr-test",
		Graph:        b.g,
	}
	var buf bytes.Buffer
	require.NoError(b.t, onnxlite.Encode(&buf, m))
	back, err := onnxlite.Decode(bytes.NewReader(buf.Bytes()), onnxlite.DecodeOptions{})
	require.NoError(b.t, err)
	require.NoError(b.t, back.Validate())
	return back
}

// head compiles the model on engine dt and returns the Head of its output.
func (b *irBuilder) head(dt nn.DType) *nn.Head {
	b.t.Helper()
	nw, err := nn.Compile(b.model(), nn.Options{DType: dt})
	require.NoError(b.t, err)
	h, err := nw.Head(nn.Selection{})
	require.NoError(b.t, err)
	return h
}

func attrInts(name string, v ...int64) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrInts, Ints: v}
}

func attrInt(name string, v int64) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrInt, I: v}
}

func attrFloat(name string, v float32) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrFloat, F: v}
}

// seededNormals returns n draws of scale·N(0, 1) from a PCG seeded by seed: the
// parameters of a test network, not check values.
func seededNormals(seed uint64, n int, scale float64) []float64 {
	rng := rand.New(rand.NewPCG(seed, 11))
	v := make([]float64, n)
	for i := range v {
		v[i] = scale * rng.NormFloat64()
	}
	return v
}

// denseLayer is y = W x + b with W of out×in, row-major.
type denseLayer struct {
	in, out int
	w, b    []float64
}

func newDense(seed uint64, in, out int) denseLayer {
	return denseLayer{in: in, out: out, w: seededNormals(seed, in*out, 1/math.Sqrt(float64(in))), b: seededNormals(seed+1, out, 0.3)}
}

func (d denseLayer) z(x []float64, k int) float64 {
	s := d.b[k]
	for i := 0; i < d.in; i++ {
		s += d.w[k*d.in+i] * x[i]
	}
	return s
}

// transposed returns W as in×out, row-major.
func (d denseLayer) transposed() []float64 {
	t := make([]float64, len(d.w))
	for k := 0; k < d.out; k++ {
		for i := 0; i < d.in; i++ {
			t[i*d.out+k] = d.w[k*d.in+i]
		}
	}
	return t
}

// sigmoidGemm is Gemm(x, W, b; transB = 1) → Sigmoid.
func sigmoidGemm(t *testing.T, d denseLayer) *irBuilder {
	b := newIR(t, "sigmoid-gemm", onnxlite.Double, "x", []int64{int64(d.in)}, "y", []int64{int64(d.out)})
	z := b.node("Gemm", "z", []string{"x", b.init("W", []int64{int64(d.out), int64(d.in)}, d.w), b.init("b", []int64{int64(d.out)}, d.b)}, attrInt("transB", 1))
	b.node("Sigmoid", "y", []string{z})
	return b
}

// sigmoidSpelledOut is the logistic function written out, 1 / (1 + exp(−z)),
// on MatMul(x, Wᵀ) + b: the same function as sigmoidGemm, built from other
// operators.
func sigmoidSpelledOut(t *testing.T, d denseLayer) *irBuilder {
	b := newIR(t, "sigmoid-spelled-out", onnxlite.Double, "x", []int64{int64(d.in)}, "y", []int64{int64(d.out)})
	one := b.init("one", []int64{1}, []float64{1})
	h := b.node("MatMul", "xw", []string{"x", b.init("Wt", []int64{int64(d.in), int64(d.out)}, d.transposed())})
	h = b.node("Add", "z", []string{h, b.init("b", []int64{int64(d.out)}, d.b)})
	h = b.node("Neg", "negz", []string{h})
	h = b.node("Exp", "expnegz", []string{h})
	h = b.node("Add", "denom", []string{h, one})
	b.node("Div", "y", []string{one, h})
	return b
}

// sigmoidClosedForm is σ(W x + b) as a gradattr.Func, with
//
//	∂σ(z_k)/∂x_i = σ(z_k)(1 − σ(z_k)) W_ki
func sigmoidClosedForm(d denseLayer) *gradattr.Func {
	sig := func(z float64) float64 { return 1 / (1 + math.Exp(-z)) }
	return &gradattr.Func{
		Shape: []int{d.in}, Outputs: d.out,
		F: func(out, x []float64) {
			for k := range out {
				out[k] = sig(d.z(x, k))
			}
		},
		Grad: func(g, x []float64, k int) {
			s := sig(d.z(x, k))
			for i := range g {
				g[i] = s * (1 - s) * d.w[k*d.in+i]
			}
		},
	}
}

// methodRuns computes every method on m at x for output target, with fixed
// settings, keyed by a name.
func methodRuns(t *testing.T, m gradattr.Model, x []float64, target int, ref [][]float64) map[string]*gradattr.Result {
	t.Helper()
	ctx := context.Background()
	out := map[string]*gradattr.Result{}
	keep := func(name string, r *gradattr.Result, err error) {
		t.Helper()
		require.NoError(t, err, name)
		out[name] = r
	}
	r, err := gradattr.Gradient(ctx, m, x, target, gradattr.GradientOptions{})
	keep("gradient", r, err)
	r, err = gradattr.GradientTimesInput(ctx, m, x, target)
	keep("gradient×input", r, err)
	for _, rule := range everyRule {
		r, err = gradattr.IntegratedGradients(ctx, m, x, target, gradattr.IGOptions{Rule: rule, Points: 48})
		keep("ig 48 "+rule.String(), r, err)
	}
	r, err = gradattr.IntegratedGradients(ctx, m, x, target, gradattr.IGOptions{Points: 33,
		Baselines: []gradattr.Baseline{{Kind: gradattr.BaselineUniform, Lo: -1, Hi: 1, Seed: 3}, {Kind: gradattr.BaselineConstant, Value: 0.5}}})
	keep("ig 33 two baselines", r, err)
	r, err = gradattr.SmoothGrad(ctx, m, x, target, gradattr.SmoothGradOptions{Samples: 24, Seed: 7})
	keep("smoothgrad", r, err)
	r, err = gradattr.ExpectedGradients(ctx, m, x, target, gradattr.ExpectedGradientsOptions{Reference: ref, Samples: 40, Seed: 7})
	keep("expected gradients", r, err)
	return out
}

// assertSameAttributions requires every method's attributions of a and b
// to agree to invTol (relative to the largest attribution, at least 1).
func assertSameAttributions(t *testing.T, a, b map[string]*gradattr.Result, what string) {
	t.Helper()
	require.Equal(t, len(a), len(b))
	for name, ra := range a {
		rb := b[name]
		require.NotNil(t, rb, name)
		scale := 1.0
		for _, v := range ra.Attributions {
			scale = math.Max(scale, math.Abs(v))
		}
		worst := 0.0
		for i := range ra.Attributions {
			worst = math.Max(worst, math.Abs(ra.Attributions[i]-rb.Attributions[i]))
		}
		// Sundararajan et al. 2017, Implementation Invariance:
		// functionally equivalent networks get identical attributions.
		assert.LessOrEqual(t, worst, invTol*scale, "%s, %s: attributions differ by %.3g", what, name, worst)
		assert.InDelta(t, ra.Output, rb.Output, invTol, "%s, %s: output", what, name)
	}
}

// uniformRows returns n rows of dim uniform values in [lo, hi).
func uniformRows(seed uint64, n, dim int, lo, hi float64) [][]float64 {
	rng := rand.New(rand.NewPCG(seed, 5))
	rows := make([][]float64, n)
	for i := range rows {
		rows[i] = make([]float64, dim)
		for j := range rows[i] {
			rows[i][j] = lo + (hi-lo)*rng.Float64()
		}
	}
	return rows
}

func TestImplementationInvarianceSigmoid(t *testing.T) {
	d := newDense(21, 5, 3)
	x := []float64{0.8, -1.1, 0.35, 1.6, -0.4}
	ref := uniformRows(4, 12, d.in, -1, 1)
	gemm := sigmoidGemm(t, d).head(nn.Float64)
	spelled := sigmoidSpelledOut(t, d).head(nn.Float64)
	closed := sigmoidClosedForm(d)
	ctx := context.Background()

	// The logistic function σ(z) = 1/(1 + e^−z): both graphs compute it.
	outG, err := gemm.Forward(ctx, x, 1)
	require.NoError(t, err)
	outS, err := spelled.Forward(ctx, x, 1)
	require.NoError(t, err)
	want := make([]float64, d.out)
	closed.F(want, x)
	assert.InDeltaSlice(t, want, outG, 1e-14, "Gemm → Sigmoid vs σ(Wx + b)")
	assert.InDeltaSlice(t, want, outS, 1e-14, "spelled out vs σ(Wx + b)")

	// Gradients against central finite differences of each graph, error
	// O(h²) (common practice): with h = 1e-5 the truncation error is about
	// h²|σ'''| ≈ 1e-11 and the rounding error ε/h ≈ 2e-11.
	for name, h := range map[string]*nn.Head{"gemm": gemm, "spelled out": spelled} {
		target := 1
		_, g, err := h.Gradient(ctx, x, 1, []int{target})
		require.NoError(t, err)
		const step = 1e-5
		for i := range x {
			xp := append([]float64(nil), x...)
			xm := append([]float64(nil), x...)
			xp[i] += step
			xm[i] -= step
			fp, err := h.Forward(ctx, xp, 1)
			require.NoError(t, err)
			fm, err := h.Forward(ctx, xm, 1)
			require.NoError(t, err)
			assert.InDelta(t, (fp[target]-fm[target])/(2*step), g[i], 1e-9, "%s: ∂y_%d/∂x_%d", name, target, i)
		}
	}

	for target := 0; target < d.out; target++ {
		a := methodRuns(t, gemm, x, target, ref)
		b := methodRuns(t, spelled, x, target, ref)
		c := methodRuns(t, closed, x, target, ref)
		what := fmt.Sprintf("target %d", target)
		assertSameAttributions(t, a, b, what+": Gemm → Sigmoid vs MatMul → Add → Neg → Exp → Add → Div")
		assertSameAttributions(t, a, c, what+": Gemm → Sigmoid vs the closed form σ(Wx + b)")
	}

	// Completeness (Sundararajan et al. 2017, Prop. 1) on both graphs: the
	// path integrand is smooth, so automatic IG reaches 1e-6 with every rule
	// (the one-sided sums, O(1/m), at about 8192 points).
	for name, h := range map[string]*nn.Head{"gemm": gemm, "spelled out": spelled} {
		for _, rule := range everyRule {
			r := igAuto(t, h, x, rule, 1e-6)
			assert.True(t, r.Completeness.OK, "%s %v: relative gap %.3g after %d points", name, rule, r.Completeness.RelativeGap, r.Settings.Points)
		}
	}
}

// convNet is Conv(c→f, 3×3, pad 1) → [BatchNormalization] → Relu →
// Flatten → Gemm(f·s·s → out), on inputs of c×s×s.
type convNet struct {
	c, f, s, out int
	w, bias      []float64 // conv kernel f×c×3×3 and bias f
	gamma, beta  []float64 // BatchNormalization scale and shift
	mean, vari   []float64 // BatchNormalization running mean and variance
	eps          float32   // BatchNormalization epsilon (a float attribute)
	fc           denseLayer
}

func newConvNet(seed uint64, c, f, s, out int) *convNet {
	n := &convNet{c: c, f: f, s: s, out: out,
		w:     seededNormals(seed, f*c*9, 1/math.Sqrt(float64(c*9))),
		bias:  seededNormals(seed+1, f, 0.2),
		gamma: seededNormals(seed+2, f, 0.5),
		beta:  seededNormals(seed+3, f, 0.3),
		mean:  seededNormals(seed+4, f, 0.4),
		eps:   1e-5,
		fc:    newDense(seed+5, f*s*s, out),
	}
	n.vari = seededNormals(seed+6, f, 1)
	for i, v := range n.vari {
		n.vari[i] = 0.2 + v*v
	}
	for i := range n.gamma {
		n.gamma[i] += 1
	}
	return n
}

// fold returns the kernel and bias of the convolution with the batch
// normalization folded in (Ioffe & Szegedy 2015, Algorithm 2, from memory:
// the inference-time affine map y = γ(z − μ)/√(σ² + ε) + β):
//
//	w'_f = w_f · γ_f/√(σ²_f + ε),   b'_f = (b_f − μ_f) · γ_f/√(σ²_f + ε) + β_f
func (n *convNet) fold() (w, b []float64) {
	w = make([]float64, len(n.w))
	b = make([]float64, n.f)
	per := n.c * 9
	for f := 0; f < n.f; f++ {
		k := n.gamma[f] / math.Sqrt(n.vari[f]+float64(n.eps))
		for j := 0; j < per; j++ {
			w[f*per+j] = n.w[f*per+j] * k
		}
		b[f] = (n.bias[f]-n.mean[f])*k + n.beta[f]
	}
	return w, b
}

// build adds the network's nodes to b, reading input in and writing out;
// names are prefixed so that two networks can share a graph.
func (n *convNet) build(b *irBuilder, prefix, in, out string, folded bool) string {
	w, bias := n.w, n.bias
	if folded {
		w, bias = n.fold()
	}
	dims := []int64{int64(n.f), int64(n.c), 3, 3}
	h := b.node("Conv", prefix+"conv", []string{in, b.init(prefix+"conv.w", dims, w), b.init(prefix+"conv.b", []int64{int64(n.f)}, bias)},
		attrInts("kernel_shape", 3, 3), attrInts("pads", 1, 1, 1, 1))
	if !folded {
		f := []int64{int64(n.f)}
		h = b.node("BatchNormalization", prefix+"bn", []string{h,
			b.init(prefix+"bn.scale", f, n.gamma), b.init(prefix+"bn.B", f, n.beta),
			b.init(prefix+"bn.mean", f, n.mean), b.init(prefix+"bn.var", f, n.vari)},
			attrFloat("epsilon", n.eps))
	}
	h = b.node("Relu", prefix+"relu", []string{h})
	h = b.node("Flatten", prefix+"flat", []string{h}, attrInt("axis", 1))
	return b.node("Gemm", out, []string{h,
		b.init(prefix+"fc.w", []int64{int64(n.fc.out), int64(n.fc.in)}, n.fc.w),
		b.init(prefix+"fc.b", []int64{int64(n.fc.out)}, n.fc.b)}, attrInt("transB", 1))
}

func (n *convNet) graph(t *testing.T, folded bool) *irBuilder {
	b := newIR(t, "conv", onnxlite.Double, "x", []int64{int64(n.c), int64(n.s), int64(n.s)}, "y", []int64{int64(n.out)})
	n.build(b, "", "x", "y", folded)
	return b
}

func TestImplementationInvarianceBatchNormFold(t *testing.T) {
	net := newConvNet(31, 2, 4, 6, 3)
	x := uniformRows(8, 1, 2*6*6, -1, 1)[0]
	ref := uniformRows(9, 8, len(x), -1, 1)
	withBN := net.graph(t, false).head(nn.Float64)
	folded := net.graph(t, true).head(nn.Float64)
	ctx := context.Background()

	// The closed form of the fold: both graphs give the same outputs.
	o1, err := withBN.Forward(ctx, x, 1)
	require.NoError(t, err)
	o2, err := folded.Forward(ctx, x, 1)
	require.NoError(t, err)
	assert.InDeltaSlice(t, o1, o2, 1e-12, "Conv → BN vs folded Conv")

	// The gradient of the folded graph against central finite differences
	// of the unfolded one (common practice; the path has no ReLU kink
	// within h of x for these weights, so the O(h²) error applies).
	target := gradattr.Top(o1)
	_, g, err := folded.Gradient(ctx, x, 1, []int{target})
	require.NoError(t, err)
	const step = 1e-6
	for i := range x {
		xp := append([]float64(nil), x...)
		xm := append([]float64(nil), x...)
		xp[i] += step
		xm[i] -= step
		fp, err := withBN.Forward(ctx, xp, 1)
		require.NoError(t, err)
		fm, err := withBN.Forward(ctx, xm, 1)
		require.NoError(t, err)
		assert.InDelta(t, (fp[target]-fm[target])/(2*step), g[i], 1e-8, "∂y_%d/∂x_%d", target, i)
	}

	for target := 0; target < net.out; target++ {
		a := methodRuns(t, withBN, x, target, ref)
		b := methodRuns(t, folded, x, target, ref)
		assertSameAttributions(t, a, b, fmt.Sprintf("target %d: Conv → BatchNormalization vs BN folded into Conv", target))
	}

	// Completeness (Sundararajan et al. 2017, Prop. 1) on both graphs.
	for name, h := range map[string]*nn.Head{"with BN": withBN, "folded": folded} {
		for _, rule := range everyRule {
			r := igAuto(t, h, x, rule, igTolerance)
			assert.True(t, r.Completeness.OK, "%s %v: relative gap %.3g after %d points", name, rule, r.Completeness.RelativeGap, r.Settings.Points)
		}
	}
}

func TestIGLinearityONNX(t *testing.T) {
	// Linearity (Sundararajan et al. 2017, one of the properties that
	// single out path methods, from memory): the attributions of
	// a·f₁ + b·f₂ are a·IG(f₁) + b·IG(f₂). The quadrature is linear in the gradients too, so at a fixed point
	// count the identity holds to rounding for every rule.
	const ca, cb = 0.75, -1.25
	ctx := context.Background()

	t.Run("dense", func(t *testing.T) {
		d1, d2 := newDense(41, 4, 2), newDense(43, 4, 2)
		x := []float64{0.9, -0.6, 1.3, 0.2}
		f1 := sigmoidGemm(t, d1).head(nn.Float64)
		b2 := newIR(t, "tanh-gemm", onnxlite.Double, "x", []int64{4}, "y", []int64{2})
		z := b2.node("Gemm", "z", []string{"x", b2.init("W", []int64{2, 4}, d2.w), b2.init("b", []int64{2}, d2.b)}, attrInt("transB", 1))
		b2.node("Tanh", "y", []string{z})
		f2 := b2.head(nn.Float64)

		bc := newIR(t, "combined", onnxlite.Double, "x", []int64{4}, "y", []int64{2})
		z1 := bc.node("Gemm", "z1", []string{"x", bc.init("W1", []int64{2, 4}, d1.w), bc.init("b1", []int64{2}, d1.b)}, attrInt("transB", 1))
		z2 := bc.node("Gemm", "z2", []string{"x", bc.init("W2", []int64{2, 4}, d2.w), bc.init("b2", []int64{2}, d2.b)}, attrInt("transB", 1))
		s1 := bc.node("Mul", "s1", []string{bc.node("Sigmoid", "y1", []string{z1}), bc.init("a", []int64{1}, []float64{ca})})
		s2 := bc.node("Mul", "s2", []string{bc.node("Tanh", "y2", []string{z2}), bc.init("c", []int64{1}, []float64{cb})})
		bc.node("Add", "y", []string{s1, s2})
		checkLinearity(t, ctx, bc.head(nn.Float64), f1, f2, ca, cb, x)
	})

	t.Run("conv", func(t *testing.T) {
		n1, n2 := newConvNet(51, 1, 3, 5, 2), newConvNet(61, 1, 3, 5, 2)
		x := uniformRows(10, 1, 25, 0, 1)[0]
		f1 := n1.graph(t, false).head(nn.Float64)
		f2 := n2.graph(t, true).head(nn.Float64)
		bc := newIR(t, "combined-conv", onnxlite.Double, "x", []int64{1, 5, 5}, "y", []int64{2})
		y1 := n1.build(bc, "a.", "x", "y1", false)
		y2 := n2.build(bc, "b.", "x", "y2", true)
		s1 := bc.node("Mul", "s1", []string{y1, bc.init("a", []int64{1}, []float64{ca})})
		s2 := bc.node("Mul", "s2", []string{y2, bc.init("c", []int64{1}, []float64{cb})})
		bc.node("Add", "y", []string{s1, s2})
		checkLinearity(t, ctx, bc.head(nn.Float64), f1, f2, ca, cb, x)
	})
}

func checkLinearity(t *testing.T, ctx context.Context, combined, f1, f2 *nn.Head, ca, cb float64, x []float64) {
	t.Helper()
	for target := 0; target < combined.OutputSize(); target++ {
		for _, rule := range everyRule {
			opt := gradattr.IGOptions{Rule: rule, Points: 40}
			rc, err := gradattr.IntegratedGradients(ctx, combined, x, target, opt)
			require.NoError(t, err)
			r1, err := gradattr.IntegratedGradients(ctx, f1, x, target, opt)
			require.NoError(t, err)
			r2, err := gradattr.IntegratedGradients(ctx, f2, x, target, opt)
			require.NoError(t, err)
			want := make([]float64, len(x))
			for i := range want {
				want[i] = ca*r1.Attributions[i] + cb*r2.Attributions[i]
			}
			assert.InDeltaSlice(t, want, rc.Attributions, invTol, "target %d, %v: IG(a·f₁ + b·f₂) vs a·IG(f₁) + b·IG(f₂)", target, rule)
			assert.InDelta(t, ca*r1.Output+cb*r2.Output, rc.Output, invTol, "output")
		}
	}
	// Completeness of the combination (Sundararajan et al. 2017, Prop. 1)
	// with the automatic point count.
	for _, rule := range everyRule {
		r := igAuto(t, combined, x, rule, igTolerance)
		assert.True(t, r.Completeness.OK, "%v: relative gap %.3g after %d points", rule, r.Completeness.RelativeGap, r.Settings.Points)
	}
}
