package nn

import (
	"context"
	"math"
	"math/rand"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// perPointSum is Σ_i w_i ∂out[i, target]/∂x_i from Head.Gradient, one
// point at a time: the computation the sums replace.
func perPointSum(t *testing.T, h *Head, x []float64, n int, w []float64, target int) (out, sum []float64) {
	t.Helper()
	sum = make([]float64, h.inSize)
	for i := range n {
		o, g, err := h.Gradient(context.Background(), x[i*h.inSize:(i+1)*h.inSize], 1, []int{target})
		require.NoError(t, err)
		out = append(out, o...)
		for j, v := range g {
			sum[j] += w[i] * v
		}
	}
	return out, sum
}

// TestGradientSumMatchesPerPoint checks the summed-gradient path (prefixes
// that narrow the data, or are followed by a dense rest in float32; other
// prefixes that widen it sum point by point) against
// the per-point computation on random dense and convolutional models, with
// their affine prefixes (a standardisation before a Gemm, a Conv with a
// BatchNorm), in float64 to 1e-12 and float32 to 1e-5 relative to the
// largest component: the weighted sum of input gradients is linear in the
// gradients, ∇F(x) = Pᵀ ∇G(P x) by the chain rule, and along a path
// P(a + α(b − a)) = P(a) + α(P(b) − P(a)) for affine P.
func TestGradientSumMatchesPerPoint(t *testing.T) {
	ctx := context.Background()
	// hidden and channels set whether the prefix narrows the data (8 of
	// 12 values, 1 channel of 2), so that the sums go through it, or
	// widens it (20, 4), so that they are formed point by point.
	var hidden, channels int64
	softmax := true
	dense := func() *irGraph {
		g := newIR(13, 11)
		g.input("x", -1, 12)
		a := g.node("Sub", []string{"x", g.random("mu", 1, 12)}, "c")
		a = g.node("Div", []string{a, g.floats("sd", []int64{12}, []float32{1, 2, 0.5, 1, 3, 1, 1, 2, 1, 4, 1, 1})}, "s")
		a = g.node("Gemm", []string{a, g.random("w1", 0.5, hidden, 12), g.random("b1", 0.1, hidden)}, "h1", aInt("transB", 1))
		a = g.node("Relu", []string{a}, "r1")
		if !softmax {
			g.node("Gemm", []string{a, g.random("w2", 0.5, 5, hidden), g.random("b2", 0.1, 5)}, "y", aInt("transB", 1))
			g.output("y")
			return g
		}
		a = g.node("Gemm", []string{a, g.random("w2", 0.5, 5, hidden), g.random("b2", 0.1, 5)}, "y0", aInt("transB", 1))
		g.node("Softmax", []string{a}, "y", aInt("axis", 1))
		g.output("y")
		return g
	}
	conv := func() *irGraph {
		g := newIR(13, 12)
		g.input("x", -1, 2, 8, 8)
		a := g.node("Conv", []string{"x", g.random("cw", 0.5, channels, 2, 3, 3), g.random("cb", 0.1, channels)}, "c1", aInts("pads", 1, 1, 1, 1))
		a = g.node("BatchNormalization", []string{a, g.random("s", 1, channels), g.random("t", 0.2, channels), g.random("m", 0.2, channels), g.floats("v", []int64{channels}, []float32{1, 2, 0.5, 1}[:channels])}, "bn")
		a = g.node("Relu", []string{a}, "r1")
		a = g.node("MaxPool", []string{a}, "p1", aInts("kernel_shape", 2, 2), aInts("strides", 2, 2))
		a = g.node("Flatten", []string{a}, "f")
		g.node("Gemm", []string{a, g.random("fw", 0.3, 3, 16*channels), g.random("fb", 0.1, 3)}, "y", aInt("transB", 1))
		g.output("y")
		return g
	}
	for _, c := range []struct {
		name             string
		build            func() *irGraph
		size             int
		hidden, channels int64
		through          bool
		dense            bool // the rest is a dense chain: float32 sums go through the prefix
	}{{"dense narrowing", dense, 12, 8, 0, true, false}, {"conv narrowing", conv, 128, 0, 1, true, false},
		{"dense widening", dense, 12, 20, 0, false, false}, {"conv widening", conv, 128, 0, 4, false, false},
		{"dense widening, dense rest", dense, 12, 20, 0, false, true}} {
		hidden, channels, softmax = c.hidden, c.channels, !c.dense
		for _, dt := range []DType{Float64, Float32} {
			h, err := mustHead(c.build().m, dt)
			require.NoError(t, err)
			require.NotNil(t, h.prefix(), "%s: the affine prefix is found", c.name)
			through := c.through || (c.dense && dt == Float32)
			assert.Equal(t, through, h.summingPrefix() != nil, "%s %v: the sums go through the prefix", c.name, dt)
			assert.Equal(t, c.dense && dt == Float32, h.prefix().rest != nil, "%s %v: the rest runs as a dense chain", c.name, dt)
			rng := rand.New(rand.NewSource(4))
			const n = 70 // more than one batch of 64
			x := randomInput(rng, n*c.size)
			w := randomInput(rng, n)
			tol := 1e-12
			if dt == Float32 {
				tol = 1e-5
			}
			wantOut, want := perPointSum(t, h, x, n, w, 1)
			out, got, err := h.GradientSum(ctx, x, n, w, 1)
			require.NoError(t, err)
			assertRelClose(t, want, got, tol, "%s %v: GradientSum", c.name, dt)
			assertRelClose(t, wantOut, out, tol, "%s %v: outputs", c.name, dt)

			from, to := randomInput(rng, c.size), randomInput(rng, c.size)
			alpha := make([]float64, n)
			pts := make([]float64, n*c.size)
			for i := range alpha {
				alpha[i] = (float64(i) + 0.5) / n
				for j := range from {
					pts[i*c.size+j] = from[j] + alpha[i]*(to[j]-from[j])
				}
			}
			wantOut, want = perPointSum(t, h, pts, n, w, 2)
			out, got, err = h.PathGradientSum(ctx, from, to, alpha, w, 2)
			require.NoError(t, err)
			assertRelClose(t, want, got, tol, "%s %v: PathGradientSum", c.name, dt)
			assertRelClose(t, wantOut, out, tol, "%s %v: path outputs", c.name, dt)

			// Grouped: each group's sum has the bits of PathGradientSum on
			// that group's points alone (common practice: a sample's
			// gradient does not depend on its batch), the outputs those of
			// the ungrouped call.
			group := make([]int, n)
			for i := range group {
				group[i] = (i * 7 / 3) % 3
			}
			gout, sums, err := h.PathGradientSums(ctx, from, to, alpha, w, group, 3, 2)
			require.NoError(t, err)
			require.Len(t, sums, 3)
			assert.Equal(t, out, gout, "%s %v: grouped path outputs", c.name, dt)
			for k := range 3 {
				var ak, wk []float64
				for i, g := range group {
					if g == k {
						ak, wk = append(ak, alpha[i]), append(wk, w[i])
					}
				}
				_, alone, err := h.PathGradientSum(ctx, from, to, ak, wk, 2)
				require.NoError(t, err)
				assert.Equal(t, alone, sums[k], "%s %v: group %d bit for bit", c.name, dt, k)
			}
			for _, bad := range []struct {
				group  []int
				groups int
			}{{group, 2}, {group[:5], 3}, {group, 0}} {
				_, _, err := h.PathGradientSums(ctx, from, to, alpha, w, bad.group, bad.groups, 2)
				assert.ErrorIs(t, err, ErrBadRequest, "%s: %d group numbers, %d groups", c.name, len(bad.group), bad.groups)
			}
		}
	}
}

// TestGradientSumWithoutPrefix checks the fallback, a model whose input is
// read by two operations: the sums are the per-point ones.
func TestGradientSumWithoutPrefix(t *testing.T) {
	g := newIR(13, 13)
	g.input("x", -1, 6)
	a := g.node("Gemm", []string{"x", g.random("w1", 0.5, 6, 6), g.random("b1", 0.1, 6)}, "h1", aInt("transB", 1))
	a = g.node("Add", []string{g.node("Tanh", []string{a}, "t"), "x"}, "res")
	g.node("Gemm", []string{a, g.random("w2", 0.5, 2, 6), g.random("b2", 0.1, 2)}, "y", aInt("transB", 1))
	g.output("y")
	h, err := mustHead(g.m, Float64)
	require.NoError(t, err)
	assert.Nil(t, h.prefix())
	rng := rand.New(rand.NewSource(5))
	x, w := randomInput(rng, 5*6), randomInput(rng, 5)
	_, want := perPointSum(t, h, x, 5, w, 0)
	_, got, err := h.GradientSum(context.Background(), x, 5, w, 0)
	require.NoError(t, err)
	assert.Equal(t, want, got, "the same sum in the same order")
}

func assertRelClose(t *testing.T, want, got []float64, tol float64, msg string, args ...any) {
	t.Helper()
	require.Len(t, got, len(want))
	scale := 0.0
	for _, v := range want {
		scale = math.Max(scale, math.Abs(v))
	}
	for i := range want {
		if math.Abs(want[i]-got[i]) > tol*math.Max(scale, 1e-300) {
			assert.InDeltaSlice(t, want, got, tol*scale, append([]any{msg}, args...)...)
			return
		}
	}
}
