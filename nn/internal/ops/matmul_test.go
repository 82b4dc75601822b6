package ops

import (
	"fmt"
	"math/rand"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gorgonia.org/tensor"
)

func TestMatMulPreallocNoAllocs(t *testing.T) {
	if raceEnabled {
		t.Skip("the race detector makes sync.Pool drop items, which changes allocation counts")
	}
	// The buffer contract: with a fitting prealloc and a warm weight cache
	// the op writes into prealloc, returns it and allocates nothing (common
	// practice for hot loops); the result equals sgemm's on fresh memory
	// bit for bit (the same chains, IEEE 754-2008 §5.4.1).
	rng := rand.New(rand.NewSource(44))
	for _, dt := range []tensor.Dtype{tensor.Float32, tensor.Float64} {
		for _, m := range []int{1, 4, 64} {
			const n, k = 40, 70
			vals := func(size int) []float64 { return randomInput(rng, size) }
			a := Dense(dt, tensor.Shape{m, k}, vals(m*k))
			w := Dense(dt, tensor.Shape{n, k}, vals(n*k))
			bias := vals(n)
			if dt == tensor.Float32 {
				for j := range bias {
					bias[j] = float64(float32(bias[j]))
				}
			}
			op := matMulOp{rank: 2, transB: true, fixedB: true, alpha: 0.5, pack: &matMulPack{}, bias: &biasRow{f64: bias, f32: make([]float32, n)}}
			for j, v := range bias {
				op.bias.f32[j] = float32(v)
			}
			fresh, err := op.Do(a, w)
			require.NoError(t, err)
			pre := Dense(dt, tensor.Shape{m, n}, vals(m*n))
			var got any
			allocs := testing.AllocsPerRun(10, func() {
				v, err := op.UsePreallocDo(pre, a, w)
				if err != nil {
					panic(err)
				}
				got = v
			})
			assert.Zero(t, allocs, "%v m=%d", dt, m)
			require.Same(t, pre, got, "%v m=%d: the result is prealloc", dt, m)
			require.Equal(t, fresh.(*tensor.Dense).Data(), pre.Data(), "%v m=%d", dt, m)
		}
	}
}

// BenchmarkGemmBias times one fused Gemm+bias op of mlp-m's hidden layer
// (64×256 times 256×256ᵀ plus a bias row) into a reused output.
func BenchmarkGemmBias(b *testing.B) {
	rng := rand.New(rand.NewSource(45))
	for _, m := range []int{1, 64} {
		const n, k = 256, 256
		a := Dense(tensor.Float32, tensor.Shape{m, k}, randomInput(rng, m*k))
		w := Dense(tensor.Float32, tensor.Shape{n, k}, randomInput(rng, n*k))
		bias := randomInput(rng, n)
		op := matMulOp{rank: 2, transB: true, fixedB: true, alpha: 1, pack: &matMulPack{}, bias: &biasRow{f64: bias, f32: make([]float32, n)}}
		pre := Dense(tensor.Float32, tensor.Shape{m, n}, make([]float64, m*n))
		b.Run(fmt.Sprintf("m=%d", m), func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				if _, err := op.UsePreallocDo(pre, a, w); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(2*float64(m*n*k)*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
		})
	}
}
