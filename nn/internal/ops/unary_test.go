package ops

import (
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// elemInput makes a graph input of the given type and shape holding data.
// The returned slice backs the node's value, so writing it changes the input
// of the next run.
func elemInput(g *G.ExprGraph, dt tensor.Dtype, shape []int, data []float64, name string) (*G.Node, any) {
	if len(shape) == 0 {
		if dt == tensor.Float32 {
			return G.NewScalar(g, dt, G.WithName(name), G.WithValue(G.NewF32(float32(data[0])))), nil
		}
		return G.NewScalar(g, dt, G.WithName(name), G.WithValue(G.NewF64(data[0]))), nil
	}
	var back any
	if dt == tensor.Float32 {
		b := make([]float32, len(data))
		for i, v := range data {
			b[i] = float32(v)
		}
		back = b
	} else {
		back = append([]float64(nil), data...)
	}
	t := tensor.New(tensor.WithShape(append([]int(nil), shape...)...), tensor.WithBacking(back))
	return G.NewTensor(g, dt, len(shape), G.WithShape(shape...), G.WithName(name), G.WithValue(t)), back
}

// elemValues copies a node value out as float64s.
func elemValues(t testing.TB, v G.Value) []float64 {
	t.Helper()
	switch x := v.(type) {
	case *G.F64:
		return []float64{float64(*x)}
	case *G.F32:
		return []float64{float64(*x)}
	case *tensor.Dense:
		switch d := x.Data().(type) {
		case []float64:
			return append([]float64(nil), d...)
		case []float32:
			out := make([]float64, len(d))
			for i, f := range d {
				out[i] = float64(f)
			}
			return out
		case float64:
			return []float64{d}
		case float32:
			return []float64{float64(d)}
		}
	}
	t.Fatalf("unexpected value %T", v)
	return nil
}

// elemCase is one op under test: input shapes, how to draw each input
// value, how to build the op, and the kink points of each input, near
// which finite differences are not compared.
type elemCase struct {
	name   string
	shapes [][]int
	draw   func(r *rand.Rand, input int) float64
	build  func(xs []*G.Node) (*G.Node, error)
	kinks  func(input int) []float64
	// fixed lists the inputs that have no gradient (indices, conditions).
	fixed []int
}

// diff returns the inputs of c that have a gradient.
func (c elemCase) diff() []int {
	var out []int
	for k := range c.shapes {
		if !slices.Contains(c.fixed, k) {
			out = append(out, k)
		}
	}
	return out
}

// elemUniform draws from [lo, hi).
func elemUniform(lo, hi float64) func(r *rand.Rand, _ int) float64 {
	return func(r *rand.Rand, _ int) float64 { return lo + (hi-lo)*r.Float64() }
}

// elemDraw fills the inputs of c with a fixed seed.
func elemDraw(c elemCase) [][]float64 {
	r := rand.New(rand.NewPCG(7, uint64(len(c.name))))
	out := make([][]float64, len(c.shapes))
	for k, s := range c.shapes {
		out[k] = make([]float64, shapeSize(s))
		for i := range out[k] {
			out[k][i] = c.draw(r, k)
		}
	}
	return out
}

// elemProgram builds c on fresh inputs of type dt and a scalar loss
// L = Σ_i w_i·y_i with fixed pseudo-random weights w, and compiles a tape
// machine that computes y, L and dL/dx for every input.
type elemProgram struct {
	vm    G.VM
	xs    []*G.Node
	back  []any
	y, l  *G.Node
	grads G.Nodes
}

func elemBuild(t testing.TB, c elemCase, dt tensor.Dtype, data [][]float64, withGrad bool) *elemProgram {
	t.Helper()
	g := G.NewGraph()
	p := &elemProgram{}
	for k, s := range c.shapes {
		x, b := elemInput(g, dt, s, data[k], fmt.Sprintf("x%d", k))
		p.xs = append(p.xs, x)
		p.back = append(p.back, b)
	}
	y, err := c.build(p.xs)
	require.NoError(t, err, c.name)
	p.y = y
	if withGrad {
		r := rand.New(rand.NewPCG(11, 13))
		ws := make([]float64, shapeSize(y.Shape()))
		for i := range ws {
			ws[i] = 0.5 + r.Float64()
		}
		w, _ := elemInput(g, dt, y.Shape(), ws, "w")
		if len(y.Shape()) == 0 {
			p.l, err = G.Mul(y, w)
		} else {
			var yw *G.Node
			yw, err = G.HadamardProd(y, w)
			require.NoError(t, err)
			p.l, err = G.Sum(yw)
		}
		require.NoError(t, err)
		var wrt G.Nodes
		for _, k := range c.diff() {
			wrt = append(wrt, p.xs[k])
		}
		p.grads, err = G.Grad(p.l, wrt...)
		require.NoError(t, err, c.name)
	}
	p.vm = G.NewTapeMachine(g)
	t.Cleanup(func() { p.vm.Close() })
	return p
}

func (p *elemProgram) run(t testing.TB) {
	t.Helper()
	p.vm.Reset()
	require.NoError(t, p.vm.RunAll())
}

// set writes x_k[i] = v into the backing array of input k, or rebinds a
// scalar input.
func (p *elemProgram) set(t testing.TB, k, i int, v float64) {
	switch b := p.back[k].(type) {
	case []float64:
		b[i] = v
	case []float32:
		b[i] = float32(v)
	default:
		if p.xs[k].Dtype() == tensor.Float32 {
			require.NoError(t, G.Let(p.xs[k], G.NewF32(float32(v))))
		} else {
			require.NoError(t, G.Let(p.xs[k], G.NewF64(v)))
		}
	}
}

// elemCheckGrad compares the symbolic gradient of c with central finite
// differences, (L(x+h·e_i) - L(x-h·e_i)) / 2h, in float64.
func elemCheckGrad(t *testing.T, c elemCase) {
	t.Helper()
	data := elemDraw(c)
	p := elemBuild(t, c, tensor.Float64, data, true)
	p.run(t)
	var analytic [][]float64
	for _, gn := range p.grads {
		analytic = append(analytic, elemValues(t, gn.Value()))
	}
	loss := func() float64 {
		p.run(t)
		return elemValues(t, p.l.Value())[0]
	}
	const h = 1e-5
	compared := 0
	for gi, k := range c.diff() {
		var kinks []float64
		if c.kinks != nil {
			kinks = c.kinks(k)
		}
	coords:
		for i, x0 := range data[k] {
			for _, kp := range kinks {
				if math.Abs(x0-kp) < 1e-3 {
					continue coords
				}
			}
			p.set(t, k, i, x0+h)
			up := loss()
			p.set(t, k, i, x0-h)
			down := loss()
			p.set(t, k, i, x0)
			fd := (up - down) / (2 * h)
			// central finite differences, O(h²) truncation
			assert.InDelta(t, fd, analytic[gi][i], 1e-6*math.Max(math.Abs(fd), 1e-2),
				"%s: dL/dx%d[%d] at x=%v", c.name, k, i, x0)
			compared++
		}
	}
	require.Positive(t, compared, "%s: no coordinate away from the kinks", c.name)
}

// elemCheckPrecision runs c in float32 and in float64 on the same
// (float32-rounded) inputs and checks outputs and gradients agree to 1e-5
// relative (common practice for single-precision kernels).
func elemCheckPrecision(t *testing.T, c elemCase) {
	t.Helper()
	data := elemDraw(c)
	for _, d := range data {
		for i := range d {
			d[i] = float64(float32(d[i]))
		}
	}
	p32 := elemBuild(t, c, tensor.Float32, data, true)
	p64 := elemBuild(t, c, tensor.Float64, data, true)
	p32.run(t)
	p64.run(t)
	cmp := func(what string, a, b []float64) {
		require.Len(t, a, len(b))
		scale := 0.0
		for _, v := range b {
			scale = math.Max(scale, math.Abs(v))
		}
		for i := range b {
			assert.InDelta(t, b[i], a[i], 1e-5*math.Abs(b[i])+1e-6*scale, "%s: %s[%d]", c.name, what, i)
		}
	}
	cmp("y", elemValues(t, p32.y.Value()), elemValues(t, p64.y.Value()))
	for k := range p64.grads {
		cmp(fmt.Sprintf("dL/dx%d", k), elemValues(t, p32.grads[k].Value()), elemValues(t, p64.grads[k].Value()))
	}
}

// elemUnaryCases covers every op of unary and clip, with inputs drawn where
// the op is defined and its kinks named.
func elemUnaryCases() []elemCase {
	shape := [][]int{{2, 3, 4}}
	wide := elemUniform(-4, 4)
	pos := elemUniform(0.2, 4)
	mk := func(op string, a, b float64, draw func(*rand.Rand, int) float64, kinks ...float64) elemCase {
		return elemCase{
			name: fmt.Sprintf("%s(%g,%g)", op, a, b), shapes: shape, draw: draw,
			build: func(xs []*G.Node) (*G.Node, error) {
				if op == "Clip" {
					return Clip(xs[0], a, b)
				}
				return Unary(xs[0], op, a, b)
			},
			kinks: func(int) []float64 { return kinks },
		}
	}
	return []elemCase{
		mk("Relu", 0, 0, wide, 0),
		mk("LeakyRelu", 0.01, 0, wide, 0),
		mk("LeakyRelu", 0.3, 0, wide, 0),
		mk("Elu", 1, 0, wide, 0),
		mk("Elu", 2.5, 0, wide, 0),
		mk("Selu", seluAlpha, seluGamma, wide, 0),
		mk("Celu", 1, 0, wide, 0),
		mk("Celu", 0.7, 0, wide, 0),
		mk("Sigmoid", 0, 0, wide),
		mk("HardSigmoid", 0.2, 0.5, wide, -2.5, 2.5),
		mk("HardSwish", 0, 0, wide, -3, 3),
		mk("Tanh", 0, 0, wide),
		mk("Softplus", 0, 0, wide),
		mk("Softsign", 0, 0, wide, 0),
		mk("Erf", 0, 0, wide),
		mk("Abs", 0, 0, wide, 0),
		mk("Sqrt", 0, 0, pos),
		mk("Exp", 0, 0, wide),
		mk("Log", 0, 0, pos),
		mk("Neg", 0, 0, wide),
		mk("Pow", 3, 0, wide),
		mk("Pow", 2, 0, wide),
		mk("Pow", 0.5, 0, pos),
		mk("Pow", -1.5, 0, pos),
		mk("Identity", 0, 0, wide),
		mk("Clip", -0.5, 0.7, wide, -0.5, 0.7),
		mk("Clip", math.Inf(-1), 0.3, wide, 0.3),
		mk("Clip", -1, math.Inf(1), wide, -1),
		mk("Gelu", 0, 0, wide),
		mk("GeluTanh", 0, 0, wide),
		mk("Mish", 0, 0, elemUniform(-5, 5)),
		mk("ThresholdedRelu", 0.6, 0, wide, 0.6),
		mk("Reciprocal", 0, 0, pos),
		mk("Reciprocal", 0, 0, elemUniform(-4, -0.2)),
		// Piecewise constant: 0 away from the jumps.
		mk("Sign", 0, 0, wide, 0),
		mk("Floor", 0, 0, wide, -4, -3, -2, -1, 0, 1, 2, 3, 4),
		mk("Ceil", 0, 0, wide, -4, -3, -2, -1, 0, 1, 2, 3, 4),
		mk("Round", 0, 0, wide, -3.5, -2.5, -1.5, -0.5, 0.5, 1.5, 2.5, 3.5),
		mk("CastInt", 0, 0, wide, -4, -3, -2, -1, 0, 1, 2, 3, 4),
	}
}

func TestUnaryGradientMatchesFiniteDifferences(t *testing.T) {
	for _, c := range elemUnaryCases() {
		t.Run(c.name, func(t *testing.T) { elemCheckGrad(t, c) })
	}
}

func TestUnaryFloat32MatchesFloat64(t *testing.T) {
	for _, c := range elemUnaryCases() {
		t.Run(c.name, func(t *testing.T) { elemCheckPrecision(t, c) })
	}
}

// TestUnaryClosedForms checks values that follow from the definitions.
func TestUnaryClosedForms(t *testing.T) {
	g := G.NewGraph()
	x, _ := elemInput(g, tensor.Float64, []int{5}, []float64{-800, -1, 0, 1, 800}, "x")
	sp, err := Unary(x, "Softplus", 0, 0)
	require.NoError(t, err)
	sg, err := Unary(x, "Sigmoid", 0, 0)
	require.NoError(t, err)
	sel, err := Unary(x, "Selu", seluAlpha, seluGamma)
	require.NoError(t, err)
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	require.NoError(t, vm.RunAll())
	// log(1+e^x): e^-800 underflows to 0 in IEEE 754 binary64, so softplus(-800)
	// is the subnormal-free 0 and softplus(800) = 800 exactly; softplus(0) = ln 2.
	assert.Equal(t, []float64{0, math.Log1p(math.Exp(-1)), math.Ln2, 1 + math.Log1p(math.Exp(-1)), 800}, elemValues(t, sp.Value()))
	// sigmoid saturates to exactly 0 and 1 in binary64 without NaN; sigmoid(0) = 1/2;
	// sigmoid(±1) = 1/(1+e^∓1) to within an ulp.
	sv := elemValues(t, sg.Value())
	assert.Equal(t, []float64{0, 0.5, 1}, []float64{sv[0], sv[2], sv[4]})
	assert.InDelta(t, 1/(1+math.E), sv[1], 1e-16)
	assert.InDelta(t, 1/(1+1/math.E), sv[3], 1e-16)
	// Selu(-∞) → -gamma·alpha ≈ -1.7581 (Klambauer et al. 2017, eq. 2 with the eq. 14 constants).
	assert.InDelta(t, -seluAlpha*seluGamma, elemValues(t, sel.Value())[0], 1e-15)
}

func TestUnaryRejectsBadInput(t *testing.T) {
	g := G.NewGraph()
	x, _ := elemInput(g, tensor.Float64, []int{3}, []float64{1, 2, 3}, "x")
	_, err := Unary(x, "Swish", 0, 0)
	assert.ErrorIs(t, err, errUnknownOp)
	assert.ErrorContains(t, err, `"Swish"`)
	_, err = Unary(x, "Clip", 0, 1)
	assert.ErrorIs(t, err, errUnknownOp)
	_, err = Unary(x, "LeakyRelu", math.NaN(), 0)
	assert.ErrorContains(t, err, "NaN")
	_, err = Clip(x, math.NaN(), 1)
	assert.ErrorContains(t, err, "NaN")
	_, err = Unary(x, "Celu", 0, 0)
	assert.ErrorContains(t, err, "alpha")
	_, err = Unary(nil, "Relu", 0, 0)
	assert.Error(t, err)

	xi := G.NewTensor(g, tensor.Int64, 1, G.WithShape(3), G.WithName("xi"))
	_, err = Unary(xi, "Relu", 0, 0)
	assert.ErrorIs(t, err, errDtype)

	// A value of the wrong size reaching the kernel is an error, not a panic.
	y, err := Unary(x, "Tanh", 0, 0)
	require.NoError(t, err)
	_, err = y.Op().Do(tensor.New(tensor.WithShape(2), tensor.WithBacking([]float64{1, 2})))
	assert.ErrorContains(t, err, "has 2 elements, want 3")
	_, err = y.Op().Do(tensor.New(tensor.WithShape(3), tensor.WithBacking([]float32{1, 2, 3})))
	assert.ErrorContains(t, err, "want float64")
}

// TestUnaryWritesInPlace checks that a unary op writes over an intermediate
// value nothing reads later, and never over a graph input.
func TestUnaryWritesInPlace(t *testing.T) {
	g := G.NewGraph()
	in := []float64{-1, 0.5, 2}
	x, back := elemInput(g, tensor.Float64, []int{3}, in, "x")
	n, err := Unary(x, "Neg", 0, 0)
	require.NoError(t, err)
	y, err := Unary(n, "Relu", 0, 0)
	require.NoError(t, err)
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	require.NoError(t, vm.RunAll())
	assert.Same(t, n.Value().(*tensor.Dense), y.Value().(*tensor.Dense))
	// max(0, -x) (ONNX Neg-13, Relu-14)
	assert.Equal(t, []float64{1, 0, 0}, elemValues(t, y.Value()))
	assert.Equal(t, []float64{-1, 0.5, 2}, back)
}

// TestChainGradientMatchesFiniteDifferences composes the kernels so that
// the compiler lets them write over each other's outputs, forward and
// backward, and checks the gradient of the whole chain.
func TestChainGradientMatchesFiniteDifferences(t *testing.T) {
	elemCheckGrad(t, elemCase{
		name: "chain", shapes: [][]int{{2, 3, 4}, {3, 1}}, draw: elemUniform(-2, 2),
		build: func(xs []*G.Node) (*G.Node, error) {
			n, err := Unary(xs[0], "Neg", 0, 0)
			if err != nil {
				return nil, err
			}
			if n, err = Unary(n, "Softplus", 0, 0); err != nil {
				return nil, err
			}
			if n, err = Binary(n, xs[1], "Mul"); err != nil {
				return nil, err
			}
			if n, err = Unary(n, "Tanh", 0, 0); err != nil {
				return nil, err
			}
			if n, err = Softmax(n, 1, true); err != nil {
				return nil, err
			}
			return Reduce(n, []int{2}, false, true)
		},
	})
}

// TestInPlaceChainIsRepeatable runs a chain whose ops may write over each
// other's outputs several times and checks that every run gives the closed
// form and leaves the bound inputs alone.
func TestInPlaceChainIsRepeatable(t *testing.T) {
	g := G.NewGraph()
	xv := []float64{-1, 0.5, 2, 0}
	x, xBack := elemInput(g, tensor.Float64, []int{1, 4}, xv, "x")
	b, bBack := elemInput(g, tensor.Float64, []int{1}, []float64{0.5}, "b")
	n, err := Unary(x, "Neg", 0, 0)
	require.NoError(t, err)
	y, err := Binary(n, b, "Add")
	require.NoError(t, err)
	s, err := Softmax(y, 1, false)
	require.NoError(t, err)
	r, err := Reduce(s, nil, false, false)
	require.NoError(t, err)
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	var den float64
	for _, v := range xv {
		den += math.Exp(0.5 - v)
	}
	for run := 0; run < 3; run++ {
		vm.Reset()
		require.NoError(t, vm.RunAll())
		got := elemValues(t, s.Value())
		for i, v := range xv {
			// closed form: Softmax(0.5 - x)_i = e^(0.5-x_i) / Σ_j e^(0.5-x_j)
			assert.InDelta(t, math.Exp(0.5-v)/den, got[i], 1e-15, "run %d [%d]", run, i)
		}
		// Σ_i softmax_i = 1
		assert.InDelta(t, 1, elemValues(t, r.Value())[0], 1e-15)
		assert.Equal(t, xv, xBack)
		assert.Equal(t, []float64{0.5}, bBack)
	}
}

// BenchmarkUnaryRelu measures Relu on 64 Ki float32 values: the kernel
// alone writing into a reused output, and a whole tape-machine run.
func BenchmarkUnaryRelu(b *testing.B) {
	g := G.NewGraph()
	data := make([]float64, 64*1024)
	for i := range data {
		data[i] = float64(i%17) - 8
	}
	x, _ := elemInput(g, tensor.Float32, []int{64, 1024}, data, "x")
	y, err := Unary(x, "Relu", 0, 0)
	if err != nil {
		b.Fatal(err)
	}
	elemBenchNode(b, g, y, x.Value())
}

// elemBenchNode benchmarks the op of y on inputs, then the machine of g.
func elemBenchNode(b *testing.B, g *G.ExprGraph, y *G.Node, inputs ...G.Value) {
	b.Run("kernel", func(b *testing.B) {
		pd := y.Op().(G.UsePreallocDoer)
		out, err := y.Op().Do(inputs...)
		if err != nil {
			b.Fatal(err)
		}
		b.ReportAllocs()
		b.ResetTimer()
		for i := 0; i < b.N; i++ {
			if _, err := pd.UsePreallocDo(out, inputs...); err != nil {
				b.Fatal(err)
			}
		}
	})
	b.Run("machine", func(b *testing.B) {
		vm := G.NewTapeMachine(g)
		defer vm.Close()
		b.ReportAllocs()
		b.ResetTimer()
		for i := 0; i < b.N; i++ {
			vm.Reset()
			if err := vm.RunAll(); err != nil {
				b.Fatal(err)
			}
		}
	})
}
