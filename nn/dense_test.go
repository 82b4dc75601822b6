package nn

import (
	"context"
	"fmt"
	"math/rand"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/nn/internal/asm/f32"
	"github.com/apportion/apportion/onnxlite"
)

// denseForms are the chains a dense rest takes, after a first Gemm that
// widens the data: every way a layer is written (Gemm with either weight
// layout, alpha and beta; MatMul with and without a bias Add, on either
// side), Relu between layers or not, and the Head's value before or after
// a last Relu.
func denseForms() map[string]*onnxlite.Model {
	forms := map[string]*onnxlite.Model{}
	first := func(seed int64, in, hidden int64) (*irGraph, string) {
		g := newIR(13, seed)
		g.input("x", -1, in)
		a := g.node("Gemm", []string{"x", g.random("w1", 0.5, hidden, in), g.random("b1", 0.1, hidden)}, "h1", aInt("transB", 1))
		return g, g.node("Relu", []string{a}, "r1")
	}
	g, a := first(31, 30, 64)
	a = g.node("Gemm", []string{a, g.random("w2", 0.3, 64, 64), g.random("b2", 0.1, 64)}, "h2", aInt("transB", 1))
	a = g.node("Relu", []string{a}, "r2")
	g.node("Gemm", []string{a, g.random("w3", 0.3, 2, 64), g.random("b3", 0.1, 2)}, "y", aInt("transB", 1))
	g.output("y")
	forms["gemm transB"] = g.m

	g, a = first(32, 7, 33)
	a = g.node("Gemm", []string{a, g.random("w2", 0.3, 33, 65), g.random("b2", 0.1, 1, 65)}, "h2",
		aFloat("alpha", 0.5), aFloat("beta", 2))
	a = g.node("Relu", []string{a}, "r2")
	g.node("Gemm", []string{a, g.random("w3", 0.3, 65, 5)}, "y", aFloat("alpha", 1.5))
	g.output("y")
	forms["gemm alpha beta"] = g.m

	g, a = first(33, 12, 40)
	a = g.node("MatMul", []string{a, g.random("w2", 0.3, 40, 48)}, "m2")
	a = g.node("Add", []string{g.random("b2", 0.1, 48), a}, "h2")
	a = g.node("Relu", []string{a}, "r2")
	a = g.node("MatMul", []string{a, g.random("w3", 0.3, 48, 32)}, "m3")
	a = g.node("MatMul", []string{a, g.random("w4", 0.3, 32, 3)}, "m4")
	a = g.node("Add", []string{a, g.random("b4", 0.1, 3)}, "y0")
	g.node("Relu", []string{a}, "y")
	g.output("y")
	forms["matmul add"] = g.m
	return forms
}

