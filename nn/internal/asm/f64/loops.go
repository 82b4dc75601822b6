package f64

import "math"

// accumRows adds Σ_l x[l]·b[l·ldb + j] to dst[j] for j < len(dst), in the
// order of l, one fused multiply-add per row and element (math.FMA, which
// the compiler turns into the instruction where the CPU has it).
func accumRows(dst, x, b []float64, ldb int) {
	for l, v := range x {
		row := b[l*ldb : l*ldb+len(dst)]
		for j, w := range row {
			dst[j] = math.FMA(v, w, dst[j])
		}
	}
}
