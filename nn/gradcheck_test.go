package nn

import (
	"context"
	"errors"
	"math"
	"math/rand"
	"testing"

	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/onnxlite"
)

// Every check in this file compares analytic gradients (one backward pass)
// with central finite differences, ∂f/∂x_j ≈ (f(x + h·e_j) − f(x − h·e_j))/2h,
// with h = 1e-5·max(1, |x_j|), to 1e-6 relative to the largest derivative of
// the same function. A coordinate is skipped when the central differences at
// h and h/2 disagree by more than 1e-7 of that scale: a kink (ReLU, max, |·|,
// clip) lies within h of it and the difference quotient is not a derivative
// there (common practice).

const (
	fdRel      = 1e-5
	fdTol      = 1e-6
	fdKinkTol  = 1e-7
	fdMaxSkips = 0.1 // at most this share of coordinates may be skipped
)

// fdCheck compares grad with central differences of the scalar function
// whose values at many points evalAt returns. skip marks coordinates that
// the caller knows lie within 1e-3 of a kink.
func fdCheck(t *testing.T, name string, x, grad []float64, evalAt func(points [][]float64) ([]float64, error), skip func(j int) bool) {
	t.Helper()
	require.Len(t, grad, len(x), "%s: gradient length", name)
	points := make([][]float64, 0, 4*len(x))
	steps := make([]float64, len(x))
	for j := range x {
		h := fdRel * math.Max(1, math.Abs(x[j]))
		steps[j] = h
		for _, d := range []float64{h, -h, h / 2, -h / 2} {
			p := append([]float64(nil), x...)
			p[j] += d
			points = append(points, p)
		}
	}
	f, err := evalAt(points)
	require.NoError(t, err, name)
	fd := make([]float64, len(x))
	fd2 := make([]float64, len(x))
	scale := 0.0
	for j := range x {
		h := steps[j]
		fd[j] = (f[4*j] - f[4*j+1]) / (2 * h)
		fd2[j] = (f[4*j+2] - f[4*j+3]) / h
		scale = math.Max(scale, math.Max(math.Abs(fd[j]), math.Abs(grad[j])))
	}
	if scale == 0 {
		scale = 1
	}
	skipped := 0
	for j := range x {
		if (skip != nil && skip(j)) || math.Abs(fd[j]-fd2[j]) > fdKinkTol*scale {
			skipped++
			continue
		}
		// central finite differences
		if math.Abs(grad[j]-fd[j]) > fdTol*scale {
			t.Errorf("%s: ∂/∂x[%d]: backward %.12g, central difference %.12g (scale %.3g)", name, j, grad[j], fd[j], scale)
			return
		}
	}
	require.LessOrEqual(t, float64(skipped), fdMaxSkips*float64(len(x))+1, "%s: %d of %d coordinates near kinks", name, skipped, len(x))
}

// gradcheckHead checks h.Gradient on the n samples in x for every output
// element, against central differences of each sample's output.
func gradcheckHead(t *testing.T, name string, h *Head, x []float64, n int, skip func(j int) bool) {
	t.Helper()
	ctx := context.Background()
	in, outN := prod(h.InputShape()), h.OutputSize()
	grads := make([][]float64, outN)
	for k := 0; k < outN; k++ {
		target := make([]int, n)
		for i := range target {
			target[i] = k
		}
		out, g, err := h.Gradient(ctx, x, n, target)
		require.NoError(t, err, name)
		require.Len(t, out, n*outN)
		grads[k] = g
	}
	for i := 0; i < n; i++ {
		xi := x[i*in : (i+1)*in]
		// One batched forward pass evaluates every perturbed copy of sample i.
		var cache [][]float64
		for k := 0; k < outN; k++ {
			k := k
			eval := func(points [][]float64) ([]float64, error) {
				if cache == nil {
					flat := make([]float64, 0, len(points)*in)
					for _, p := range points {
						flat = append(flat, p...)
					}
					o, err := h.Forward(ctx, flat, len(points))
					if err != nil {
						return nil, err
					}
					cache = make([][]float64, len(points))
					for p := range points {
						cache[p] = o[p*outN : (p+1)*outN]
					}
				}
				v := make([]float64, len(points))
				for p := range points {
					v[p] = cache[p][k]
				}
				return v, nil
			}
			var sk func(int) bool
			if skip != nil {
				sk = func(j int) bool { return skip(i*in + j) }
			}
			fdCheck(t, name, xi, grads[k][i*in:(i+1)*in], eval, sk)
		}
	}
}

