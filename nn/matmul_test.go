package nn

import (
	"context"
	"fmt"
	"math"
	"math/rand"
	"slices"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/onnxlite"
)

// gemmBiasModel is x (N×in) → Gemm(alpha, beta, transB, C of shape cshape)
// → Relu → Gemm(transB=0, bias [out]) → y, with constant weights.
func gemmBiasModel(in, hid, out int64, alpha, beta float32, cshape []int64, seed int64) *onnxlite.Model {
	g := newIR(13, seed)
	g.input("x", -1, in)
	csize := int64(1)
	for _, d := range cshape {
		csize *= d
	}
	c := g.random("c1", 0.5, csize)
	g.m.Graph.Initializers[len(g.m.Graph.Initializers)-1].Dims = cshape
	a := g.node("Gemm", []string{"x", g.random("w1", 0.5, hid, in), c}, "h1",
		aInt("transB", 1), aFloat("alpha", alpha), aFloat("beta", beta))
	a = g.node("Relu", []string{a}, "r1")
	g.node("Gemm", []string{a, g.random("w2", 0.4, hid, out), g.random("b2", 0.2, out)}, "y")
	g.output("y")
	return g.m
}

// gemmBiasCases are the C shapes that broadcast along the rows, with
// alpha, beta ≠ 1 (ONNX Gemm, opset 13: Y = alpha·A'·B' + beta·C with C
// unidirectionally broadcastable to M×N).
var gemmBiasCases = []struct {
	cshape      []int64
	alpha, beta float32
}{
	{[]int64{9}, 1, 1},
	{[]int64{1, 9}, 0.75, -1.5},
	{[]int64{1}, 1.25, 2},
	{[]int64{}, -0.5, 0.5},
}

func TestGemmFusedBiasClosedFormAndGradient(t *testing.T) {
	const in, hid, out = 5, 9, 3
	rng := rand.New(rand.NewSource(41))
	for i, c := range gemmBiasCases {
		name := fmt.Sprintf("C%v alpha=%v beta=%v", c.cshape, c.alpha, c.beta)
		m := gemmBiasModel(in, hid, out, c.alpha, c.beta, c.cshape, int64(50+i))
		nw, err := Compile(m, Options{DType: Float64})
		require.NoError(t, err, name)
		h, err := nw.Head(Selection{})
		require.NoError(t, err, name)
		const n = 3
		x := randomInput(rng, n*in)

		// Closed form of the two Gemms (ONNX operator spec, Gemm):
		// y = W2ᵀ·relu(alpha·W1·x + beta·C) + b2, evaluated in float64.
		init := map[string]*onnxlite.Tensor{}
		for _, t := range m.Graph.Initializers {
			init[t.Name] = t
		}
		f := func(name string) []float32 { return init[name].Data.([]float32) }
		w1, c1, w2, b2 := f("w1"), f("c1"), f("w2"), f("b2")
		got, err := h.Forward(context.Background(), x, n)
		require.NoError(t, err, name)
		for s := 0; s < n; s++ {
			hv := make([]float64, hid)
			for j := range hv {
				var sum float64
				for p := 0; p < in; p++ {
					sum += float64(w1[j*in+p]) * x[s*in+p]
				}
				cj := float64(c1[0])
				if len(c1) > 1 {
					cj = float64(c1[j])
				}
				hv[j] = math.Max(0, float64(c.alpha)*sum+float64(c.beta)*cj)
			}
			for o := 0; o < out; o++ {
				want := float64(b2[o])
				for j := range hv {
					want += hv[j] * float64(w2[j*out+o])
				}
				assert.InDelta(t, want, got[s*out+o], 1e-12, "%s: y[%d][%d]", name, s, o)
			}
		}
		// Central finite differences of every output (gradcheckHead).
		gradcheckHead(t, name, h, x, n, nil)
	}
}

func TestGemmFusedBiasLeavesNoAdd(t *testing.T) {
	// A constant bias folded into the product leaves no elementwise Add
	// forward and no ∂Add backward in the plan (common practice: the
	// fusion a BLAS GEMM's beta·C term allows, Dongarra et al. 1990, §2).
	for _, c := range gemmBiasCases {
		m := gemmBiasModel(5, 9, 3, c.alpha, c.beta, c.cshape, 7)
		nw, err := Compile(m, Options{DType: Float32})
		require.NoError(t, err)
		p, err := nw.program([][]int{{4, 5}}, request{grad: true})
		require.NoError(t, err)
		mc, err := p.build()
		require.NoError(t, err)
		matmuls := 0
		for _, st := range mc.plan {
			if st.op == nil {
				continue
			}
			// The ops describe themselves: "Add", "∂Add/∂x0", "MatMul{...}".
			switch s := st.op.String(); {
			case strings.HasPrefix(s, "MatMul{"):
				matmuls++
			case slices.Contains([]string{"Add", "Sub", "Mul", "Div", "Pow", "PRelu"}, strings.TrimPrefix(strings.Split(s, "/")[0], "∂")):
				t.Errorf("C%v: plan has %v", c.cshape, st.op)
			}
		}
		// Two Gemms forward, the second one's ∂/∂A and the first one's
		// ∂/∂A backward; the weights get no gradient.
		assert.Equal(t, 4, matmuls, "C%v", c.cshape)
	}
}

func TestGemmFusedBiasBatchInvariantBits(t *testing.T) {
	// A sample's output and gradient carry the same IEEE 754 bit patterns
	// alone and at any position of a batch (IEEE 754-2008 §5.4.1: each
	// element is one chain of fused multiply-adds whatever the batch), on
	// the float32 engine, where batch 1 takes the row kernel on the
	// transposed weights and batch 64 the prepacked panels.
	m := gemmBiasModel(100, 256, 10, 0.75, -1.5, []int64{1, 256}, 9)
	nw, err := Compile(m, Options{DType: Float32})
	require.NoError(t, err)
	h, err := nw.Head(Selection{})
	require.NoError(t, err)
	rng := rand.New(rand.NewSource(43))
	const in, out = 100, 10
	ctx := context.Background()
	for _, n := range []int{3, 8, 64} {
		x := randomInput(rng, n*in)
		target := make([]int, n)
		for i := range target {
			target[i] = (i * 7) % out
		}
		yb, gb, err := h.Gradient(ctx, x, n, target)
		require.NoError(t, err)
		for _, s := range []int{0, n / 2, n - 1} {
			y1, g1, err := h.Gradient(ctx, x[s*in:(s+1)*in], 1, target[s:s+1])
			require.NoError(t, err)
			for j := 0; j < out; j++ {
				require.Equal(t, math.Float64bits(y1[j]), math.Float64bits(yb[s*out+j]), "n=%d sample %d y[%d]", n, s, j)
			}
			for j := 0; j < in; j++ {
				if math.Float64bits(g1[j]) != math.Float64bits(gb[s*in+j]) {
					require.Equal(t, g1[j], gb[s*in+j], "n=%d sample %d grad[%d]", n, s, j)
				}
			}
		}
	}
}
