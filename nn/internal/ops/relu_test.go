package ops

import (
	"math"
	"testing"

	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"github.com/apportion/apportion/nn/internal/asm/f32"
)

// TestFuseReluEpilogueNegativeZero runs the Gemm op on operands whose
// product holds −0 and NaN, and checks that the
// fused op stores +0 there, as Relu after the op does (Go spec: max(−0, +0)
// is +0), and NaN where the product is NaN.
func TestFuseReluEpilogueNegativeZero(t *testing.T) {
	a := []float64{0, 0, math.NaN(), 1, -1, 2}
	negZeros := 0
	for _, dt := range []tensor.Dtype{tensor.Float32, tensor.Float64} {
		mk := func(v []float64, shape ...int) *tensor.Dense {
			if dt == tensor.Float32 {
				f := make([]float32, len(v))
				for i := range v {
					f[i] = float32(v[i])
				}
				return tensor.New(tensor.WithShape(shape...), tensor.WithBacking(f))
			}
			return tensor.New(tensor.WithShape(shape...), tensor.WithBacking(append([]float64(nil), v...)))
		}
		bits := func(v G.Value) []float64 {
			d := v.(*tensor.Dense)
			if dt == tensor.Float32 {
				out := []float64{}
				for _, f := range d.Float32s() {
					out = append(out, float64(f))
				}
				return out
			}
			return append([]float64(nil), d.Float64s()...)
		}
		// A is 6×1, B is 1×1 = [1] and alpha −1: the product is −A, −0 where
		// A is +0 (IEEE 754: −1·+0 = −0).
		plain, err := matMulOp{rank: 2, alpha: -1}.Do(mk(a, 6, 1), mk([]float64{1}, 1, 1))
		require.NoError(t, err)
		fused, err := matMulOp{rank: 2, alpha: -1, relu: true}.Do(mk(a, 6, 1), mk([]float64{1}, 1, 1))
		require.NoError(t, err)
		p, f := bits(plain), bits(fused)
		if math.Signbit(p[0]) && p[0] == 0 {
			negZeros++
			require.Equal(t, uint64(0), math.Float64bits(f[0]), "%v: relu(−0) = +0 (Go spec, max)", dt)
		}
		require.True(t, math.IsNaN(f[2]), "%v: relu(NaN) = NaN (Go spec, max)", dt)
		want := make([]float64, len(p))
		for i := range p {
			want[i] = max(p[i], 0)
		}
		for i := range want {
			// IEEE 754 bit patterns
			require.Equal(t, math.Float64bits(want[i]), math.Float64bits(f[i]), "%v epilogue [%d]: fused %v, unfused %v", dt, i, f[i], want[i])
		}
	}
	// With the AVX2/FMA kernels at least one path stores −1·(+0) as −0 (the
	// float32 kernel may keep the +0 accumulator's sign); gonum's products
	// (other CPUs, -tags purego) give +0 on both, so there relu(−0) is not
	// reached and only the checks above ran.
	if !f32.Asm() && negZeros == 0 {
		t.Skip("no product path of this build yields −0, so relu(−0) was not exercised")
	}
	require.Positive(t, negZeros, "a −0 product reached the epilogue")
}