type opCase struct {
	name  string
	build func(g *irGraph) // input "x" is declared by the caller
	shape []int64          // per-sample input shape
	lo    float64          // inputs uniform in [lo, hi)
	hi    float64
	kinks []float64 // input values where the function has a kink
	opset int64
}

func TestGradcheckOperators(t *testing.T) {
	unary := func(op string, attrs ...*onnxlite.Attribute) func(g *irGraph) {
		return func(g *irGraph) { g.node(op, []string{"x"}, "y", attrs...) }
	}
	cases := []opCase{
		{name: "Relu", build: unary("Relu"), shape: []int64{7}, lo: -2, hi: 2, kinks: []float64{0}},
		{name: "LeakyRelu", build: unary("LeakyRelu", aFloat("alpha", 0.1)), shape: []int64{7}, lo: -2, hi: 2, kinks: []float64{0}},
		{name: "Elu", build: unary("Elu", aFloat("alpha", 0.7)), shape: []int64{7}, lo: -2, hi: 2, kinks: []float64{0}},
		{name: "Selu", build: unary("Selu"), shape: []int64{7}, lo: -2, hi: 2, kinks: []float64{0}},
		{name: "Celu", build: unary("Celu", aFloat("alpha", 1.5)), shape: []int64{7}, lo: -2, hi: 2},
		{name: "Sigmoid", build: unary("Sigmoid"), shape: []int64{7}, lo: -3, hi: 3},
		{name: "HardSigmoid", build: unary("HardSigmoid"), shape: []int64{7}, lo: -4, hi: 4, kinks: []float64{-2.5, 2.5}},
		{name: "HardSwish", build: unary("HardSwish"), shape: []int64{7}, lo: -4, hi: 4, kinks: []float64{-3, 3}},
		{name: "Tanh", build: unary("Tanh"), shape: []int64{7}, lo: -2, hi: 2},
		{name: "Softplus", build: unary("Softplus"), shape: []int64{7}, lo: -3, hi: 3},
		{name: "Softsign", build: unary("Softsign"), shape: []int64{7}, lo: -3, hi: 3, kinks: []float64{0}},
		{name: "Erf", build: unary("Erf"), shape: []int64{7}, lo: -2, hi: 2},
		{name: "Abs", build: unary("Abs"), shape: []int64{7}, lo: -2, hi: 2, kinks: []float64{0}},
		{name: "Sqrt", build: unary("Sqrt"), shape: []int64{7}, lo: 0.5, hi: 3},
		{name: "Exp", build: unary("Exp"), shape: []int64{7}, lo: -2, hi: 2},
		{name: "Log", build: unary("Log"), shape: []int64{7}, lo: 0.5, hi: 3},
		{name: "Neg", build: unary("Neg"), shape: []int64{7}, lo: -2, hi: 2},
		{name: "Pow", build: func(g *irGraph) {
			g.node("Pow", []string{"x", g.floats("e", nil, []float32{3})}, "y")
		}, shape: []int64{7}, lo: -2, hi: 2},
		{name: "Pow tensor exponent", build: func(g *irGraph) {
			g.node("Pow", []string{"x", g.floats("e", []int64{3}, []float32{2, 3, 1.5})}, "y")
		}, shape: []int64{2, 3}, lo: 0.5, hi: 2},
		{name: "Clip", build: func(g *irGraph) {
			g.node("Clip", []string{"x", g.floats("lo", nil, []float32{-0.5}), g.floats("hi", nil, []float32{0.8})}, "y")
		}, shape: []int64{7}, lo: -2, hi: 2, kinks: []float64{-0.5, 0.8}},
		{name: "Add/Sub/Mul/Div broadcast", build: func(g *irGraph) {
			a := g.node("Mul", []string{"x", g.random("m", 2, 3, 1)}, "a")
			a = g.node("Add", []string{a, g.random("c", 1, 4)}, "b")
			a = g.node("Sub", []string{g.random("s", 1, 1, 4), a}, "d")
			den := g.floats("den", []int64{4}, []float32{1.5, -2, 0.75, 3})
			g.node("Div", []string{a, den}, "y")
		}, shape: []int64{3, 4}, lo: -2, hi: 2},
		{name: "Div by input", build: func(g *irGraph) {
			g.node("Div", []string{g.random("n", 1, 5), "x"}, "y")
		}, shape: []int64{5}, lo: 0.5, hi: 2},
		{name: "PRelu", build: func(g *irGraph) {
			g.node("PRelu", []string{"x", g.random("slope", 0.5, 3, 1, 1)}, "y")
		}, shape: []int64{3, 2, 2}, lo: -2, hi: 2, kinks: []float64{0}},
		{name: "Gemm transA alpha beta", build: func(g *irGraph) {
			f := g.node("Flatten", []string{"x"}, "f")
			tr := g.node("Transpose", []string{f}, "ft")
			g.node("Gemm", []string{tr, g.random("w", 1, 6, 3), g.random("c", 1, 1, 3)}, "y",
				aInt("transA", 1), aFloat("alpha", 0.7), aFloat("beta", -1.3))
		}, shape: []int64{2, 3}, lo: -1, hi: 1},
		{name: "MatMul batched", build: func(g *irGraph) {
			a := g.node("MatMul", []string{"x", g.random("w", 1, 4, 3)}, "a")
			g.node("MatMul", []string{g.random("l", 1, 2, 2), a}, "y")
		}, shape: []int64{2, 4}, lo: -1, hi: 1},
		{name: "Softmax opset 13", build: unary("Softmax", aInt("axis", 1)), shape: []int64{3, 4}, lo: -2, hi: 2, opset: 13},
		{name: "Softmax opset 11 coerced to 2-D", build: unary("Softmax", aInt("axis", 1)), shape: []int64{3, 4}, lo: -2, hi: 2, opset: 11},
		{name: "LogSoftmax", build: unary("LogSoftmax", aInt("axis", -1)), shape: []int64{2, 5}, lo: -2, hi: 2, opset: 13},
		{name: "ReduceSum/ReduceMean", build: func(g *irGraph) {
			a := g.node("ReduceSum", []string{"x", g.ints("axes", 2)}, "a", aInt("keepdims", 0))
			b := g.node("Tanh", []string{a}, "b")
			g.node("ReduceMean", []string{b}, "y", aInts("axes", 1), aInt("keepdims", 1))
		}, shape: []int64{3, 2, 4}, lo: -1, hi: 1, opset: 13},
		{name: "Conv pads strides group", build: func(g *irGraph) {
			g.node("Conv", []string{"x", g.random("w", 0.5, 4, 1, 3, 2), g.random("b", 0.5, 4)}, "y",
				aInts("pads", 1, 0, 1, 1), aInts("strides", 2, 1), aInt("group", 2))
		}, shape: []int64{2, 5, 4}, lo: -1, hi: 1},
		{name: "Conv 1-D dilated", build: func(g *irGraph) {
			g.node("Conv", []string{"x", g.random("w", 0.5, 3, 2, 2), g.random("b", 0.5, 3)}, "y", aInts("dilations", 2), aString("auto_pad", "SAME_UPPER"))
		}, shape: []int64{2, 7}, lo: -1, hi: 1},
		{name: "MaxPool", build: unary("MaxPool", aInts("kernel_shape", 2, 2), aInts("strides", 1, 2), aInts("pads", 0, 0, 1, 1)), shape: []int64{2, 4, 4}},
		{name: "AveragePool", build: unary("AveragePool", aInts("kernel_shape", 3, 2), aInts("pads", 1, 0, 1, 1), aInt("count_include_pad", 0)), shape: []int64{2, 4, 3}, lo: -1, hi: 1},
		{name: "GlobalAveragePool/GlobalMaxPool", build: func(g *irGraph) {
			a := g.node("GlobalAveragePool", []string{"x"}, "a")
			b := g.node("GlobalMaxPool", []string{"x"}, "b")
			g.node("Concat", []string{a, b}, "y", aInt("axis", 1))
		}, shape: []int64{3, 3, 3}},
		{name: "Pad reflect + edge", build: func(g *irGraph) {
			a := g.node("Pad", []string{"x", g.ints("p1", 0, 0, 1, 2, 0, 0, 1, 0)}, "a", aString("mode", "reflect"))
			g.node("Pad", []string{a, g.ints("p2", 0, 0, 0, 1, 0, 0, 2, 0)}, "y", aString("mode", "edge"))
		}, shape: []int64{2, 3, 4}, lo: -1, hi: 1},
		{name: "BatchNormalization Transpose Concat Reshape", build: func(g *irGraph) {
			bn := g.node("BatchNormalization", []string{"x", g.random("s", 1, 3), g.random("bb", 1, 3), g.random("mu", 1, 3),
				g.floats("var", []int64{3}, []float32{0.5, 1, 2})}, "bn")
			tr := g.node("Transpose", []string{bn}, "t", aInts("perm", 0, 2, 3, 1))
			r := g.node("Reshape", []string{tr, g.ints("shape", 0, 3, -1)}, "r")
			rx := g.node("Reshape", []string{"x", g.ints("shape2", 0, 3, -1)}, "rx")
			c := g.node("Concat", []string{r, rx}, "c", aInt("axis", 2))
			u := g.node("Unsqueeze", []string{c, g.ints("ax", 1)}, "u")
			g.node("Squeeze", []string{u, g.ints("ax2", 1)}, "y")
		}, shape: []int64{3, 2, 2}, lo: -1, hi: 1, opset: 13},
	}
	checkOpCases(t, cases, 100)
}

