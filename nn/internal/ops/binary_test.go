package ops

import (
	"fmt"
	"math/rand/v2"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// elemBinaryCases pairs every binary op with broadcasting shapes (numpy
// rules, ONNX Broadcasting.md). Divisors are drawn away from 0, Pow bases
// positive; PRelu has its kink at x = 0.
func elemBinaryCases() []elemCase {
	shapes := [][][]int{
		{{2, 3, 4}, {3, 1}},
		{{1}, {2, 3}},
		{{2, 3}, {2, 3}},
		{{3, 4}, {2, 1, 4}},
		{{4}, {}},
	}
	var out []elemCase
	for _, op := range []string{"Add", "Sub", "Mul", "Div"} {
		for _, s := range shapes {
			draw := elemUniform(-3, 3)
			if op == "Div" {
				draw = func(r *rand.Rand, k int) float64 {
					if k == 1 { // |b| in [0.5, 2.5), either sign
						v := 0.5 + 2*r.Float64()
						if r.IntN(2) == 0 {
							return -v
						}
						return v
					}
					return -3 + 6*r.Float64()
				}
			}
			out = append(out, elemCase{
				name: fmt.Sprintf("%s%v%v", op, s[0], s[1]), shapes: s, draw: draw,
				build: func(xs []*G.Node) (*G.Node, error) { return Binary(xs[0], xs[1], op) },
			})
		}
	}
	for _, s := range shapes {
		out = append(out, elemCase{ // a > 0 so that a^b and ln a are real
			name: fmt.Sprintf("Pow%v%v", s[0], s[1]), shapes: s,
			draw: func(r *rand.Rand, k int) float64 {
				if k == 0 {
					return 0.3 + 2.7*r.Float64()
				}
				return -2 + 4*r.Float64()
			},
			build: func(xs []*G.Node) (*G.Node, error) { return Binary(xs[0], xs[1], "Pow") },
		})
	}
	// Max and Min: the draws are continuous, so ties (where the gradient
	// splits) have probability zero.
	for _, op := range []string{"Max", "Min"} {
		for _, s := range shapes {
			out = append(out, elemCase{
				name: fmt.Sprintf("%s%v%v", op, s[0], s[1]), shapes: s, draw: elemUniform(-3, 3),
				build: func(xs []*G.Node) (*G.Node, error) { return Binary(xs[0], xs[1], op) },
			})
		}
	}
	for _, s := range [][][]int{{{2, 3, 4}, {3, 1}}, {{2, 3, 4}, {4}}, {{2, 3}, {1}}, {{2, 3}, {2, 3}}} {
		out = append(out, elemCase{
			name: fmt.Sprintf("PRelu%v%v", s[0], s[1]), shapes: s, draw: elemUniform(-3, 3),
			build: func(xs []*G.Node) (*G.Node, error) { return Binary(xs[0], xs[1], "PRelu") },
			kinks: func(k int) []float64 {
				if k == 0 {
					return []float64{0}
				}
				return nil
			},
		})
	}
	return out
}

func TestBroadcastBinaryGradientMatchesFiniteDifferences(t *testing.T) {
	for _, c := range elemBinaryCases() {
		t.Run(c.name, func(t *testing.T) { elemCheckGrad(t, c) })
	}
}

func TestBroadcastBinaryFloat32MatchesFloat64(t *testing.T) {
	for _, c := range elemBinaryCases() {
		t.Run(c.name, func(t *testing.T) { elemCheckPrecision(t, c) })
	}
}

// TestBroadcastShape checks the numpy broadcasting rule (ONNX
// Broadcasting.md, multidirectional examples).
func TestBroadcastShape(t *testing.T) {
	for _, c := range []struct{ a, b, want []int }{
		{[]int{2, 3, 4, 5}, []int{}, []int{2, 3, 4, 5}},     // Broadcasting.md: scalar
		{[]int{2, 3, 4, 5}, []int{5}, []int{2, 3, 4, 5}},    // Broadcasting.md
		{[]int{4, 5}, []int{2, 3, 4, 5}, []int{2, 3, 4, 5}}, // Broadcasting.md
		{[]int{1, 4, 5}, []int{2, 3, 1, 1}, []int{2, 3, 4, 5}},
		{[]int{3, 4, 5}, []int{2, 1, 1, 1}, []int{2, 3, 4, 5}}, // Broadcasting.md
	} {
		got, err := broadcastShape(c.a, c.b)
		require.NoError(t, err)
		assert.Equal(t, c.want, got, "%v with %v", c.a, c.b)
	}
	_, err := broadcastShape([]int{2, 3}, []int{4})
	assert.ErrorIs(t, err, ErrShape)
}

func TestBroadcastBinaryRejectsBadInput(t *testing.T) {
	g := G.NewGraph()
	a, _ := elemInput(g, tensor.Float64, []int{2, 3}, make([]float64, 6), "a")
	b, _ := elemInput(g, tensor.Float64, []int{4}, make([]float64, 4), "b")
	_, err := Binary(a, b, "Add")
	assert.ErrorIs(t, err, ErrShape)
	assert.ErrorContains(t, err, "[2 3] and [4]")

	s, _ := elemInput(g, tensor.Float64, []int{2, 2, 3}, make([]float64, 12), "s")
	_, err = Binary(a, s, "PRelu") // slope bigger than x: not unidirectional
	assert.ErrorContains(t, err, "does not broadcast to input shape [2 3]")

	_, err = Binary(a, a, "Mod")
	assert.ErrorIs(t, err, errUnknownOp)

	f32, _ := elemInput(g, tensor.Float32, []int{2, 3}, make([]float64, 6), "f")
	_, err = Binary(a, f32, "Mul")
	assert.ErrorContains(t, err, "float64 and float32")

	_, err = Binary(nil, a, "Mul")
	assert.Error(t, err)
}

// BenchmarkBroadcastAdd measures a per-channel bias add, (32,64,64) + (64,1)
// in float32: the kernel alone writing into a reused output, and a whole
// tape-machine run.
func BenchmarkBroadcastAdd(b *testing.B) {
	g := G.NewGraph()
	x, _ := elemInput(g, tensor.Float32, []int{32, 64, 64}, make([]float64, 32*64*64), "x")
	bias, _ := elemInput(g, tensor.Float32, []int{64, 1}, make([]float64, 64), "bias")
	y, err := Binary(x, bias, "Add")
	if err != nil {
		b.Fatal(err)
	}
	elemBenchNode(b, g, y, x.Value(), bias.Value())
}
