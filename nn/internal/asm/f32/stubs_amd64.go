//go:build amd64 && !purego

package f32

import (
	"unsafe"

	"golang.org/x/sys/cpu"
)

// useAsm reports whether the CPU runs the assembly kernels, which need AVX2
// and FMA. It is the only place the package reads CPU features.
var useAsm = cpu.X86.HasAVX2 && cpu.X86.HasFMA

// useAVX512 reports whether the tile kernels that have an AVX-512 form run
// it: on a CPU with AVX-512F besides AVX2 and FMA. The forms store the bits
// of the AVX2 ones.
var useAVX512 = useAsm && cpu.X86.HasAVX512F

// Asm reports whether the kernels run in assembly: on amd64 with AVX2 and
// FMA.
func Asm() bool { return useAsm }

// Gemm6x16 stores the 6×16 tile c[r·ldc+j] = alpha·Σ_p a[6p+r]·b[16p+j] +
// beta·c[r·ldc+j] from kc ≥ 1 packed 6-float columns of A and 16-float rows
// of B, each sum one chain of fused multiply-adds in the order of p; c is
// not read when beta is 0.
func Gemm6x16(kc int, a, b, c *float32, ldc int, alpha, beta float32) {
	if useAVX512 {
		gemm6x16Avx512(kc, a, b, c, ldc, alpha, beta)
		return
	}
	if useAsm {
		gemm6x16Asm(kc, a, b, c, ldc, alpha, beta)
		return
	}
	gemm6x16(kc, a, b, c, ldc, alpha, beta)
}

// Gemm6x16Strided is Gemm6x16 with element (r, p) of A read in place at
// a[r·rs + p·ps]; it stores the bits Gemm6x16 stores for the packed strip.
func Gemm6x16Strided(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32) {
	if useAVX512 {
		gemm6x16StridedAvx512(kc, a, rs, ps, b, c, ldc, alpha, beta)
		return
	}
	if useAsm {
		gemm6x16StridedAsm(kc, a, rs, ps, b, c, ldc, alpha, beta)
		return
	}
	gemm6x16Strided(kc, a, rs, ps, b, c, ldc, alpha, beta)
}

// Gemm6x32Strided is Gemm6x16Strided on two packed strips of B side by
// side: it stores the 6×32 tile whose columns j < 16 are Gemm6x16Strided
// with B at b0 and whose columns j ≥ 16 are Gemm6x16Strided with B at b1,
// with the bits of those two calls.
func Gemm6x32Strided(kc int, a *float32, rs, ps int, b0, b1, c *float32, ldc int, alpha, beta float32) {
	if useAVX512 {
		gemm6x32StridedAvx512(kc, a, rs, ps, b0, b1, c, ldc, alpha, beta)
		return
	}
	Gemm6x16Strided(kc, a, rs, ps, b0, c, ldc, alpha, beta)
	Gemm6x16Strided(kc, a, rs, ps, b1, (*float32)(unsafe.Add(unsafe.Pointer(c), 16*4)), ldc, alpha, beta)
}

// Gemm6x32Bias stores the 6×32 tile of Gemm6x32Strided (alpha = 1, beta
// = 0) plus a bias row and an optional Relu, the epilogue of a dense layer:
// c[r·ldc+j] = T[r][j] + bias[j], rounded once (T[r][j] when bias is nil),
// then max(·, 0) with Go's max when relu. These are the bits of
// Gemm6x32Strided with beta = 1 on a C holding the bias rows, followed by
// Relu, without reading C.
func Gemm6x32Bias(kc int, a *float32, rs, ps int, b0, b1, c *float32, ldc int, bias *float32, relu bool) {
	if useAVX512 {
		gemm6x32BiasAvx512(kc, a, rs, ps, b0, b1, c, ldc, bias, relu)
		return
	}
	gemm6x32Bias(kc, a, rs, ps, b0, b1, c, ldc, bias, relu)
}

