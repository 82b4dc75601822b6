package nn

import (
	"context"
	"errors"
	"fmt"
	"math"
	"math/rand"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/onnxlite"
)

// irGraph builds small ONNX graphs in Go for tests and benchmarks.
type irGraph struct {
	m   *onnxlite.Model
	rng *rand.Rand
}

func newIR(opset int64, seed int64) *irGraph {
	return &irGraph{
		m:   &onnxlite.Model{IRVersion: 8, Opsets: []onnxlite.OpsetImport{{Version: opset}}, Graph: &onnxlite.Graph{Name: "test"}},
		rng: rand.New(rand.NewSource(seed)),
	}
}

// input declares a float input; a negative dim is symbolic (the batch "N" first).
func (g *irGraph) input(name string, dims ...int64) {
	ty := &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: onnxlite.Float, HasShape: true}
	for i, d := range dims {
		if d < 0 {
			param := "N"
			if i > 0 {
				param = fmt.Sprintf("d%d", i)
			}
			ty.Shape = append(ty.Shape, onnxlite.Dim{Param: param})
		} else {
			ty.Shape = append(ty.Shape, onnxlite.Dim{Value: d, HasValue: true})
		}
	}
	g.m.Graph.Inputs = append(g.m.Graph.Inputs, &onnxlite.ValueInfo{Name: name, Type: ty})
}

func (g *irGraph) output(name string) {
	g.m.Graph.Outputs = append(g.m.Graph.Outputs, &onnxlite.ValueInfo{Name: name, Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: onnxlite.Float}})
}

func (g *irGraph) floats(name string, dims []int64, vals []float32) string {
	g.m.Graph.Initializers = append(g.m.Graph.Initializers, &onnxlite.Tensor{Name: name, DType: onnxlite.Float, Dims: dims, Data: vals})
	return name
}

// random adds an initializer with uniform values in [-scale, scale).
func (g *irGraph) random(name string, scale float64, dims ...int64) string {
	n := int64(1)
	for _, d := range dims {
		n *= d
	}
	v := make([]float32, n)
	for i := range v {
		v[i] = float32((2*g.rng.Float64() - 1) * scale)
	}
	return g.floats(name, dims, v)
}

func (g *irGraph) ints(name string, vals ...int64) string {
	g.m.Graph.Initializers = append(g.m.Graph.Initializers, &onnxlite.Tensor{Name: name, DType: onnxlite.Int64, Dims: []int64{int64(len(vals))}, Data: vals})
	return name
}

func (g *irGraph) node(op string, ins []string, out string, attrs ...*onnxlite.Attribute) string {
	g.m.Graph.Nodes = append(g.m.Graph.Nodes, &onnxlite.Node{Name: out, OpType: op, Inputs: ins, Outputs: []string{out}, Attrs: attrs})
	return out
}

func aInt(name string, v int64) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrInt, I: v}
}
func aInts(name string, v ...int64) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrInts, Ints: v}
}
func aFloat(name string, v float32) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrFloat, F: v}
}
func aString(name, v string) *onnxlite.Attribute {
	return &onnxlite.Attribute{Name: name, Type: onnxlite.AttrString, S: v}
}

// mlpModel is a dense network in → h → h → out with ReLU, symbolic batch.
func mlpModel(in, h, out int64, seed int64) *onnxlite.Model {
	g := newIR(13, seed)
	g.input("x", -1, in)
	a := g.node("Gemm", []string{"x", g.random("w1", 0.5, h, in), g.random("b1", 0.1, h)}, "h1", aInt("transB", 1))
	a = g.node("Relu", []string{a}, "r1")
	a = g.node("Gemm", []string{a, g.random("w2", 0.3, h, h), g.random("b2", 0.1, h)}, "h2", aInt("transB", 1))
	a = g.node("Relu", []string{a}, "r2")
	g.node("Gemm", []string{a, g.random("w3", 0.3, h, out), g.random("b3", 0.1, out)}, "y")
	g.output("y")
	return g.m
}

