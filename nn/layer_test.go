package nn

import (
	"context"
	"math"
	"math/rand"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// skipModel is x (4) → Gemm h1 → Relu r1 → Gemm h2 → Add(h2, r1) y →
// Gemm out (3): a skip connection around h2, and h1 a value the compiler
// fuses with its Relu.
func skipModel() *irGraph {
	g := newIR(13, 7)
	g.input("x", -1, 4)
	a := g.node("Gemm", []string{"x", g.random("w1", 0.8, 5, 4), g.random("b1", 0.3, 5)}, "h1", aInt("transB", 1))
	r := g.node("Relu", []string{a}, "r1")
	a = g.node("Gemm", []string{r, g.random("w2", 0.5, 5, 5), g.random("b2", 0.2, 5)}, "h2", aInt("transB", 1))
	a = g.node("Add", []string{a, r}, "y")
	g.node("Gemm", []string{a, g.random("w3", 0.5, 3, 5), g.random("b3", 0.1, 3)}, "out", aInt("transB", 1))
	g.output("out")
	return g
}

func weights(g *irGraph, name string) []float64 {
	for _, t := range g.m.Graph.Initializers {
		if t.Name == name {
			v := t.Data.([]float32)
			out := make([]float64, len(v))
			for i, x := range v {
				out[i] = float64(x)
			}
			return out
		}
	}
	panic(name)
}

func TestLayerAtFusedValueAndSkipConnection(t *testing.T) {
	g := skipModel()
	nw, err := Compile(g.m, Options{DType: Float64})
	require.NoError(t, err)
	ctx := context.Background()
	x := randomInput(rand.New(rand.NewSource(3)), 4)
	top, err := nw.Head(Selection{})
	require.NoError(t, err)
	fx, err := top.Forward(ctx, x, 1)
	require.NoError(t, err)

	// h1 is computed by a Gemm whose only reader is a Relu: fused when the
	// program does not return it.
	l, err := nw.Layer("h1", Selection{})
	require.NoError(t, err)
	assert.Equal(t, []int{5}, l.InputShape())
	assert.Equal(t, "Gemm", l.Op())
	assert.Empty(t, l.Fixed())
	h, v, err := l.At(ctx, x)
	require.NoError(t, err)
	w1, b1 := weights(g, "w1"), weights(g, "b1")
	for i := range 5 {
		want := b1[i]
		for j := range 4 {
			want += w1[i*4+j] * x[j]
		}
		// closed form: h1 = W1·x + b1, negative entries kept (before the Relu)
		assert.InDelta(t, want, v[i], 1e-12, "h1[%d]", i)
	}
	gv, err := h.Forward(ctx, v, 1)
	require.NoError(t, err)
	assert.InDeltaSlice(t, fx, gv, 1e-12, "g(V(x)) = F(x)")
	_, grad, err := h.Gradient(ctx, v, 1, []int{1})
	require.NoError(t, err)
	for i := range v {
		// central finite differences of g
		const eps = 1e-6
		p, m := append([]float64(nil), v...), append([]float64(nil), v...)
		p[i] += eps
		m[i] -= eps
		fp, err := h.Forward(ctx, p, 1)
		require.NoError(t, err)
		fm, err := h.Forward(ctx, m, 1)
		require.NoError(t, err)
		if math.Abs(v[i]) > 1e-4 { // away from the Relu's kink
			assert.InDelta(t, (fp[1]-fm[1])/(2*eps), grad[i], 1e-7, "∂g/∂h1[%d]", i)
		}
	}

	// h2: the Add also reads r1, computed from x without passing through
	// h2, which is held at its value for x.
	l, err = nw.Layer("h2", Selection{})
	require.NoError(t, err)
	assert.Equal(t, []string{"r1"}, l.Fixed())
	h, v, err = l.At(ctx, x)
	require.NoError(t, err)
	gv, err = h.Forward(ctx, append(append([]float64(nil), v...), v...), 2)
	require.NoError(t, err)
	assert.InDeltaSlice(t, append(append([]float64(nil), fx...), fx...), gv, 1e-12, "g(V(x)) = F(x), twice in a batch")
	_, grad, err = h.Gradient(ctx, v, 1, []int{2})
	require.NoError(t, err)
	// closed form: out = W3·(h2 + r1) + b3, so ∂out[2]/∂h2 = W3[2, :]
	assert.InDeltaSlice(t, weights(g, "w3")[10:15], grad, 1e-12)

	_, err = nw.Layer("x", Selection{})
	assert.ErrorIs(t, err, ErrBadRequest)
	_, err = nw.Layer("w1", Selection{})
	assert.ErrorIs(t, err, ErrBadRequest)
	_, err = nw.Layer("nope", Selection{})
	assert.ErrorIs(t, err, ErrBadRequest)

	vals, err := nw.Values()
	require.NoError(t, err)
	var names []string
	for _, v := range vals {
		names = append(names, v.Name+":"+v.Op)
	}
	assert.Equal(t, []string{"h1:Gemm", "r1:Relu", "h2:Gemm", "y:Add", "out:Gemm"}, names)
}