// Gemm6x16Edge is Gemm6x16Strided for the bottom edge of C: it reads and
// stores only rows r < mr (1 ≤ mr ≤ 6) of c, with the bits of a full tile,
// and reads all six rows of A.
func Gemm6x16Edge(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32, mr int) {
	if useAsm {
		gemm6x16EdgeAsm(kc, a, rs, ps, b, c, ldc, alpha, beta, mr)
		return
	}
	gemm6x16Edge(kc, a, rs, ps, b, c, ldc, alpha, beta, mr)
}

// Gemm1x32 stores the row c[j] = alpha·Σ_p a[p·inca]·b[p·ldb+j] +
// beta·c[j], j < 32, reading A and B in place, each sum the chain of fused
// multiply-adds Gemm6x16 forms; c is not read when beta is 0.
func Gemm1x32(kc int, a *float32, inca int, b *float32, ldb int, c *float32, alpha, beta float32) {
	if useAsm {
		gemm1x32Asm(kc, a, inca, b, ldb, c, alpha, beta)
		return
	}
	gemm1x32(kc, a, inca, b, ldb, c, alpha, beta)
}

// Gemm1x128 is Gemm1x32 on 128 columns: c[j], j < 128, each the chain and
// the bits Gemm1x32 gives it, the four blocks of 32 computed together on
// AVX-512.
func Gemm1x128(kc int, a *float32, inca int, b *float32, ldb int, c *float32, alpha, beta float32) {
	if useAVX512 {
		gemm1x128Avx512(kc, a, inca, b, ldb, c, alpha, beta)
		return
	}
	for j := 0; j < 128; j += 32 {
		Gemm1x32(kc, a, inca, (*float32)(unsafe.Add(unsafe.Pointer(b), 4*j)), ldb, (*float32)(unsafe.Add(unsafe.Pointer(c), 4*j)), alpha, beta)
	}
}

// Conv6x16 is Gemm6x16 with row p of B read in place at b[off[p]] and an
// epilogue for a convolution: it stores c[r·ldc+j] = T[r][j] + bias[r] with
// one rounding (the bits of Gemm6x16 with beta 1 on a tile filled with the
// bias), or T[r][j] when bias is nil; c is never read.
func Conv6x16(kc int, a, b *float32, off *int32, c *float32, ldc int, bias *float32) {
	if useAVX512 {
		conv6x16Avx512(kc, a, b, off, c, ldc, bias)
		return
	}
	if useAsm {
		conv6x16Asm(kc, a, b, off, c, ldc, bias)
		return
	}
	conv6x16(kc, a, b, off, c, ldc, bias)
}

// Conv6x32 is Conv6x16 on two strips of B side by side: it stores the 6×32
// tile whose columns j < 16 are Conv6x16 with B at b0 and whose columns
// j ≥ 16 are Conv6x16 with B at b1 (the same offsets), each element the
// same chain and store, so the bits of two Conv6x16 calls.
func Conv6x32(kc int, a, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32) {
	if useAVX512 {
		conv6x32Avx512(kc, a, b0, b1, off, c, ldc, bias)
		return
	}
	if useAsm {
		conv6x16Asm(kc, a, b0, off, c, ldc, bias)
		conv6x16Asm(kc, a, b1, off, (*float32)(unsafe.Add(unsafe.Pointer(c), 16*4)), ldc, bias)
		return
	}
	conv6x32(kc, a, b0, b1, off, c, ldc, bias)
}

// Conv4x32 is Conv6x32 for the last rows of a product: it stores rows
// r < 4 of the tile alone, with the bits Conv6x32 stores there. A keeps its
// 6-float columns; bias[4], bias[5] and rows 4 and 5 of c are not touched.
func Conv4x32(kc int, a, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32) {
	if useAVX512 {
		conv4x32Avx512(kc, a, b0, b1, off, c, ldc, bias)
		return
	}
	if useAsm {
		var t tile6x32
		var b6 [6]float32
		Conv6x32(kc, a, b0, b1, off, &t[0], 32, bias6(bias, &b6))
		store4x32(&t, c, ldc)
		return
	}
	conv4x32(kc, a, b0, b1, off, c, ldc, bias)
}

