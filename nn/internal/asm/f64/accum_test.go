package f64

import (
	"math"
	"math/rand/v2"
	"testing"

	"github.com/stretchr/testify/require"
)

// TestAccumRowsMatchesLoop checks AccumRows against its loop bit for bit
// (the loop takes one fused multiply-add per term, math.FMA: IEEE 754
// §5.4.1 fusedMultiplyAdd, in the order of the rows) for widths through the 32- and 4-column
// blocks and the tail, one row and many, a stride past the width, with
// ±0, ±Inf and NaN among the values, and that it writes nothing past the
// width.
func TestAccumRowsMatchesLoop(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	specials := []float64{0, math.Copysign(0, -1), math.Inf(1), math.Inf(-1), math.NaN(), 1e300}
	draw := func() float64 {
		if rng.IntN(50) == 0 {
			return specials[rng.IntN(len(specials))]
		}
		return rng.NormFloat64() * math.Pow(2, float64(rng.IntN(30)-15))
	}
	for _, n := range []int{1, 3, 4, 5, 31, 32, 33, 36, 37, 64, 100, 257} {
		for _, k := range []int{1, 2, 7, 100} {
			ldb := n + rng.IntN(3)
			b := make([]float64, (k-1)*ldb+n)
			x := make([]float64, k)
			dst := make([]float64, n+1)
			for i := range b {
				b[i] = draw()
			}
			for i := range x {
				x[i] = draw()
			}
			for i := range dst[:n] {
				dst[i] = draw()
			}
			want := append([]float64(nil), dst...)
			accumRows(want[:n], x, b, ldb)
			AccumRows(dst[:n], x, b, ldb)
			for j := range want {
				if math.IsNaN(want[j]) {
					// Which NaN comes out of two is the hardware's choice
					// (IEEE 754 §6.2.3 leaves it open).
					require.True(t, math.IsNaN(dst[j]), "n=%d k=%d [%d]: NaN vs %v", n, k, j, dst[j])
					continue
				}
				require.Equal(t, math.Float64bits(want[j]), math.Float64bits(dst[j]), "n=%d k=%d [%d]: %v vs %v", n, k, j, want[j], dst[j])
			}
		}
	}
	require.Panics(t, func() { AccumRows(make([]float64, 4), make([]float64, 2), make([]float64, 7), 4) }, "b one value short")
	AccumRows(make([]float64, 4), nil, nil, 4) // no rows: nothing to add
}

// BenchmarkAccumRows times the pullback of one sum through a 256×100 layer.
func BenchmarkAccumRows(b *testing.B) {
	dst, x, w := make([]float64, 100), make([]float64, 256), make([]float64, 256*100)
	for i := range w {
		w[i] = float64(i%7) - 3
	}
	for b.Loop() {
		AccumRows(dst, x, w, 100)
	}
}
