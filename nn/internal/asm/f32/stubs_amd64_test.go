//go:build amd64 && !purego

package f32

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/apportion/apportion/internal/cpupeak"

	"github.com/stretchr/testify/require"
)

func TestMaxPool2x2AsmNaN(t *testing.T) {
	// The pooling assembly reports a NaN (IEEE 754 quiet or signalling bit
	// pattern) wherever it sits, including in the steps that overlap at
	// the end of a row, and reports none on finite inputs.
	if !useAsm {
		t.Skip("no AVX2 and FMA on this CPU")
	}
	for _, ow := range []int{4, 6, 8, 11, 16} {
		h, w, oh := 5, 2*ow+1, 2
		x := make([]float32, 2*h*w)
		for i := range x {
			x[i] = float32(i % 7)
		}
		y := make([]float32, 2*oh*ow)
		dy := make([]float32, len(y))
		dx := make([]float32, len(x))
		require.True(t, maxPoolFits(len(x), len(y), 2, h, w, oh, ow))
		require.False(t, maxPool2x2Asm(&x[0], &y[0], 2, h, w, oh, ow))
		require.False(t, maxPool2x2GradAsm(&x[0], &dy[0], &dx[0], 2, h, w, oh, ow))
		for _, bits := range []uint32{0x7fc00000, 0xffc00001, 0x7f800001} {
			for p := range x {
				if row, col := (p%(h*w))/w, p%w; row >= 2*oh || col >= 2*ow {
					continue // outside every window: never read
				}
				old := x[p]
				x[p] = math.Float32frombits(bits)
				require.True(t, maxPool2x2Asm(&x[0], &y[0], 2, h, w, oh, ow), "ow %d NaN at %d", ow, p)
				require.True(t, maxPool2x2GradAsm(&x[0], &dy[0], &dx[0], 2, h, w, oh, ow), "ow %d NaN at %d", ow, p)
				x[p] = old
			}
		}
	}
}

func TestGemm6x16FormsMatchLoop(t *testing.T) {
	// Both assembly forms of the packed tile, AVX2 (gemm6x16Asm) and
	// AVX-512 (gemm6x16Avx512), each called directly whichever one Gemm6x16
	// dispatches to, store the bits of the loop: one chain of fused
	// multiply-adds per element in the order of p (IEEE 754-2008 fusedMultiplyAdd,
	// emulated exactly by the loop; TestGemmLoopsMatchExactChains checks
	// the loop against math/big).
	if !useAsm {
		t.Skip("no AVX2 and FMA on this CPU")
	}
	rng := rand.New(rand.NewPCG(5, 6))
	for _, tc := range tileCases() {
		kc := tc.kc
		a, b := randFloats(rng, 6*kc), randFloats(rng, 16*kc)
		const ldc = 19
		c0 := randFloats(rng, 6*ldc)
		want := append([]float32(nil), c0...)
		gemm6x16(kc, &a[0], &b[0], &want[0], ldc, tc.alpha, tc.beta)
		got := append([]float32(nil), c0...)
		gemm6x16Asm(kc, &a[0], &b[0], &got[0], ldc, tc.alpha, tc.beta)
		requireBits(t, want, got, "AVX2 kc=%d alpha=%v beta=%v", kc, tc.alpha, tc.beta)
		if !useAVX512 {
			continue
		}
		got = append([]float32(nil), c0...)
		gemm6x16Avx512(kc, &a[0], &b[0], &got[0], ldc, tc.alpha, tc.beta)
		requireBits(t, want, got, "AVX-512 kc=%d alpha=%v beta=%v", kc, tc.alpha, tc.beta)
	}
}

func TestGemm6x16StridedFormsMatchLoop(t *testing.T) {
	// The strided tile in both assembly forms, A read in place by rows
	// (rs = lda, ps = 1) and by columns (rs = 1, ps = lda), stores the
	// bits of its loop (see TestGemm6x16FormsMatchLoop).
	if !useAsm {
		t.Skip("no AVX2 and FMA on this CPU")
	}
	rng := rand.New(rand.NewPCG(7, 8))
	for _, tc := range tileCases() {
		kc := tc.kc
		b := randFloats(rng, 16*kc)
		const ldc = 17
		c0 := randFloats(rng, 6*ldc)
		for _, layout := range []struct{ rs, ps, n int }{{kc + 3, 1, 6 * (kc + 3)}, {1, 9, 9 * kc}} {
			a := randFloats(rng, layout.n)
			want := append([]float32(nil), c0...)
			gemm6x16Strided(kc, &a[0], layout.rs, layout.ps, &b[0], &want[0], ldc, tc.alpha, tc.beta)
			got := append([]float32(nil), c0...)
			gemm6x16StridedAsm(kc, &a[0], layout.rs, layout.ps, &b[0], &got[0], ldc, tc.alpha, tc.beta)
			requireBits(t, want, got, "AVX2 kc=%d rs=%d alpha=%v beta=%v", kc, layout.rs, tc.alpha, tc.beta)
			if !useAVX512 {
				continue
			}
			got = append([]float32(nil), c0...)
			gemm6x16StridedAvx512(kc, &a[0], layout.rs, layout.ps, &b[0], &got[0], ldc, tc.alpha, tc.beta)
			requireBits(t, want, got, "AVX-512 kc=%d rs=%d alpha=%v beta=%v", kc, layout.rs, tc.alpha, tc.beta)
		}
	}
}