// WideTiles reports whether the 32-wide tiles (Conv6x32, Conv4x32,
// Conv8x32, Gemm6x32Strided) and Conv1x128 run kernels of their own (the
// AVX-512 forms), so that blocks of 4 rows cost 4 rows and a wide tile
// beats two narrow ones; elsewhere they run the 6×16 kernels.
func WideTiles() bool { return useAVX512 }

// Conv8x32 is Conv4x32 on two strips of A: it stores the 8×32 tile whose
// rows r < 4 are Conv4x32 with A at a0 and rows r ≥ 4 Conv4x32 with A at
// a1 (each strip in 6-float columns, its first four rows used) and bias
// from bias[4], with the bits of those two calls.
func Conv8x32(kc int, a0, a1, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32) {
	if useAVX512 {
		conv8x32Avx512(kc, a0, a1, b0, b1, off, c, ldc, bias)
		return
	}
	Conv4x32(kc, a0, b0, b1, off, c, ldc, bias)
	Conv4x32(kc, a1, b0, b1, off, (*float32)(unsafe.Add(unsafe.Pointer(c), 4*ldc*4)), ldc, biasAdd(bias, 4))
}

// Conv1x128 is Conv6x16 for one row over 128 positions: it stores
// c[j] = Σ_p a[6p]·b[off[p]+j] (+ bias[0]), j < 128, the chains and store
// of row 0 of Conv6x16 on the eight strips of 16 at b, b+16, …; A keeps its
// 6-float columns, of which it reads the first; kc ≥ 1. Only its AVX-512
// form is fast: callers check f32.WideTiles first.
func Conv1x128(kc int, a, b *float32, off *int32, c *float32, bias *float32) {
	if useAVX512 {
		conv1x128Avx512(kc, a, b, off, c, bias)
		return
	}
	conv1x128(kc, a, b, off, c, bias)
}

// Transpose8x8 stores the transpose of the 8×8 block src[r·lds+c] at
// dst[c·ldd+r].
func Transpose8x8(src *float32, lds int, dst *float32, ldd int) {
	if useAsm {
		transpose8x8Asm(src, lds, dst, ldd)
		return
	}
	transpose8x8(src, lds, dst, ldd)
}

// CopyRows16 copies rows ≥ 1 runs of 16 floats from src[r·lds] to dst[16r].
func CopyRows16(src *float32, lds int, dst *float32, rows int) {
	if useAsm {
		copyRows16Asm(src, lds, dst, rows)
		return
	}
	copyRows16(src, lds, dst, rows)
}

// CopyRows copies rows runs of w floats from src (rows lds apart) to dst
// (rows ldd apart).
func CopyRows(dst *float32, ldd int, src *float32, lds int, rows, w int) {
	if useAsm {
		copyRowsAsm(dst, ldd, src, lds, rows, w)
		return
	}
	copyRows(dst, ldd, src, lds, rows, w)
}

// Relu stores y[i] = max(x[i], 0) with Go's max (NaN stays NaN, −0 gives
// +0) for i < len(x); y must be at least as long as x.
func Relu(y, x []float32) {
	y = y[:len(x)]
	n := 0
	if useAsm {
		if n = len(x) &^ 7; n > 0 {
			reluAsm(&y[0], &x[0], n)
		}
	}
	relu(y[n:], x[n:])
}

// ReluGrad stores d[i] = dy[i] where x[i] > 0 and +0 elsewhere (NaN
// included) for i < len(x); d and dy must be at least as long as x.
func ReluGrad(d, x, dy []float32) {
	d, dy = d[:len(x)], dy[:len(x)]
	n := 0
	if useAsm {
		if n = len(x) &^ 7; n > 0 {
			reluGradAsm(&d[0], &x[0], &dy[0], n)
		}
	}
	reluGrad(d[n:], x[n:], dy[n:])
}

// ReluGradRows is ReluGrad on rows runs of w floats: it stores
// dst[r·ldd+j] = dy[r·lds+j] where x[r·lds+j] > 0 and +0 elsewhere, x and
// dy laid out alike, as CopyRows copies them.
func ReluGradRows(dst *float32, ldd int, x, dy *float32, lds int, rows, w int) {
	if useAsm {
		reluGradRowsAsm(dst, ldd, x, dy, lds, rows, w)
		return
	}
	reluGradRows(dst, ldd, x, dy, lds, rows, w)
}