// cnnModel is 1×28×28 → conv 8 (3×3, pad 1) → relu → maxpool 2 → conv 16 →
// relu → maxpool 2 → flatten → fc 10, symbolic batch.
func cnnModel(seed int64) *onnxlite.Model {
	g := newIR(13, seed)
	g.input("x", -1, 1, 28, 28)
	a := g.node("Conv", []string{"x", g.random("c1w", 0.3, 8, 1, 3, 3), g.random("c1b", 0.1, 8)}, "c1", aInts("pads", 1, 1, 1, 1))
	a = g.node("Relu", []string{a}, "r1")
	a = g.node("MaxPool", []string{a}, "p1", aInts("kernel_shape", 2, 2), aInts("strides", 2, 2))
	a = g.node("Conv", []string{a, g.random("c2w", 0.2, 16, 8, 3, 3), g.random("c2b", 0.1, 16)}, "c2", aInts("pads", 1, 1, 1, 1))
	a = g.node("Relu", []string{a}, "r2")
	a = g.node("MaxPool", []string{a}, "p2", aInts("kernel_shape", 2, 2), aInts("strides", 2, 2))
	a = g.node("Flatten", []string{a}, "f")
	g.node("Gemm", []string{a, g.random("fw", 0.05, 10, 16*7*7), g.random("fb", 0.1, 10)}, "y", aInt("transB", 1))
	g.output("y")
	return g.m
}

func randomInput(rng *rand.Rand, n int) []float64 {
	x := make([]float64, n)
	for i := range x {
		x[i] = 2*rng.Float64() - 1
	}
	return x
}

func tensor64(name string, shape []int64, x []float64) *onnxlite.Tensor {
	return &onnxlite.Tensor{Name: name, DType: onnxlite.Double, Dims: shape, Data: x}
}

// denseRef evaluates y = W·x + b row by row: the ONNX Gemm definition
// Y = alpha·A·B + beta·C (ONNX operator spec, Gemm), written out as loops.
func denseRef(w []float32, b []float32, x []float64, in, out int) []float64 {
	y := make([]float64, out)
	for o := 0; o < out; o++ {
		s := float64(b[o])
		for i := 0; i < in; i++ {
			s += float64(w[o*in+i]) * x[i]
		}
		y[o] = s
	}
	return y
}

func TestForwardGemmClosedForm(t *testing.T) {
	g := newIR(13, 1)
	g.input("x", -1, 5)
	w := g.random("w", 1, 3, 5)
	b := g.random("b", 1, 3)
	g.node("Gemm", []string{"x", w, b}, "y", aInt("transB", 1))
	g.output("y")
	nw, err := Compile(g.m, Options{DType: Float64})
	require.NoError(t, err)
	assert.Equal(t, []Port{{Name: "x", Shape: []int{5}, DType: onnxlite.Float}}, nw.Inputs())
	assert.Equal(t, []int{3}, nw.Outputs()[0].Shape)
	rng := rand.New(rand.NewSource(2))
	x := randomInput(rng, 4*5)
	out, err := nw.Forward(context.Background(), []*onnxlite.Tensor{tensor64("x", []int64{4, 5}, x)})
	require.NoError(t, err)
	require.Len(t, out, 1)
	assert.Equal(t, onnxlite.Double, out[0].DType)
	assert.Equal(t, []int{4, 3}, out[0].Shape())
	got := out[0].Data.([]float64)
	wv := g.m.Graph.Initializers[0].Data.([]float32)
	bv := g.m.Graph.Initializers[1].Data.([]float32)
	for i := 0; i < 4; i++ {
		want := denseRef(wv, bv, x[i*5:(i+1)*5], 5, 3) // closed form: Gemm definition
		assert.InDeltaSlice(t, want, got[i*3:(i+1)*3], 1e-12)
	}
}

// fixedBatchModel is exported at batch 1: x [1, 2, 3] → Reshape [1, -1] →
// Gemm → y [1, 4].
func fixedBatchModel() *onnxlite.Model {
	g := newIR(13, 3)
	g.input("x", 1, 2, 3)
	r := g.node("Reshape", []string{"x", g.ints("shape", 1, -1)}, "flat")
	g.node("Gemm", []string{r, g.random("w", 1, 4, 6), g.random("b", 1, 4)}, "y", aInt("transB", 1))
	g.output("y")
	return g.m
}