// BenchmarkGemm6x16Forms times the AVX2 and AVX-512 forms of the packed
// tile side by side on panels that stay in L1, at the k depths of the
// models' products; the dispatch prefers AVX-512 because it measures faster.
func BenchmarkGemm6x16Forms(b *testing.B) {
	if !useAVX512 {
		b.Skip("no AVX-512 on this CPU")
	}
	rng := rand.New(rand.NewPCG(11, 12))
	for _, kc := range []int{30, 64, 256} {
		a := randFloats(rng, 6*kc)
		p := randFloats(rng, 16*kc)
		var c [6 * 16]float32
		for _, f := range []struct {
			name string
			fn   func(kc int, a, b, c *float32, ldc int, alpha, beta float32)
		}{{"avx2", gemm6x16Asm}, {"avx512", gemm6x16Avx512},
			{"avx2-strided", func(kc int, a, b, c *float32, ldc int, alpha, beta float32) {
				gemm6x16StridedAsm(kc, a, 1, 6, b, c, ldc, alpha, beta)
			}},
			{"avx512-strided", func(kc int, a, b, c *float32, ldc int, alpha, beta float32) {
				gemm6x16StridedAvx512(kc, a, 1, 6, b, c, ldc, alpha, beta)
			}}} {
			b.Run(fmt.Sprintf("kc=%d/%s", kc, f.name), func(b *testing.B) {
				cpupeak.Bench(b, 2*float64(6*16*kc), func() { f.fn(kc, &a[0], &p[0], &c[0], 16, 1, 1) })
			})
		}
	}
}

// convForm is one implementation of the convolution tile.
type convForm struct {
	name string
	fn   func(kc int, a, b *float32, off *int32, c *float32, ldc int, bias *float32)
}

// convForms are the convolution tile's dispatch and each assembly form
// this CPU runs, called directly whichever one Conv6x16 picks.
func convForms() []convForm {
	forms := []convForm{{"Conv6x16", Conv6x16}}
	if useAsm {
		forms = append(forms, convForm{"AVX2", conv6x16Asm})
	}
	if useAVX512 {
		forms = append(forms, convForm{"AVX-512", conv6x16Avx512})
	}
	return forms
}

// wideConvForm is one implementation of a 32-wide convolution tile that
// stores the first rows rows of the 6×32 tile.
type wideConvForm struct {
	name string
	rows int
	fn   func(kc int, a, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32)
}

// wideConvForms are the 32-wide tiles' dispatches and their AVX-512
// forms, called directly whichever one Conv6x32 and Conv4x32 pick.
func wideConvForms() []wideConvForm {
	forms := []wideConvForm{{"Conv6x32", 6, Conv6x32}, {"Conv4x32", 4, Conv4x32}}
	if useAVX512 {
		forms = append(forms, wideConvForm{"AVX-512 6x32", 6, conv6x32Avx512}, wideConvForm{"AVX-512 4x32", 4, conv4x32Avx512})
	}
	return forms
}