// Widen stores dst[i] = float64(src[i]) (exact) for i < len(src); dst
// must be at least as long as src.
func Widen(dst []float64, src []float32) {
	dst = dst[:len(src)]
	n := 0
	if useAsm {
		if n = len(src) &^ 7; n > 0 {
			widenAsm(&dst[0], &src[0], n)
		}
	}
	widen(dst[n:], src[n:])
}

// Narrow stores dst[i] = float32(src[i]), rounded to nearest, ties to
// even, as Go converts, for i < len(src); dst must be at least as long as
// src.
func Narrow(dst []float32, src []float64) {
	dst = dst[:len(src)]
	n := 0
	if useAsm {
		if n = len(src) &^ 7; n > 0 {
			narrowAsm(&dst[0], &src[0], n)
		}
	}
	narrow(dst[n:], src[n:])
}

// LerpNarrow stores dst[i] = float32(u[i] + a·d[i]) for i < len(u), the
// product and the sum each rounded to float64 (never fused), then rounded
// to float32: a point u + a·d of a straight path in float64, given to a
// float32 network. d and dst must be at least as long as u.
func LerpNarrow(dst []float32, u, d []float64, a float64) {
	dst, d = dst[:len(u)], d[:len(u)]
	n := 0
	if useAsm {
		if n = len(u) &^ 7; n > 0 {
			lerpNarrowAsm(&dst[0], &u[0], &d[0], a, n)
		}
	}
	lerpNarrow(dst[n:], u[n:], d[n:], a)
}

// AddScaledWiden adds w·float64(x[i]) to dst[i] for i < len(x), the
// product and the sum each rounded to float64 (never fused): a weighted
// sum of float32 rows kept in float64. dst must be at least as long as x.
func AddScaledWiden(dst []float64, w float64, x []float32) {
	dst = dst[:len(x)]
	n := 0
	if useAsm {
		if n = len(x) &^ 7; n > 0 {
			addScaledWidenAsm(&dst[0], w, &x[0], n)
		}
	}
	addScaledWiden(dst[n:], w, x[n:])
}

// AddTo adds src[i] to dst[i] for i < len(src); dst must be at least as
// long as src.
func AddTo(dst, src []float32) {
	dst = dst[:len(src)]
	n := 0
	if useAsm {
		if n = len(src) &^ 7; n > 0 {
			addToAsm(&dst[0], &src[0], n)
		}
	}
	addTo(dst[n:], src[n:])
}

// Lerp stores dst[i] = lo[i] + f·(hi[i] − lo[i]) for i < len(lo), the
// difference, the product and the sum each rounded to float32 (never
// fused): the value at f of a quantity affine between two points. hi and
// dst must be at least as long as lo.
func Lerp(dst, lo, hi []float32, f float32) {
	dst, hi = dst[:len(lo)], hi[:len(lo)]
	n := 0
	if useAsm {
		if n = len(lo) &^ 7; n > 0 {
			lerpAsm(&dst[0], &lo[0], &hi[0], f, n)
		}
	}
	lerp(dst[n:], lo[n:], hi[n:], f)
}

// ReluGradMidAdd adds dy[i] to dst[i] where a[i] + b[i] > 0 (NaN not)
// for i < len(a): a Relu's input gradient on a segment whose ends' inputs
// are a and b, read at its midpoint. b, dy and dst must be at least as
// long as a.
func ReluGradMidAdd(dst, a, b, dy []float32) {
	dst, b, dy = dst[:len(a)], b[:len(a)], dy[:len(a)]
	n := 0
	if useAsm {
		if n = len(a) &^ 7; n > 0 {
			reluGradMidAddAsm(&dst[0], &a[0], &b[0], &dy[0], n)
		}
	}
	reluGradMidAdd(dst[n:], a[n:], b[n:], dy[n:])
}

