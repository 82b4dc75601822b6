//go:build amd64 && !purego

package nn

import "golang.org/x/sys/cpu"

// kern6x16 is the AVX2/FMA micro-kernel in sgemm_amd64.s. It reads kc
// packed 6-float columns of A from a and kc packed 16-float rows of B from
// b, and stores c[r·ldc+j] = alpha·Σ_p a[6p+r]·b[16p+j] + beta·c[r·ldc+j]
// for r < 6, j < 16; c is not read when beta == 0. kc must be at least 1.
//
//go:noescape
func kern6x16(kc int, a, b, c *float32, ldc int, alpha, beta float32)

// kern1x32 is the row kernel in sgemm_amd64.s for products with few rows:
// it stores c[j] = alpha·Σ_p a[p·inca]·b[p·ldb+j] + beta·c[j] for j < 32,
// reading A and B in place, with the same rounding per element as
// kern6x16. kc must be at least 1.
//
//go:noescape
func kern1x32(kc int, a *float32, inca int, b *float32, ldb int, c *float32, alpha, beta float32)

// sgemmRowKernel is kern1x32 when sgemmKernel is kern6x16, nil otherwise.
var sgemmRowKernel = func() func(kc int, a *float32, inca int, b *float32, ldb int, c *float32, alpha, beta float32) {
	if sgemmKernel != nil {
		return kern1x32
	}
	return nil
}()

// sgemmKernel is the packed micro-kernel, or nil when the CPU lacks AVX2 or
// FMA and sgemm uses gonum's BLAS instead.
var sgemmKernel = func() func(kc int, a, b, c *float32, ldc int, alpha, beta float32) {
	if cpu.X86.HasAVX2 && cpu.X86.HasFMA {
		return kern6x16
	}
	return nil
}()

// transpose8x8 stores the transpose of the 8×8 block src[r·lds+c] at
// dst[c·ldd+r] (sgemm_amd64.s). Both blocks must lie inside their slices.
//
//go:noescape
func transpose8x8(src *float32, lds int, dst *float32, ldd int)

// sgemmTranspose8 is transpose8x8 when the CPU has AVX, nil otherwise.
var sgemmTranspose8 = func() func(src *float32, lds int, dst *float32, ldd int) {
	if sgemmKernel != nil {
		return transpose8x8
	}
	return nil
}()

// kern6x16s is kern6x16 reading the 6×kc strip of A in place, element
// (r, p) at a[r·rs + p·ps] (sgemm_amd64.s); it stores the same bits as
// kern6x16 on the packed strip. All six rows must lie inside A.
//
//go:noescape
func kern6x16s(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32)

// sgemmStridedKernel is kern6x16s when sgemmKernel is kern6x16, nil
// otherwise.
var sgemmStridedKernel = func() func(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32) {
	if sgemmKernel != nil {
		return kern6x16s
	}
	return nil
}()

// copyRows16 copies rows (≥ 1) runs of 16 floats from src[r·lds] to
// dst[16r] (sgemm_amd64.s); every run must lie inside its slice.
//
//go:noescape
func copyRows16(src *float32, lds int, dst *float32, rows int)

// sgemmCopy16 is copyRows16 when the CPU has AVX (with sgemmKernel), nil
// otherwise.
var sgemmCopy16 = func() func(src *float32, lds int, dst *float32, rows int) {
	if sgemmKernel != nil {
		return copyRows16
	}
	return nil
}()

// kern6x16e is the bottom-edge kernel in sgemm_amd64.s: kern6x16s's chains
// (a packed strip is rs = 1, ps = sgemmMR), reading and storing only rows
// r < mr (1 ≤ mr ≤ 6) of c, all 16 columns, with the bits a full tile would
// get. It reads all six rows of A.
//
//go:noescape
func kern6x16e(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32, mr int)

// sgemmEdgeKernel is kern6x16e when sgemmKernel is kern6x16, nil otherwise.
var sgemmEdgeKernel = func() func(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32, mr int) {
	if sgemmKernel != nil {
		return kern6x16e
	}
	return nil
}()