// TestDenseRestMatchesGraph checks the dense rest against the graph engine
// on the same request, bit for bit (common practice for a rewrite of an
// evaluation: the same operations in the same order give the same bits):
// the outputs and the weighted sums of each form, for batches below,
// at and past a tile of rows and past denseChunk, one part at a time and
// in concurrent parts. (The portable build, on gonum's GEMM, agrees to
// rounding.)
func TestDenseRestMatchesGraph(t *testing.T) {
	ctx := context.Background()
	for name, m := range denseForms() {
		for _, par := range []int{1, 3} {
			nw, err := Compile(m, Options{Parallel: par})
			require.NoError(t, err)
			h, err := nw.Head(Selection{})
			require.NoError(t, err)
			p := h.prefix()
			require.NotNil(t, p, name)
			require.NotNil(t, p.rest, "%s: the rest is dense", name)
			require.Same(t, p, h.summingPrefix(), "%s: the sums go through the prefix", name)
			size := prod(p.shape)
			rng := rand.New(rand.NewSource(int64(len(name))))
			for _, n := range []int{1, 2, 5, 64, 300, 600} {
				z := make([]float64, n*size)
				for i := range z {
					z[i] = float64(float32(2*rng.Float64() - 1))
				}
				w := randomInput(rng, n)
				group := make([]int, n)
				for i := range group {
					group[i] = i % 2
				}
				target := n % h.outSize
				wantOut, want, err := h.sumThrough(ctx, p, z, n, w, group, 2, target)
				require.NoError(t, err)
				out, got, err := h.sumDense(ctx, p, p.rest, n, func(lo, hi int, dst []float32) {
					for i, v := range z[lo*size : hi*size] {
						dst[i] = float32(v)
					}
				}, w, group, 2, target)
				require.NoError(t, err)
				if !f32.Asm() {
					// gonum's float32 GEMM, which the portable build runs,
					// blocks the inner dimension only for larger batches,
					// and the rest cuts its batch into other parts than
					// the graph's: the same sums up to rounding.
					assertRelClose(t, wantOut, out, 1e-6, "%s n=%d parallel %d: outputs", name, n, par)
					for k := range want {
						assertRelClose(t, want[k], got[k], 1e-6, "%s n=%d parallel %d: sum %d", name, n, par, k)
					}
					continue
				}
				requireSameBits(t, fmt.Sprintf("%s n=%d parallel %d: outputs", name, n, par), out, wantOut)
				for k := range want {
					requireSameBits(t, fmt.Sprintf("%s n=%d parallel %d: sum %d", name, n, par, k), got[k], want[k])
				}
			}
		}
	}
}

// TestDenseRestRefused checks that what is not a plain chain of dense
// layers and Relus keeps the graph engine: a Softmax head, a branch, an
// operator of another kind, and a float64 network.
func TestDenseRestRefused(t *testing.T) {
	build := func(tail func(g *irGraph, a string) string) *onnxlite.Model {
		g := newIR(13, 41)
		g.input("x", -1, 6)
		a := g.node("Gemm", []string{"x", g.random("w1", 0.5, 16, 6), g.random("b1", 0.1, 16)}, "h1", aInt("transB", 1))
		a = g.node("Relu", []string{a}, "r1")
		g.output(tail(g, a))
		return g.m
	}
	dense := func(g *irGraph, a, name string, out int64) string {
		return g.node("Gemm", []string{a, g.random(name+"w", 0.3, out, 16), g.random(name+"b", 0.1, out)}, name, aInt("transB", 1))
	}
	for name, m := range map[string]*onnxlite.Model{
		"softmax head": build(func(g *irGraph, a string) string {
			return g.node("Softmax", []string{dense(g, a, "y0", 3)}, "y", aInt("axis", 1))
		}),
		"branch": build(func(g *irGraph, a string) string {
			return dense(g, g.node("Add", []string{dense(g, a, "h2", 16), a}, "res"), "y", 3)
		}),
		"leaky relu": build(func(g *irGraph, a string) string {
			return dense(g, g.node("LeakyRelu", []string{dense(g, a, "h2", 16)}, "l2"), "y", 3)
		}),
	} {
		h, err := mustHead(m, Float32)
		require.NoError(t, err, name)
		p := h.prefix()
		require.NotNil(t, p, name)
		assert.Nil(t, p.rest, name)
		assert.Nil(t, h.summingPrefix(), "%s: a widening prefix without a dense rest sums point by point", name)
	}
	h, err := mustHead(denseForms()["gemm transB"], Float64)
	require.NoError(t, err)
	assert.Nil(t, h.prefix().rest, "float64 networks keep gonum's products")

	// The logits of the Softmax model: the chain ends before the head.
	nw, err := Compile(build(func(g *irGraph, a string) string {
		return g.node("Softmax", []string{dense(g, a, "y0", 3)}, "y", aInt("axis", 1))
	}), Options{})
	require.NoError(t, err)
	h, err = nw.Head(Selection{Logits: true})
	require.NoError(t, err)
	assert.NotNil(t, h.prefix().rest, "logits of a Softmax model")
}