func TestBatchRelaxReshape(t *testing.T) {
	m := fixedBatchModel()
	nw, err := Compile(m, Options{DType: Float64})
	require.NoError(t, err)
	rng := rand.New(rand.NewSource(4))
	const n = 5
	x := randomInput(rng, n*6)
	out, err := nw.Forward(context.Background(), []*onnxlite.Tensor{tensor64("x", []int64{n, 2, 3}, x)})
	require.NoError(t, err)
	assert.Equal(t, []int{n, 4}, out[0].Shape())
	wv := m.Graph.Initializers[1].Data.([]float32)
	bv := m.Graph.Initializers[2].Data.([]float32)
	got := out[0].Data.([]float64)
	for i := 0; i < n; i++ {
		// closed form: Reshape to [1, 6] then Gemm (ONNX spec), per sample
		assert.InDeltaSlice(t, denseRef(wv, bv, x[i*6:(i+1)*6], 6, 4), got[i*4:(i+1)*4], 1e-12)
	}
	p, err := nw.program([][]int{{n, 2, 3}}, request{})
	require.NoError(t, err)
	assert.False(t, p.perSample, "the relaxed graph is batch-consistent and must run as one program")
	// The original model is untouched.
	assert.Equal(t, []int64{1, -1}, m.Graph.Initializers[0].Data.([]int64))

	h, err := nw.Head(Selection{})
	require.NoError(t, err)
	assert.Equal(t, []int{2, 3}, h.InputShape())
	assert.Equal(t, 4, h.OutputSize())
	hf, err := h.Forward(context.Background(), x, n)
	require.NoError(t, err)
	assert.InDeltaSlice(t, got, hf, 1e-12)
}

// A graph whose Reshape [1, -1] flattens a transposed value cannot follow the
// batch (the batch axis is no longer leading): it runs sample by sample.
func TestBatchRelaxFallsBackPerSample(t *testing.T) {
	g := newIR(13, 5)
	g.input("x", 1, 4)
	tr := g.node("Transpose", []string{"x"}, "t", aInts("perm", 1, 0))
	r := g.node("Reshape", []string{tr, g.ints("shape", 1, -1)}, "flat")
	g.node("Gemm", []string{r, g.random("w", 1, 2, 4), g.random("b", 1, 2)}, "y", aInt("transB", 1))
	g.output("y")
	nw, err := Compile(g.m, Options{DType: Float64})
	require.NoError(t, err)
	rng := rand.New(rand.NewSource(6))
	const n = 3
	x := randomInput(rng, n*4)
	out, err := nw.Forward(context.Background(), []*onnxlite.Tensor{tensor64("x", []int64{n, 4}, x)})
	require.NoError(t, err)
	require.Equal(t, []int{n, 2}, out[0].Shape())
	p, err := nw.program([][]int{{n, 4}}, request{})
	require.NoError(t, err)
	assert.True(t, p.perSample)
	wv := g.m.Graph.Initializers[1].Data.([]float32)
	bv := g.m.Graph.Initializers[2].Data.([]float32)
	got := out[0].Data.([]float64)
	for i := 0; i < n; i++ {
		// closed form: at batch 1 the transpose and reshape leave the 4 values in order
		assert.InDeltaSlice(t, denseRef(wv, bv, x[i*4:(i+1)*4], 4, 2), got[i*2:(i+1)*2], 1e-12)
	}
	h, err := nw.Head(Selection{})
	require.NoError(t, err)
	out2, grad, err := h.Gradient(context.Background(), x, n, []int{1, 0, 1})
	require.NoError(t, err)
	assert.InDeltaSlice(t, got, out2, 1e-12)
	for i, k := range []int{1, 0, 1} {
		for j := 0; j < 4; j++ {
			// closed form: ∂(Wx + b)_k/∂x_j = W_kj
			assert.InDelta(t, float64(wv[k*4+j]), grad[i*4+j], 1e-12)
		}
	}
}