// BenchmarkConvTileForms times 32 output positions of the convolution tile
// on AVX-512, as two 6×16 tiles and as one 6×32 tile, and 16 output
// channels as 6×32, 6×32 and 4×32 tiles or as two 8×32 tiles, B read through the
// offsets of a 3×3 kernel over a 34-wide padded image that stays in L1, at
// the k depths of the cnn models (3, 16 and 32 input channels).
func BenchmarkConvTileForms(b *testing.B) {
	if !useAVX512 {
		b.Skip("no AVX-512 on this CPU")
	}
	rng := rand.New(rand.NewPCG(13, 14))
	const wp, hp = 34, 3
	for _, c := range []int{3, 16, 32} {
		kc := 9 * c
		a := randFloats(rng, 6*kc)
		x := randFloats(rng, c*hp*wp+wp)
		off := make([]int32, 0, kc)
		for ci := 0; ci < c; ci++ {
			for i := 0; i < 3; i++ {
				for j := 0; j < 3; j++ {
					off = append(off, int32(ci*hp*wp+i*wp+j))
				}
			}
		}
		var t [6 * 32]float32
		flops := 2 * float64(6*32*kc)
		b.Run(fmt.Sprintf("kc=%d/6x16", kc), func(b *testing.B) {
			cpupeak.Bench(b, flops, func() {
				conv6x16Avx512(kc, &a[0], &x[0], &off[0], &t[0], 32, nil)
				conv6x16Avx512(kc, &a[0], &x[16], &off[0], &t[16], 32, nil)
			})
		})
		b.Run(fmt.Sprintf("kc=%d/6x32", kc), func(b *testing.B) {
			cpupeak.Bench(b, flops, func() { conv6x32Avx512(kc, &a[0], &x[0], &x[16], &off[0], &t[0], 32, nil) })
		})
		// 16 output channels over 32 positions: 6 + 6 + 4 rows, or 8 + 8.
		var t16 [16 * 32]float32
		b.Run(fmt.Sprintf("kc=%d/16rows-6x32+6x32+4x32", kc), func(b *testing.B) {
			cpupeak.Bench(b, 2*float64(16*32*kc), func() {
				conv6x32Avx512(kc, &a[0], &x[0], &x[16], &off[0], &t16[0], 32, nil)
				conv6x32Avx512(kc, &a[0], &x[0], &x[16], &off[0], &t16[6*32], 32, nil)
				conv4x32Avx512(kc, &a[0], &x[0], &x[16], &off[0], &t16[12*32], 32, nil)
			})
		})
		b.Run(fmt.Sprintf("kc=%d/16rows-8x32+8x32", kc), func(b *testing.B) {
			cpupeak.Bench(b, 2*float64(16*32*kc), func() {
				conv8x32Avx512(kc, &a[0], &a[0], &x[0], &x[16], &off[0], &t16[0], 32, nil)
				conv8x32Avx512(kc, &a[0], &a[0], &x[0], &x[16], &off[0], &t16[8*32], 32, nil)
			})
		})
	}
}

// eightConvForms are the 8×32 tile's dispatch and its AVX-512 form.
func eightConvForms() map[string]func(kc int, a0, a1, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32) {
	forms := map[string]func(kc int, a0, a1, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32){"Conv8x32": Conv8x32}
	if useAVX512 {
		forms["AVX-512"] = conv8x32Avx512
	}
	return forms
}

// rowConvForms are the 1×128 tile's dispatch and its AVX-512 form.
func rowConvForms() map[string]func(kc int, a, b *float32, off *int32, c *float32, bias *float32) {
	forms := map[string]func(kc int, a, b *float32, off *int32, c *float32, bias *float32){"Conv1x128": Conv1x128}
	if useAVX512 {
		forms["AVX-512"] = conv1x128Avx512
	}
	return forms
}

// BenchmarkGemm6x32Strided times the AVX-512 6×32 tile at the k depths of
// the dense zoo models, on A packed in strips and on A read in place, with
// B's strips in L1, and sixteen calls down 96 rows of A accumulating into
// C (beta = 1) as the packed GEMM's inner loop makes them.
func BenchmarkGemm6x32Strided(b *testing.B) {
	if !useAVX512 {
		b.Skip("no AVX-512 on this CPU")
	}
	rng := rand.New(rand.NewPCG(15, 16))
	for _, kc := range []int{30, 64, 100, 256} {
		a := randFloats(rng, 96*kc)
		p := randFloats(rng, 32*kc)
		c := make([]float32, 96*256)
		flops := 2 * float64(6*32*kc)
		b.Run(fmt.Sprintf("kc=%d/packed", kc), func(b *testing.B) {
			cpupeak.Bench(b, flops, func() { gemm6x32StridedAvx512(kc, &a[0], 1, 6, &p[0], &p[16*kc], &c[0], 32, 1, 0) })
		})
		b.Run(fmt.Sprintf("kc=%d/in-place", kc), func(b *testing.B) {
			cpupeak.Bench(b, flops, func() { gemm6x32StridedAvx512(kc, &a[0], kc, 1, &p[0], &p[16*kc], &c[0], 32, 1, 0) })
		})
		b.Run(fmt.Sprintf("kc=%d/in-place-96rows-beta1", kc), func(b *testing.B) {
			cpupeak.Bench(b, 16*flops, func() {
				for ir := 0; ir < 96; ir += 6 {
					gemm6x32StridedAvx512(kc, &a[ir*kc], kc, 1, &p[0], &p[16*kc], &c[ir*256], 256, 1, 1)
				}
			})
		})
	}
}
