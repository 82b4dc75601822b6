//go:build !amd64 || purego

package f64

// AccumRows adds the combination Σ_l x[l]·b[l·ldb : l·ldb+len(dst)] of the
// rows of b to dst, row by row in the order of l, one fused multiply-add
// (one rounding) per row and element: dst += xᵀ·B for B of len(x) rows
// with stride ldb. b must hold (len(x)−1)·ldb + len(dst) values.
func AccumRows(dst, x, b []float64, ldb int) {
	checkAccum(dst, x, b, ldb)
	accumRows(dst, x, b, ldb)
}