func TestForwardRepeatable(t *testing.T) {
	nw, err := Compile(cnnModel(7), Options{})
	require.NoError(t, err)
	rng := rand.New(rand.NewSource(8))
	x := tensor64("x", []int64{3, 1, 28, 28}, randomInput(rng, 3*28*28))
	a, err := nw.Forward(context.Background(), []*onnxlite.Tensor{x})
	require.NoError(t, err)
	b, err := nw.Forward(context.Background(), []*onnxlite.Tensor{x})
	require.NoError(t, err)
	av, bv := a[0].Data.([]float32), b[0].Data.([]float32)
	require.Len(t, av, 30)
	for i := range av {
		// IEEE 754: the same computation twice gives the same bit pattern
		require.Equal(t, math.Float32bits(av[i]), math.Float32bits(bv[i]), "element %d", i)
	}
	h, err := nw.Head(Selection{})
	require.NoError(t, err)
	xs := x.Data.([]float64)
	o1, g1, err := h.Gradient(context.Background(), xs, 3, []int{0, 4, 9})
	require.NoError(t, err)
	o2, g2, err := h.Gradient(context.Background(), xs, 3, []int{0, 4, 9})
	require.NoError(t, err)
	for i := range g1 {
		require.Equal(t, math.Float64bits(g1[i]), math.Float64bits(g2[i]), "gradient element %d", i)
	}
	for i := range o1 {
		require.Equal(t, math.Float64bits(o1[i]), math.Float64bits(o2[i]), "output element %d", i)
	}
}

func TestChunkingDoesNotChangeResults(t *testing.T) {
	m := mlpModel(6, 8, 3, 9)
	whole, err := Compile(m, Options{DType: Float64})
	require.NoError(t, err)
	chunked, err := Compile(m, Options{DType: Float64, MaxBatch: 4})
	require.NoError(t, err)
	hw, err := whole.Head(Selection{})
	require.NoError(t, err)
	hc, err := chunked.Head(Selection{})
	require.NoError(t, err)
	rng := rand.New(rand.NewSource(10))
	const n = 11
	x := randomInput(rng, n*6)
	target := make([]int, n)
	for i := range target {
		target[i] = i % 3
	}
	ow, gw, err := hw.Gradient(context.Background(), x, n, target)
	require.NoError(t, err)
	oc, gc, err := hc.Gradient(context.Background(), x, n, target)
	require.NoError(t, err)
	// common practice: samples are independent, so per-sample results agree
	// up to the summation order of the matrix kernel
	assert.InDeltaSlice(t, ow, oc, 1e-12)
	assert.InDeltaSlice(t, gw, gc, 1e-12)
	fw, err := chunked.Forward(context.Background(), []*onnxlite.Tensor{tensor64("x", []int64{n, 6}, x)})
	require.NoError(t, err)
	assert.Equal(t, []int{n, 3}, fw[0].Shape())
	assert.InDeltaSlice(t, ow, fw[0].Data.([]float64), 1e-12)
}

