//go:build !amd64 || purego

package f32

import "unsafe"

// useAsm is false: this build has no assembly, and every kernel runs its
// loop (loops.go).
const useAsm = false

// Asm reports whether the kernels run in assembly: never in this build.
func Asm() bool { return useAsm }

// Gemm6x16 stores the 6×16 tile c[r·ldc+j] = alpha·Σ_p a[6p+r]·b[16p+j] +
// beta·c[r·ldc+j] from kc ≥ 1 packed 6-float columns of A and 16-float rows
// of B, each sum one chain of fused multiply-adds in the order of p; c is
// not read when beta is 0.
func Gemm6x16(kc int, a, b, c *float32, ldc int, alpha, beta float32) {
	gemm6x16(kc, a, b, c, ldc, alpha, beta)
}

// Gemm6x16Strided is Gemm6x16 with element (r, p) of A read in place at
// a[r·rs + p·ps]; it stores the bits Gemm6x16 stores for the packed strip.
func Gemm6x16Strided(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32) {
	gemm6x16Strided(kc, a, rs, ps, b, c, ldc, alpha, beta)
}

// Gemm6x32Strided is Gemm6x16Strided on two packed strips of B side by
// side: it stores the 6×32 tile whose columns j < 16 are Gemm6x16Strided
// with B at b0 and whose columns j ≥ 16 are Gemm6x16Strided with B at b1,
// with the bits of those two calls.
func Gemm6x32Strided(kc int, a *float32, rs, ps int, b0, b1, c *float32, ldc int, alpha, beta float32) {
	gemm6x32Strided(kc, a, rs, ps, b0, b1, c, ldc, alpha, beta)
}

// Gemm6x32Bias stores the 6×32 tile of Gemm6x32Strided (alpha = 1, beta
// = 0) plus a bias row and an optional Relu, the epilogue of a dense layer:
// c[r·ldc+j] = T[r][j] + bias[j], rounded once (T[r][j] when bias is nil),
// then max(·, 0) with Go's max when relu. These are the bits of
// Gemm6x32Strided with beta = 1 on a C holding the bias rows, followed by
// Relu, without reading C.
func Gemm6x32Bias(kc int, a *float32, rs, ps int, b0, b1, c *float32, ldc int, bias *float32, relu bool) {
	gemm6x32Bias(kc, a, rs, ps, b0, b1, c, ldc, bias, relu)
}

// Gemm6x16Edge is Gemm6x16Strided for the bottom edge of C: it reads and
// stores only rows r < mr (1 ≤ mr ≤ 6) of c, with the bits of a full tile,
// and reads all six rows of A.
func Gemm6x16Edge(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32, mr int) {
	gemm6x16Edge(kc, a, rs, ps, b, c, ldc, alpha, beta, mr)
}

// Gemm1x32 stores the row c[j] = alpha·Σ_p a[p·inca]·b[p·ldb+j] +
// beta·c[j], j < 32, reading A and B in place, each sum the chain of fused
// multiply-adds Gemm6x16 forms; c is not read when beta is 0.
func Gemm1x32(kc int, a *float32, inca int, b *float32, ldb int, c *float32, alpha, beta float32) {
	gemm1x32(kc, a, inca, b, ldb, c, alpha, beta)
}

// Gemm1x128 is Gemm1x32 on 128 columns: c[j], j < 128, each the chain and
// the bits Gemm1x32 gives it, the four blocks of 32 computed together on
// AVX-512.
func Gemm1x128(kc int, a *float32, inca int, b *float32, ldb int, c *float32, alpha, beta float32) {
	for j := 0; j < 128; j += 32 {
		Gemm1x32(kc, a, inca, (*float32)(unsafe.Add(unsafe.Pointer(b), 4*j)), ldb, (*float32)(unsafe.Add(unsafe.Pointer(c), 4*j)), alpha, beta)
	}
}

// Conv6x16 is Gemm6x16 with row p of B read in place at b[off[p]] and an
// epilogue for a convolution: it stores c[r·ldc+j] = T[r][j] + bias[r] with
// one rounding (the bits of Gemm6x16 with beta 1 on a tile filled with the
// bias), or T[r][j] when bias is nil; c is never read.
func Conv6x16(kc int, a, b *float32, off *int32, c *float32, ldc int, bias *float32) {
	conv6x16(kc, a, b, off, c, ldc, bias)
}

// Conv6x32 is Conv6x16 on two strips of B side by side: it stores the 6×32
// tile whose columns j < 16 are Conv6x16 with B at b0 and whose columns
// j ≥ 16 are Conv6x16 with B at b1 (the same offsets), each element the
// same chain and store, so the bits of two Conv6x16 calls.
func Conv6x32(kc int, a, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32) {
	conv6x32(kc, a, b0, b1, off, c, ldc, bias)
}

// Conv4x32 is Conv6x32 for the last rows of a product: it stores rows
// r < 4 of the tile alone, with the bits Conv6x32 stores there. A keeps its
// 6-float columns; bias[4], bias[5] and rows 4 and 5 of c are not touched.
func Conv4x32(kc int, a, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32) {
	conv4x32(kc, a, b0, b1, off, c, ldc, bias)
}

// WideTiles reports whether the 32-wide tiles (Conv6x32, Conv4x32,
// Conv8x32, Gemm6x32Strided) and Conv1x128 run kernels of their own (the
// AVX-512 forms), so that blocks of 4 rows cost 4 rows and a wide tile
// beats two narrow ones; elsewhere they run the 6×16 kernels.
func WideTiles() bool { return false }