// checkOpCases builds each case into a model of input "x" (batch of 3) and
// checks its head's gradient against central finite differences.
func checkOpCases(t *testing.T, cases []opCase, seed int) {
	for ci, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			opset := c.opset
			if opset == 0 {
				opset = 13
			}
			g := newIR(opset, int64(seed+ci))
			g.input("x", append([]int64{-1}, c.shape...)...)
			c.build(g)
			g.output("y")
			nw, err := Compile(g.m, Options{DType: Float64})
			require.NoError(t, err)
			h, err := nw.Head(Selection{})
			require.NoError(t, err)
			const n = 3
			rng := rand.New(rand.NewSource(int64(ci)))
			size := n * prod(h.InputShape())
			var x []float64
			if c.lo == c.hi {
				// Distinct values at least 1e-2 apart: no ties inside a max window.
				x = make([]float64, size)
				for i, p := range rng.Perm(size) {
					x[i] = float64(p)*1e-2 - float64(size)*5e-3
				}
			} else {
				x = make([]float64, size)
				for i := range x {
					x[i] = c.lo + (c.hi-c.lo)*rng.Float64()
				}
			}
			skip := func(j int) bool {
				for _, k := range c.kinks {
					if math.Abs(x[j]-k) < 1e-3 {
						return true
					}
				}
				return false
			}
			gradcheckHead(t, c.name, h, x, n, skip)
		})
	}
}