func TestGrownChunks(t *testing.T) {
	// With MaxBatch left at zero, 1000 samples of a small dense model run
	// in chunks of 512, 256, 128, 64 and 40; with MaxBatch 64, in chunks of
	// 64 and 40. Common practice: samples are independent, and the kernels'
	// chains do not depend on the batch, so outputs and gradients agree bit
	// for bit. With the byte budget lowered to three times what a
	// gradient chunk of 64 holds, chunks stop growing sooner.
	ctx := context.Background()
	sizes := func(nw *Network, grad bool) []int {
		nw.mu.Lock()
		defer nw.mu.Unlock()
		var out []int
		for _, p := range nw.progs {
			if p.req.grad == grad {
				out = append(out, p.inShapes[0][0])
			}
		}
		slices.Sort(out)
		return out
	}
	for _, tc := range []struct {
		budget         int64 // 0: grownBatchBytes
		forward, grads []int
	}{
		{0, []int{40, 64, 128, 256, 512}, []int{40, 64, 128, 256, 512}},
		// A gradient program holds each value and its adjoint: about twice
		// a forward program's bytes per sample, so its chunks stop sooner.
		{-1, []int{40, 64, 128, 256}, []int{40, 64, 128}},
	} {
		m := mlpModel(30, 64, 2, 13)
		grown, err := Compile(m, Options{})
		require.NoError(t, err)
		if tc.budget < 0 {
			// 192 samples' worth of the largest program for 64 samples.
			h, err := grown.Head(Selection{})
			require.NoError(t, err)
			_, _, err = h.Gradient(ctx, make([]float64, DefaultMaxBatch*30), DefaultMaxBatch, make([]int, DefaultMaxBatch))
			require.NoError(t, err)
			grown.grownBytes = 0
			for _, p := range grown.progs {
				grown.grownBytes = max(grown.grownBytes, 3*p.varyingBytes)
			}
		}
		fixed, err := Compile(m, Options{MaxBatch: DefaultMaxBatch})
		require.NoError(t, err)
		const n = 1000
		x := randomInput(rand.New(rand.NewSource(14)), n*30)
		target := make([]int, n)
		for i := range target {
			target[i] = i % 2
		}
		var outs, grads [2][]float64
		for i, nw := range []*Network{grown, fixed} {
			h, err := nw.Head(Selection{})
			require.NoError(t, err)
			outs[i], err = h.Forward(ctx, x, n)
			require.NoError(t, err)
			_, grads[i], err = h.Gradient(ctx, x, n, target)
			require.NoError(t, err)
		}
		assert.Equal(t, tc.forward, sizes(grown, false), "budget %d: forward chunk sizes with MaxBatch left at zero", tc.budget)
		assert.Equal(t, tc.grads, sizes(grown, true), "budget %d: gradient chunk sizes with MaxBatch left at zero", tc.budget)
		assert.Equal(t, []int{40, 64}, sizes(fixed, false), "budget %d: chunk sizes with MaxBatch 64", tc.budget)
		for i := range outs[0] {
			require.Equal(t, math.Float64bits(outs[1][i]), math.Float64bits(outs[0][i]), "budget %d: output %d", tc.budget, i)
		}
		for i := range grads[0] {
			require.Equal(t, math.Float64bits(grads[1][i]), math.Float64bits(grads[0][i]), "budget %d: gradient %d", tc.budget, i)
		}
	}
}

func TestConcurrentForward(t *testing.T) {
	nw, err := Compile(mlpModel(30, 64, 2, 11), Options{Machines: 3})
	require.NoError(t, err)
	h, err := nw.Head(Selection{})
	require.NoError(t, err)
	rng := rand.New(rand.NewSource(12))
	const n = 5
	x := randomInput(rng, n*30)
	wantOut, wantGrad, err := h.Gradient(context.Background(), x, n, []int{0, 1, 0, 1, 1})
	require.NoError(t, err)
	var wg sync.WaitGroup
	errs := make(chan error, 8)
	for w := 0; w < 8; w++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for r := 0; r < 20; r++ {
				o, g, err := h.Gradient(context.Background(), x, n, []int{0, 1, 0, 1, 1})
				if err != nil {
					errs <- err
					return
				}
				for i := range g {
					if g[i] != wantGrad[i] {
						errs <- errors.New("gradient differs between concurrent runs")
						return
					}
				}
				for i := range o {
					if o[i] != wantOut[i] {
						errs <- errors.New("output differs between concurrent runs")
						return
					}
				}
			}
		}()
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		t.Error(err) // common practice: concurrent runs of one program equal a serial run bit for bit
	}
}

func TestPoolHonoursContext(t *testing.T) {
	nw, err := Compile(mlpModel(4, 4, 2, 13), Options{Machines: 1})
	require.NoError(t, err)
	p, err := nw.program([][]int{{1, 4}}, request{})
	require.NoError(t, err)
	m, err := p.pool.acquire(context.Background())
	require.NoError(t, err)
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Millisecond)
	defer cancel()
	_, err = p.pool.acquire(ctx) // the only machine is taken
	assert.ErrorIs(t, err, context.DeadlineExceeded)
	p.pool.release(m, true)
	m2, err := p.pool.acquire(context.Background())
	require.NoError(t, err)
	p.pool.release(m2, true)
}