// MaxPool2x2 stores, for each of planes planes of h×w in x, the 2×2
// stride-2 max pool of its top-left 2·oh×2·ow corner in the plane of oh×ow
// in y: the first NaN of each window if it has one, else its first maximal
// element in row-major order.
func MaxPool2x2(x, y []float32, planes, h, w, oh, ow int) {
	if useAsm && maxPoolFits(len(x), len(y), planes, h, w, oh, ow) && !maxPool2x2Asm(&x[0], &y[0], planes, h, w, oh, ow) {
		return
	}
	maxPool2x2(x, y, planes, h, w, oh, ow)
}

// MaxPool2x2Grad stores the gradient of MaxPool2x2 into the covered part
// of dx (rows < 2·oh, columns < 2·ow of each plane, laid out like x):
// 0 + dy at the window's element MaxPool2x2 picks, +0 at the others.
func MaxPool2x2Grad(x, dy, dx []float32, planes, h, w, oh, ow int) {
	if useAsm && maxPoolFits(len(x), len(dy), planes, h, w, oh, ow) && len(dx) >= len(x) && !maxPool2x2GradAsm(&x[0], &dy[0], &dx[0], planes, h, w, oh, ow) {
		return
	}
	maxPool2x2Grad(x, dy, dx, planes, h, w, oh, ow)
}

// maxPoolFits checks the conditions of the pooling assembly, so that it
// never reads or writes outside the slices.
func maxPoolFits(nx, ny, planes, h, w, oh, ow int) bool {
	return planes >= 1 && oh >= 1 && ow >= 4 && 2*ow <= w && 2*oh <= h &&
		nx >= planes*h*w && ny >= planes*oh*ow
}

// gemm6x16Asm is
//
//	for r := 0; r < 6; r++ {
//		for j := 0; j < 16; j++ {
//			var t float32
//			for p := 0; p < kc; p++ {
//				t = fma(a[6*p+r], b[16*p+j], t)
//			}
//			if alpha != 1 {
//				t *= alpha
//			}
//			if beta != 0 {
//				t = fma(beta, c[r*ldc+j], t)
//			}
//			c[r*ldc+j] = t
//		}
//	}
//
//go:noescape
func gemm6x16Asm(kc int, a, b, c *float32, ldc int, alpha, beta float32)

// gemm6x16StridedAsm is gemm6x16Asm with a[r*rs+p*ps] in place of a[6*p+r].
//
//go:noescape
func gemm6x16StridedAsm(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32)

// gemm6x16EdgeAsm is gemm6x16StridedAsm with r < mr in place of r < 6.
//
//go:noescape
func gemm6x16EdgeAsm(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32, mr int)

// gemm1x32Asm is
//
//	for j := 0; j < 32; j++ {
//		var t float32
//		for p := 0; p < kc; p++ {
//			t = fma(a[p*inca], b[p*ldb+j], t)
//		}
//		t *= alpha
//		if beta != 0 {
//			t = fma(beta, c[j], t)
//		}
//		c[j] = t
//	}
//
//go:noescape
func gemm1x32Asm(kc int, a *float32, inca int, b *float32, ldb int, c *float32, alpha, beta float32)

// conv6x16Asm is
//
//	for r := 0; r < 6; r++ {
//		for j := 0; j < 16; j++ {
//			var t float32
//			for p := 0; p < kc; p++ {
//				t = fma(a[6*p+r], b[off[p]+j], t)
//			}
//			if bias != nil {
//				t += bias[r]
//			}
//			c[r*ldc+j] = t
//		}
//	}
//
//go:noescape
func conv6x16Asm(kc int, a, b *float32, off *int32, c *float32, ldc int, bias *float32)

// transpose8x8Asm is
//
//	for r := 0; r < 8; r++ {
//		for c := 0; c < 8; c++ {
//			dst[c*ldd+r] = src[r*lds+c]
//		}
//	}
//
//go:noescape
func transpose8x8Asm(src *float32, lds int, dst *float32, ldd int)

// copyRows16Asm is
//
//	for r := 0; r < rows; r++ {
//		copy(dst[16*r:16*r+16], src[r*lds:r*lds+16])
//	}
//
//go:noescape
func copyRows16Asm(src *float32, lds int, dst *float32, rows int)