func TestGradcheckBenchModels(t *testing.T) {
	rng := rand.New(rand.NewSource(31))
	mlp, err := Compile(mlpModel(30, 64, 2, 32), Options{DType: Float64})
	require.NoError(t, err)
	h, err := mlp.Head(Selection{})
	require.NoError(t, err)
	gradcheckHead(t, "mlp 30-64-64-2", h, randomInput(rng, 2*30), 2, nil)

	cnn, err := Compile(cnnModel(33), Options{DType: Float64})
	require.NoError(t, err)
	h, err = cnn.Head(Selection{})
	require.NoError(t, err)
	x := randomInput(rng, 28*28)
	target := []int{3}
	_, grad, err := h.Gradient(context.Background(), x, 1, target)
	require.NoError(t, err)
	fdCheck(t, "cnn 1x28x28", x, grad, func(points [][]float64) ([]float64, error) {
		flat := make([]float64, 0, len(points)*len(x))
		for _, p := range points {
			flat = append(flat, p...)
		}
		o, err := h.Forward(context.Background(), flat, len(points))
		if err != nil {
			return nil, err
		}
		v := make([]float64, len(points))
		for i := range v {
			v[i] = o[i*10+target[0]]
		}
		return v, nil
	}, nil)
}

// TestGradcheckBackendModels checks the backward pass of whole exported
// models from the ONNX backend test data (Debian libonnx-testdata 1.12.0),
// at their data set's input, against central finite differences of
// L(x) = Σ_i out[i, t_i] with random targets t_i.
func TestGradcheckBackendModels(t *testing.T) {
	cases, _ := loadConformance(t)
	ctx := context.Background()
	checked := 0
	for _, c := range cases {
		if c.id[:5] == "node/" || len(c.sets[0][0]) != 1 || len(c.sets[0][1]) != 1 {
			continue
		}
		if _, expected := conformanceExpected[c.id]; expected {
			continue
		}
		in, out := c.sets[0][0][0], c.sets[0][1][0]
		if !isFloat(in.DType) {
			continue // token ids and other integers have no gradient
		}
		size := int(in.NumElements())
		if size > 1000 || size == 0 || len(in.Dims) == 0 || len(out.Dims) == 0 {
			continue
		}
		nw, err := Compile(c.model, Options{DType: Float64, Machines: 1})
		require.NoError(t, err, c.id)
		x, err := in.Float64s()
		require.NoError(t, err)
		shape := in.Shape()
		val := nw.outputs[0].Name
		p, err := nw.program([][]int{shape}, request{outputs: []string{val}, grad: true})
		if errors.Is(err, onnxlite.ErrFoldOnly) {
			continue // a fold-only operator on run-time values, as in TestConformance
		}
		require.NoError(t, err, c.id)
		os := out.Shape()
		rows, cols := os[0], prod(os[1:])
		mask := make([]float64, rows*cols)
		rng := rand.New(rand.NewSource(int64(checked)))
		for r := 0; r < rows; r++ {
			mask[r*cols+rng.Intn(cols)] = 1
		}
		_, grad, err := p.run(ctx, [][]float64{x}, mask)
		require.NoError(t, err, c.id)
		fp, err := nw.program([][]int{shape}, request{outputs: []string{val}})
		require.NoError(t, err)
		// Point i perturbs coordinate i/4 (fdCheck's order), which lies in
		// one row; rows do not interact, so the loss is summed over that
		// row's output alone: the other rows' outputs, which may be far
		// larger (1e223 in pytorch-operator/test_operator_addconstant),
		// would swallow the change.
		perRow := size / rows
		fdCheck(t, c.id, x, grad, func(points [][]float64) ([]float64, error) {
			v := make([]float64, len(points))
			for i, pt := range points {
				o, _, err := fp.run(ctx, [][]float64{pt}, nil)
				if err != nil {
					return nil, err
				}
				r := i / 4 / perRow
				for k := r * cols; k < (r+1)*cols; k++ {
					v[i] += mask[k] * o[0][k]
				}
			}
			return v, nil
		}, nil)
		checked++
	}
	t.Logf("%d backend models checked against central finite differences", checked)
	require.Greater(t, checked, 20)
}