func TestLogitsSelection(t *testing.T) {
	g := newIR(13, 14)
	g.input("x", -1, 4)
	z := g.node("Gemm", []string{"x", g.random("w", 1, 3, 4), g.random("b", 1, 3)}, "z", aInt("transB", 1))
	g.node("Softmax", []string{z}, "p", aInt("axis", -1))
	g.output("p")
	nw, err := Compile(g.m, Options{DType: Float64})
	require.NoError(t, err)
	probs, err := nw.Head(Selection{})
	require.NoError(t, err)
	logits, err := nw.Head(Selection{Output: "p", Logits: true})
	require.NoError(t, err)
	assert.Equal(t, "z", logits.Value())
	rng := rand.New(rand.NewSource(15))
	x := randomInput(rng, 2*4)
	pz, err := probs.Forward(context.Background(), x, 2)
	require.NoError(t, err)
	lz, err := logits.Forward(context.Background(), x, 2)
	require.NoError(t, err)
	for i := 0; i < 2; i++ {
		// closed form: softmax(z)_k = exp(z_k) / Σ_j exp(z_j)
		var s float64
		for k := 0; k < 3; k++ {
			s += math.Exp(lz[i*3+k])
		}
		for k := 0; k < 3; k++ {
			assert.InDelta(t, math.Exp(lz[i*3+k])/s, pz[i*3+k], 1e-12)
		}
	}
	// The gradient of a logit of a Gemm is the weight row (closed form: ∂(Wx+b)_k/∂x = W_k).
	_, grad, err := logits.Gradient(context.Background(), x, 2, []int{2, 0})
	require.NoError(t, err)
	w := g.m.Graph.Initializers[0].Data.([]float32)
	for j := 0; j < 4; j++ {
		assert.InDelta(t, float64(w[2*4+j]), grad[j], 1e-12)
		assert.InDelta(t, float64(w[0*4+j]), grad[4+j], 1e-12)
	}
	_, err = nw.Head(Selection{Output: "nope"})
	assert.ErrorIs(t, err, ErrBadRequest)

	// The tensor form returns the same gradient with the input's shape.
	ot, gt, err := nw.Gradient(context.Background(), tensor64("x", []int64{2, 4}, x), Selection{Logits: true}, []int{2, 0})
	require.NoError(t, err)
	assert.Equal(t, []int{2, 3}, ot.Shape())
	assert.Equal(t, []int{2, 4}, gt.Shape())
	assert.Equal(t, grad, gt.Data.([]float64))
	_, _, err = nw.Gradient(context.Background(), tensor64("x", []int64{2, 3}, x[:6]), Selection{}, []int{0, 0})
	assert.ErrorIs(t, err, ErrShape)

	g2 := newIR(13, 16)
	g2.input("x", -1, 4)
	g2.node("Relu", []string{"x"}, "y")
	g2.output("y")
	nw2, err := Compile(g2.m, Options{})
	require.NoError(t, err)
	_, err = nw2.Head(Selection{Logits: true})
	require.ErrorIs(t, err, ErrBadRequest)
	assert.Contains(t, err.Error(), "Relu")
}