// copyRowsAsm is
//
//	for r := 0; r < rows; r++ {
//		copy(dst[r*ldd:r*ldd+w], src[r*lds:r*lds+w])
//	}
//
//go:noescape
func copyRowsAsm(dst *float32, ldd int, src *float32, lds int, rows, w int)

// reluAsm is, for n a multiple of 8,
//
//	for i := 0; i < n; i++ {
//		y[i] = max(x[i], 0)
//	}
//
//go:noescape
func reluAsm(y, x *float32, n int)

// reluGradAsm is, for n a multiple of 8,
//
//	for i := 0; i < n; i++ {
//		if x[i] > 0 {
//			d[i] = dy[i]
//		} else {
//			d[i] = 0
//		}
//	}
//
//go:noescape
func reluGradAsm(d, x, dy *float32, n int)

// reluGradRowsAsm is
//
//	for r := 0; r < rows; r++ {
//		for j := 0; j < w; j++ {
//			if x[r*lds+j] > 0 {
//				dst[r*ldd+j] = dy[r*lds+j]
//			} else {
//				dst[r*ldd+j] = 0
//			}
//		}
//	}
//
//go:noescape
func reluGradRowsAsm(dst *float32, ldd int, x, dy *float32, lds int, rows, w int)

// widenAsm is, for n a multiple of 8,
//
//	for i := 0; i < n; i++ {
//		dst[i] = float64(src[i])
//	}
//
//go:noescape
func widenAsm(dst *float64, src *float32, n int)

// narrowAsm is, for n a multiple of 8,
//
//	for i := 0; i < n; i++ {
//		dst[i] = float32(src[i])
//	}
//
//go:noescape
func narrowAsm(dst *float32, src *float64, n int)

// lerpNarrowAsm is, for n a multiple of 8,
//
//	for i := 0; i < n; i++ {
//		dst[i] = float32(u[i] + float64(a*d[i]))
//	}
//
//go:noescape
func lerpNarrowAsm(dst *float32, u, d *float64, a float64, n int)

// addScaledWidenAsm is, for n a multiple of 8,
//
//	for i := 0; i < n; i++ {
//		dst[i] += float64(w * float64(x[i]))
//	}
//
//go:noescape
func addScaledWidenAsm(dst *float64, w float64, x *float32, n int)

// addToAsm is, for n a multiple of 8,
//
//	for i := 0; i < n; i++ {
//		dst[i] += src[i]
//	}
//
//go:noescape
func addToAsm(dst, src *float32, n int)

// lerpAsm is, for n a multiple of 8,
//
//	for i := 0; i < n; i++ {
//		dst[i] = lo[i] + float32(f*(hi[i]-lo[i]))
//	}
//
//go:noescape
func lerpAsm(dst, lo, hi *float32, f float32, n int)

// reluGradMidAddAsm is, for n a multiple of 8,
//
//	for i := 0; i < n; i++ {
//		if a[i]+b[i] > 0 {
//			dst[i] += dy[i]
//		}
//	}
//
//go:noescape
func reluGradMidAddAsm(dst, a, b, dy *float32, n int)

// maxPool2x2Asm is, when x holds no NaN and maxPoolFits holds,
//
//	for pl := 0; pl < planes; pl++ {
//		for i := 0; i < oh; i++ {
//			for j := 0; j < ow; j++ {
//				q := pl*h*w + 2*i*w + 2*j
//				win := [4]float32{x[q], x[q+1], x[q+w], x[q+w+1]}
//				y[(pl*oh+i)*ow+j] = win[firstMax4(win[0], win[1], win[2], win[3])]
//			}
//		}
//	}
//
// and reports false. When a window holds a NaN it reports true, with y
// incomplete.
//
//go:noescape
func maxPool2x2Asm(x, y *float32, planes, h, w, oh, ow int) bool

