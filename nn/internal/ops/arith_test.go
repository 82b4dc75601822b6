package ops

import (
	"fmt"
	"math"
	"math/rand"
	"testing"

	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// TestElemArithRowMatchesIEEE checks the row kernels of Add, Sub, Mul and
// Div against the one-operation closures of binaryFunc for every
// stride pair: IEEE 754 (2019, 4.3) rounds each basic operation exactly, so
// two evaluations of the same operation on the same operands agree bit for
// bit.
func TestElemArithRowMatchesIEEE(t *testing.T) {
	rng := rand.New(rand.NewSource(9))
	for _, kind := range []string{"Add", "Sub", "Mul", "Div"} {
		f32 := binaryFunc[float32](kind)
		f64 := binaryFunc[float64](kind)
		for _, st := range [][2]int{{1, 1}, {1, 0}, {0, 1}} {
			t.Run(fmt.Sprintf("%s/%d%d", kind, st[0], st[1]), func(t *testing.T) {
				n := 37
				a64, b64 := randomInput(rng, n), randomInput(rng, n)
				a32, b32 := make([]float32, n), make([]float32, n)
				for i := range a64 {
					a32[i], b32[i] = float32(a64[i]), float32(b64[i])
				}
				y32, y64 := make([]float32, n), make([]float64, n)
				require.True(t, arithRow(arithCode(kind), y32, a32, b32, st[0], st[1]))
				require.True(t, arithRow(arithCode(kind), y64, a64, b64, st[0], st[1]))
				for j := 0; j < n; j++ {
					require.Equal(t, math.Float32bits(f32(a32[j*st[0]], b32[j*st[1]])), math.Float32bits(y32[j]))
					require.Equal(t, math.Float64bits(f64(a64[j*st[0]], b64[j*st[1]])), math.Float64bits(y64[j]))
				}
			})
		}
	}
	// Other kinds and strides are left to the general loop.
	y := make([]float32, 4)
	require.False(t, arithRow(arithCode("Pow"), y, y, y, 1, 1))
	require.False(t, arithRow(arithCode("Add"), y, y, y, 2, 1))
	require.False(t, arithRow(arithCode("Add"), y, y, y, 0, 0))
}

func BenchmarkElemArithRow(b *testing.B) {
	const rows, cols = 64, 256 // mlp-m's hidden layer at batch 64
	a := make([]float32, rows*cols)
	bias := make([]float32, cols)
	y := make([]float32, rows*cols)
	b.Run("bias-add", func(b *testing.B) {
		b.SetBytes(8 * rows * cols)
		for i := 0; i < b.N; i++ {
			for r := 0; r < rows; r++ {
				arithRow(arithAdd, y[r*cols:(r+1)*cols], a[r*cols:], bias, 1, 1)
			}
		}
	})
	b.Run("closure", func(b *testing.B) {
		f := binaryFunc[float32]("Add")
		b.SetBytes(8 * rows * cols)
		for i := 0; i < b.N; i++ {
			for r := 0; r < rows; r++ {
				row := y[r*cols : (r+1)*cols]
				for j := range row {
					row[j] = f(a[r*cols+j], bias[j])
				}
			}
		}
	})
}

// TestReluGradNode checks the node reluGrad builds on float32 and float64:
// ∂L/∂x = ∂L/∂y · 1[x > 0] (Relu's derivative, with the subgradient 0 at
// 0, common practice), computed from y = max(0, x) alone.
func TestReluGradNode(t *testing.T) {
	for _, dt := range []tensor.Dtype{tensor.Float32, tensor.Float64} {
		g := G.NewGraph()
		x := []float64{-2, -0.5, 0, 0.25, 3, math.Copysign(0, -1), 1e-30, -1e-30, 7}
		dy := []float64{1, 2, 3, 4, 5, 6, 7, 8, 9}
		yv := make([]float64, len(x))
		for i, v := range x {
			yv[i] = max(v, 0)
		}
		yn := G.NewTensor(g, dt, 1, G.WithShape(len(x)), G.WithName("y"))
		dn := G.NewTensor(g, dt, 1, G.WithShape(len(x)), G.WithName("dy"))
		n, err := reluGrad(yn, dn)
		require.NoError(t, err)
		out, err := n.Op().Do(Dense(dt, yn.Shape(), yv), Dense(dt, dn.Shape(), dy))
		require.NoError(t, err)
		got, err := Floats(out)
		require.NoError(t, err)
		for i, v := range x {
			want := 0.0
			if v > 0 {
				want = dy[i]
			}
			require.Equal(t, want, got[i], "%v x=%v", dt, v)
		}
		_, err = reluGrad(yn, G.NewTensor(g, dt, 1, G.WithShape(3), G.WithName("bad")))
		require.ErrorIs(t, err, ErrShape)
	}
}