func TestBadInput(t *testing.T) {
	ctx := context.Background()
	nw, err := Compile(mlpModel(3, 4, 2, 17), Options{})
	require.NoError(t, err)

	_, err = nw.Forward(ctx, nil)
	assert.ErrorIs(t, err, ErrBadRequest)
	_, err = nw.Forward(ctx, []*onnxlite.Tensor{tensor64("x", []int64{2, 4}, make([]float64, 8))})
	require.ErrorIs(t, err, ErrShape)
	assert.Contains(t, err.Error(), `"x"`)
	assert.Contains(t, err.Error(), "[N 3]")
	assert.Contains(t, err.Error(), "[2 4]")
	_, err = nw.Forward(ctx, []*onnxlite.Tensor{tensor64("x", []int64{2, 3}, make([]float64, 5))})
	assert.ErrorIs(t, err, ErrShape)
	_, err = nw.Forward(ctx, []*onnxlite.Tensor{{Name: "x", DType: onnxlite.Int64, Dims: []int64{1, 3}, Data: []int64{1, 2, 3}}})
	assert.ErrorIs(t, err, ErrBadRequest)

	h, err := nw.Head(Selection{})
	require.NoError(t, err)
	x := []float64{1, 2, 3, 4, math.NaN(), 6}
	_, err = h.Forward(ctx, x, 2)
	require.ErrorIs(t, err, ErrNonFinite)
	assert.Contains(t, err.Error(), "x[4] (sample 1, element 1)")
	x[4] = math.Inf(1)
	_, _, err = h.Gradient(ctx, x, 2, []int{0, 0})
	assert.ErrorIs(t, err, ErrNonFinite)
	x[4] = 5
	_, _, err = h.Gradient(ctx, x, 2, []int{0, 2})
	require.ErrorIs(t, err, ErrBadRequest)
	assert.Contains(t, err.Error(), "target[1] = 2")
	_, _, err = h.Gradient(ctx, x, 2, []int{0})
	assert.ErrorIs(t, err, ErrBadRequest)
	_, err = h.Forward(ctx, x, 3)
	assert.ErrorIs(t, err, ErrShape)
	_, err = h.Forward(ctx, x, 0)
	assert.ErrorIs(t, err, ErrBadRequest)
	_, err = h.Forward(ctx, x, math.MaxInt64/2) // oversized request
	assert.ErrorIs(t, err, ErrShape)

	cctx, cancel := context.WithCancel(ctx)
	cancel()
	_, err = h.Forward(cctx, x, 2)
	assert.ErrorIs(t, err, context.Canceled)
}

func TestCompileErrors(t *testing.T) {
	_, err := Compile(nil, Options{})
	assert.ErrorIs(t, err, ErrBadRequest)

	g := newIR(13, 18)
	g.input("x", -1, 3)
	g.node("Hardmax", []string{"x"}, "h")
	g.node("MyOp", []string{"h"}, "y")
	g.output("y")
	_, err = Compile(g.m, Options{})
	require.ErrorIs(t, err, onnxlite.ErrUnsupported)
	assert.Contains(t, err.Error(), "Hardmax")
	assert.Contains(t, err.Error(), "MyOp")

	_, err = Compile(mlpModel(2, 2, 2, 19), Options{DType: 7})
	assert.ErrorIs(t, err, ErrBadRequest)

	// A Head of a model with two inputs runs once the other input has
	// values (With); y = a + b, so ∂y/∂a = 1 (closed form).
	g2 := newIR(13, 20)
	g2.input("a", -1, 2)
	g2.input("b", -1, 2)
	g2.node("Add", []string{"a", "b"}, "y")
	g2.output("y")
	nw, err := Compile(g2.m, Options{DType: Float64})
	require.NoError(t, err)
	h, err := nw.Head(Selection{})
	require.NoError(t, err)
	_, err = h.Forward(context.Background(), []float64{1, 2}, 1)
	require.ErrorIs(t, err, ErrBadRequest)
	assert.Contains(t, err.Error(), "With")
	_, err = nw.Head(Selection{Input: "c"})
	require.ErrorIs(t, err, ErrBadRequest)
	assert.Contains(t, err.Error(), `"c"`)
	hb, err := nw.Head(Selection{Input: "b"})
	require.NoError(t, err)
	hb, err = hb.With([]*onnxlite.Tensor{tensor64("a", []int64{1, 2}, []float64{10, 20}), nil})
	require.NoError(t, err)
	out, grad, err := hb.Gradient(context.Background(), []float64{1, 2, 3, 4}, 2, []int{1, 0})
	require.NoError(t, err)
	assert.Equal(t, []float64{11, 22, 13, 24}, out)
	assert.Equal(t, []float64{0, 1, 1, 0}, grad)

	// An input whose per-sample shape is symbolic needs Options.InputShapes.
	g3 := newIR(13, 21)
	g3.input("x", -1, -1)
	g3.node("Relu", []string{"x"}, "y")
	g3.output("y")
	nw, err = Compile(g3.m, Options{})
	require.NoError(t, err)
	_, err = nw.Head(Selection{})
	assert.ErrorIs(t, err, ErrShape)
	nw, err = Compile(g3.m, Options{InputShapes: map[string][]int{"x": {5}}})
	require.NoError(t, err)
	h, err = nw.Head(Selection{})
	require.NoError(t, err)
	assert.Equal(t, []int{5}, h.InputShape())
	_, err = Compile(g3.m, Options{InputShapes: map[string][]int{"x": {5, 2}}})
	assert.ErrorIs(t, err, ErrShape)
	_, err = Compile(g3.m, Options{InputShapes: map[string][]int{"z": {5}}})
	assert.ErrorIs(t, err, ErrBadRequest)
}