// Conv8x32 is Conv4x32 on two strips of A: it stores the 8×32 tile whose
// rows r < 4 are Conv4x32 with A at a0 and rows r ≥ 4 Conv4x32 with A at
// a1 (each strip in 6-float columns, its first four rows used) and bias
// from bias[4], with the bits of those two calls.
func Conv8x32(kc int, a0, a1, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32) {
	conv8x32(kc, a0, a1, b0, b1, off, c, ldc, bias)
}

// Conv1x128 is Conv6x16 for one row over 128 positions: it stores
// c[j] = Σ_p a[6p]·b[off[p]+j] (+ bias[0]), j < 128, the chains and store
// of row 0 of Conv6x16 on the eight strips of 16 at b, b+16, …; A keeps its
// 6-float columns, of which it reads the first; kc ≥ 1.
func Conv1x128(kc int, a, b *float32, off *int32, c *float32, bias *float32) {
	conv1x128(kc, a, b, off, c, bias)
}

// Transpose8x8 stores the transpose of the 8×8 block src[r·lds+c] at
// dst[c·ldd+r].
func Transpose8x8(src *float32, lds int, dst *float32, ldd int) { transpose8x8(src, lds, dst, ldd) }

// CopyRows16 copies rows ≥ 1 runs of 16 floats from src[r·lds] to dst[16r].
func CopyRows16(src *float32, lds int, dst *float32, rows int) { copyRows16(src, lds, dst, rows) }

// CopyRows copies rows runs of w floats from src (rows lds apart) to dst
// (rows ldd apart).
func CopyRows(dst *float32, ldd int, src *float32, lds int, rows, w int) {
	copyRows(dst, ldd, src, lds, rows, w)
}

// Relu stores y[i] = max(x[i], 0) with Go's max (NaN stays NaN, −0 gives
// +0) for i < len(x); y must be at least as long as x.
func Relu(y, x []float32) { relu(y, x) }

// ReluGrad stores d[i] = dy[i] where x[i] > 0 and +0 elsewhere (NaN
// included) for i < len(x); d and dy must be at least as long as x.
func ReluGrad(d, x, dy []float32) { reluGrad(d, x, dy) }

// ReluGradRows is ReluGrad on rows runs of w floats: it stores
// dst[r·ldd+j] = dy[r·lds+j] where x[r·lds+j] > 0 and +0 elsewhere, x and
// dy laid out alike, as CopyRows copies them.
func ReluGradRows(dst *float32, ldd int, x, dy *float32, lds int, rows, w int) {
	reluGradRows(dst, ldd, x, dy, lds, rows, w)
}

// Widen stores dst[i] = float64(src[i]) (exact) for i < len(src); dst
// must be at least as long as src.
func Widen(dst []float64, src []float32) { widen(dst, src) }

// Narrow stores dst[i] = float32(src[i]), rounded to nearest, ties to
// even, as Go converts, for i < len(src); dst must be at least as long as
// src.
func Narrow(dst []float32, src []float64) { narrow(dst, src) }

// LerpNarrow stores dst[i] = float32(u[i] + a·d[i]) for i < len(u), the
// product and the sum each rounded to float64 (never fused), then rounded
// to float32: a point u + a·d of a straight path in float64, given to a
// float32 network. d and dst must be at least as long as u.
func LerpNarrow(dst []float32, u, d []float64, a float64) { lerpNarrow(dst, u, d, a) }

// AddScaledWiden adds w·float64(x[i]) to dst[i] for i < len(x), the
// product and the sum each rounded to float64 (never fused): a weighted
// sum of float32 rows kept in float64. dst must be at least as long as x.
func AddScaledWiden(dst []float64, w float64, x []float32) { addScaledWiden(dst, w, x) }

// AddTo adds src[i] to dst[i] for i < len(src); dst must be at least as
// long as src.
func AddTo(dst, src []float32) { addTo(dst, src) }

// Lerp stores dst[i] = lo[i] + f·(hi[i] − lo[i]) for i < len(lo), the
// difference, the product and the sum each rounded to float32 (never
// fused): the value at f of a quantity affine between two points. hi and
// dst must be at least as long as lo.
func Lerp(dst, lo, hi []float32, f float32) { lerp(dst, lo, hi, f) }

// ReluGradMidAdd adds dy[i] to dst[i] where a[i] + b[i] > 0 (NaN not)
// for i < len(a): a Relu's input gradient on a segment whose ends' inputs
// are a and b, read at its midpoint. b, dy and dst must be at least as
// long as a.
func ReluGradMidAdd(dst, a, b, dy []float32) { reluGradMidAdd(dst, a, b, dy) }

// MaxPool2x2 stores, for each of planes planes of h×w in x, the 2×2
// stride-2 max pool of its top-left 2·oh×2·ow corner in the plane of oh×ow
// in y: the first NaN of each window if it has one, else its first maximal
// element in row-major order.
func MaxPool2x2(x, y []float32, planes, h, w, oh, ow int) { maxPool2x2(x, y, planes, h, w, oh, ow) }

// MaxPool2x2Grad stores the gradient of MaxPool2x2 into the covered part
// of dx (rows < 2·oh, columns < 2·ow of each plane, laid out like x):
// 0 + dy at the window's element MaxPool2x2 picks, +0 at the others.
func MaxPool2x2Grad(x, dy, dx []float32, planes, h, w, oh, ow int) {
	maxPool2x2Grad(x, dy, dx, planes, h, w, oh, ow)
}
