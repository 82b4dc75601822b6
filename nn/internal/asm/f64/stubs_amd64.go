//go:build amd64 && !purego

package f64

import "golang.org/x/sys/cpu"

// useAsm reports whether the CPU runs the assembly kernels, which need
// AVX2 and FMA. It is the only place the package reads CPU features.
var useAsm = cpu.X86.HasAVX2 && cpu.X86.HasFMA

// AccumRows adds the combination Σ_l x[l]·b[l·ldb : l·ldb+len(dst)] of the
// rows of b to dst, row by row in the order of l, one fused multiply-add
// (one rounding) per row and element: dst += xᵀ·B for B of len(x) rows
// with stride ldb. b must hold (len(x)−1)·ldb + len(dst) values.
func AccumRows(dst, x, b []float64, ldb int) {
	checkAccum(dst, x, b, ldb)
	if len(x) == 0 {
		return
	}
	j := 0
	if useAsm {
		for ; j+32 <= len(dst); j += 32 {
			accumRows32Asm(&dst[j], &x[0], len(x), &b[j], ldb)
		}
		for ; j+4 <= len(dst); j += 4 {
			accumRows4Asm(&dst[j], &x[0], len(x), &b[j], ldb)
		}
	}
	if j < len(dst) {
		accumRows(dst[j:], x, b[j:], ldb)
	}
}

// accumRows32Asm is, for k ≥ 1,
//
//	for l := 0; l < k; l++ {
//		for j := 0; j < 32; j++ {
//			dst[j] = math.FMA(x[l], b[l*ldb+j], dst[j])
//		}
//	}
//
//go:noescape
func accumRows32Asm(dst, x *float64, k int, b *float64, ldb int)

// accumRows4Asm is accumRows32Asm on 4 columns.
//
//go:noescape
func accumRows4Asm(dst, x *float64, k int, b *float64, ldb int)