// attributionModel mirrors the method set the attribution package expects
// (gradattr.Model); nn cannot import it, so the match is checked here.
type attributionModel interface {
	InputShape() []int
	OutputSize() int
	Forward(ctx context.Context, x []float64, n int) ([]float64, error)
	Gradient(ctx context.Context, x []float64, n int, target []int) (out, grad []float64, err error)
}

var _ attributionModel = (*Head)(nil)

// In-place kernels (the elementwise ops may overwrite their input) must never
// write into a constant or a caller's input: three runs give the closed form
// y = softmax(x) + exp(relu(c)) each time.
func TestInPlaceKernelsKeepConstants(t *testing.T) {
	g := newIR(13, 1)
	g.input("x", -1, 4)
	c := g.floats("c", []int64{4}, []float32{-1, 2, -3, 4})
	r := g.node("Relu", []string{c}, "r")
	e := g.node("Exp", []string{r}, "e")
	s := g.node("Softmax", []string{"x"}, "s")
	g.node("Add", []string{s, e}, "y")
	g.output("y")
	nw, err := Compile(g.m, Options{DType: Float64, Machines: 1})
	require.NoError(t, err)
	h, err := nw.Head(Selection{})
	require.NoError(t, err)
	x := []float64{1, 2, 3, 4}
	var z float64
	for _, v := range x {
		z += math.Exp(v)
	}
	for run := 0; run < 3; run++ {
		y, err := h.Forward(context.Background(), x, 1)
		require.NoError(t, err)
		for k, cv := range []float64{-1, 2, -3, 4} {
			// closed form: softmax(x)_k + exp(max(c_k, 0))
			assert.InDelta(t, math.Exp(x[k])/z+math.Exp(math.Max(cv, 0)), y[k], 1e-12, "run %d element %d", run, k)
		}
	}
	assert.Equal(t, []float64{1, 2, 3, 4}, x)
}

func TestCheckFiniteNamesFirstNonFinite(t *testing.T) {
	// Against the plain definition (math.IsNaN, math.IsInf): every length
	// up to three blocks of eight and a tail, each position, each kind of
	// non-finite value, a second one planted later, and huge finite values
	// (whose differences with themselves are still 0) around them.
	for n := 1; n <= 27; n++ {
		x := make([]float64, n)
		for i := range x {
			x[i] = math.MaxFloat64 * float64(1-2*(i%2))
		}
		require.NoError(t, checkFinite(x, 3), "n=%d", n)
		for at := 0; at < n; at++ {
			for _, bad := range []float64{math.NaN(), math.Inf(1), math.Inf(-1)} {
				y := append([]float64(nil), x...)
				y[at] = bad
				if at+5 < n {
					y[at+5] = math.NaN()
				}
				first := slices.IndexFunc(y, func(v float64) bool { return math.IsNaN(v) || math.IsInf(v, 0) })
				err := checkFinite(y, 3)
				require.ErrorIs(t, err, ErrNonFinite, "n=%d at=%d", n, at)
				assert.Contains(t, err.Error(), fmt.Sprintf("x[%d] (sample %d, element %d)", first, first/3, first%3))
			}
		}
	}
}