// maxPool2x2GradAsm is, when x holds no NaN and maxPoolFits holds,
//
//	for pl := 0; pl < planes; pl++ {
//		for i := 0; i < oh; i++ {
//			for j := 0; j < ow; j++ {
//				q := pl*h*w + 2*i*w + 2*j
//				win := [4]int{q, q + 1, q + w, q + w + 1}
//				k := firstMax4(x[q], x[q+1], x[q+w], x[q+w+1])
//				for _, e := range win {
//					dx[e] = 0
//				}
//				dx[win[k]] = 0 + dy[(pl*oh+i)*ow+j]
//			}
//		}
//	}
//
// and reports false. When a window holds a NaN it reports true, with dx
// incomplete.
//
//go:noescape
func maxPool2x2GradAsm(x, dy, dx *float32, planes, h, w, oh, ow int) bool

// gemm6x16Avx512 is gemm6x16Asm on AVX-512 (one ZMM register per tile row,
// A broadcast from memory into the fused multiply-adds): the same loop, the
// same bits.
//
//go:noescape
func gemm6x16Avx512(kc int, a, b, c *float32, ldc int, alpha, beta float32)

// gemm6x16StridedAvx512 is gemm6x16StridedAsm on AVX-512: the same loop,
// the same bits.
//
//go:noescape
func gemm6x16StridedAvx512(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32)

// conv6x16Avx512 is conv6x16Asm on AVX-512: the same loop, the same bits.
//
//go:noescape
func conv6x16Avx512(kc int, a, b *float32, off *int32, c *float32, ldc int, bias *float32)

// conv6x32Avx512 is, on AVX-512 (the tile in twelve ZMM registers, two
// per row, so twelve independent chains keep both FMA units busy),
//
//	for r := 0; r < 6; r++ {
//		for j := 0; j < 32; j++ {
//			b, jb := b0, j
//			if j >= 16 {
//				b, jb = b1, j-16
//			}
//			var t float32
//			for p := 0; p < kc; p++ {
//				t = fma(a[6*p+r], b[off[p]+jb], t)
//			}
//			if bias != nil {
//				t += bias[r]
//			}
//			c[r*ldc+j] = t
//		}
//	}
//
//go:noescape
func conv6x32Avx512(kc int, a, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32)

// conv4x32Avx512 is conv6x32Avx512 with r < 4 in place of r < 6: eight
// chains, still enough to keep both FMA units busy.
//
//go:noescape
func conv4x32Avx512(kc int, a, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32)

// conv8x32Avx512 is conv4x32Avx512 on two strips of A at once, rows 0..3
// from a0 and 4..7 from a1: sixteen chains.
//
//go:noescape
func conv8x32Avx512(kc int, a0, a1, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32)

// conv1x128Avx512 is, on AVX-512 (eight ZMM chains, B read by the fused
// multiply-adds, each element of A broadcast once),
//
//	for j := 0; j < 128; j++ {
//		var t float32
//		for p := 0; p < kc; p++ {
//			t = fma(a[6*p], b[off[p]+j], t)
//		}
//		if bias != nil {
//			t += bias[0]
//		}
//		c[j] = t
//	}
//
//go:noescape
func conv1x128Avx512(kc int, a, b *float32, off *int32, c *float32, bias *float32)

// gemm6x32StridedAvx512 is gemm6x16StridedAvx512 on two strips of B at
// once (twelve chains): the same loop for each, the same bits.
//
//go:noescape
func gemm6x32StridedAvx512(kc int, a *float32, rs, ps int, b0, b1, c *float32, ldc int, alpha, beta float32)

// gemm6x32BiasAvx512 is gemm6x32Bias on AVX-512: the chains of
// gemm6x32StridedAvx512, the bias row added with one rounding, the Relu of
// reluAsm.
//
//go:noescape
func gemm6x32BiasAvx512(kc int, a *float32, rs, ps int, b0, b1, c *float32, ldc int, bias *float32, relu bool)

// gemm1x128Avx512 is gemm1x32Asm on four blocks of 32 columns at once, on
// AVX-512.
//
//go:noescape
func gemm1x128Avx512(kc int, a *float32, inca int, b *float32, ldb int, c *float32, alpha, beta float32)
