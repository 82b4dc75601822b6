package f32

import (
	"fmt"
	"math"
	"math/big"
	"math/rand/v2"
	"slices"
	"testing"

	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/cpupeak"
)

// The kernels run their assembly here when useAsm is set; every test below
// checks them against their loops (loops.go) bit for bit, and the loops
// against references outside this package.

func randFloats(rng *rand.Rand, n int) []float32 {
	s := make([]float32, n)
	for i := range s {
		s[i] = float32(rng.Float64()*2 - 1)
	}
	return s
}

// nanFloats returns n quiet NaNs: a kernel that reads them as old
// contents, or a check that finds one where a kernel should have stored,
// sees it (IEEE 754 propagates NaN).
func nanFloats(n int) []float32 {
	s := make([]float32, n)
	for i := range s {
		s[i] = float32(math.NaN())
	}
	return s
}

func requireBits(t *testing.T, want, got []float32, format string, args ...any) {
	t.Helper()
	for i := range want {
		if math.Float32bits(want[i]) != math.Float32bits(got[i]) {
			t.Fatalf("%s: element %d: got %v (%#x), want %v (%#x)", fmt.Sprintf(format, args...), i,
				got[i], math.Float32bits(got[i]), want[i], math.Float32bits(want[i]))
		}
	}
}

// exactFMA is x·y + z evaluated exactly with math/big and rounded once to
// the nearest float32, ties to even: the fusedMultiplyAdd of IEEE
// 754-2008, §5.4.1.
func exactFMA(x, y, z float32) float32 {
	p := new(big.Float).SetPrec(1000).SetFloat64(float64(x))
	p.Mul(p, new(big.Float).SetFloat64(float64(y)))
	p.Add(p, new(big.Float).SetFloat64(float64(z)))
	f, _ := p.Float32()
	return f
}

func TestFMAMatchesExactRounding(t *testing.T) {
	// fma against the exact product-sum rounded once (math/big), over
	// random operands whose exponents spread wide enough that the sum's
	// rounding falls anywhere from the top bit of the product to far
	// below it, including the ties that a plain float64 sum rounds twice.
	rng := rand.New(rand.NewPCG(1, 2))
	draw := func() float32 {
		m := float32(rng.Float64()*2 - 1)
		return float32(math.Ldexp(float64(m), rng.IntN(60)-30))
	}
	for i := 0; i < 200000; i++ {
		x, y, z := draw(), draw(), draw()
		if i%3 == 0 {
			// z cancels most of x·y: the sum keeps the product's low bits.
			z = -float32(float64(x) * float64(y))
		}
		want, got := exactFMA(x, y, z), fma(x, y, z)
		if math.Float32bits(want) != math.Float32bits(got) {
			t.Fatalf("fma(%g, %g, %g) = %g (%#x), exact rounding %g (%#x)", x, y, z, got, math.Float32bits(got), want, math.Float32bits(want))
		}
	}
	// (1 + 2⁻¹²)² + 2⁻⁸⁰ lies just above the midpoint 1 + 2⁻¹¹ + 2⁻²⁴ of two
	// float32 neighbours: rounded to float64 first, it lands on the
	// midpoint, and ties to even would then round it down.
	x := float32(1 + 0x1p-12)
	require.Equal(t, float32(1+0x1p-11+0x1p-23), fma(x, x, 0x1p-80), "no double rounding")
	require.Equal(t, float32(1+0x1p-11), float32(float64(x)*float64(x)+0x1p-80), "the double rounding fma avoids")
	require.True(t, math.IsInf(float64(fma(float32(math.Inf(1)), 2, 1)), 1))
	require.True(t, math.IsNaN(float64(fma(float32(math.Inf(1)), 0, 1))), "∞·0 is NaN (IEEE 754 §7.2)")
	require.Equal(t, uint32(0), math.Float32bits(fma(float32(math.Copysign(0, -1)), 1, 0)), "−0·1 + 0 is +0 in round to nearest (IEEE 754 §6.3)")
}

// tileCase is one set of operands for the 6×16 and 1×32 kernels.
type tileCase struct {
	kc          int
	alpha, beta float32
}

func tileCases() []tileCase {
	var cs []tileCase
	for _, kc := range []int{1, 2, 3, 4, 5, 27, 256, 300} {
		for _, alpha := range []float32{1, 0.75} {
			for _, beta := range []float32{0, 1, -0.5} {
				cs = append(cs, tileCase{kc, alpha, beta})
			}
		}
	}
	return cs
}

func TestGemmKernelsMatchLoops(t *testing.T) {
	t.Logf("assembly: %t", useAsm)
	rng := rand.New(rand.NewPCG(3, 4))
	for _, tc := range tileCases() {
		kc := tc.kc
		name := fmt.Sprintf("kc=%d alpha=%v beta=%v", kc, tc.alpha, tc.beta)
		a, b := randFloats(rng, 6*kc), randFloats(rng, 16*kc)
		const ldc = 21
		c0 := randFloats(rng, 6*ldc)
		got, want := append([]float32(nil), c0...), append([]float32(nil), c0...)
		Gemm6x16(kc, &a[0], &b[0], &got[0], ldc, tc.alpha, tc.beta)
		gemm6x16(kc, &a[0], &b[0], &want[0], ldc, tc.alpha, tc.beta)
		requireBits(t, want, got, "Gemm6x16 %s", name)

		// A strip read in place, rows kc+3 apart, and its transpose.
		lda := kc + 3
		as := randFloats(rng, 6*lda)
		got, want = append([]float32(nil), c0...), append([]float32(nil), c0...)
		Gemm6x16Strided(kc, &as[0], lda, 1, &b[0], &got[0], ldc, tc.alpha, tc.beta)
		gemm6x16Strided(kc, &as[0], lda, 1, &b[0], &want[0], ldc, tc.alpha, tc.beta)
		requireBits(t, want, got, "Gemm6x16Strided %s", name)
		at := randFloats(rng, kc*8)
		got, want = append([]float32(nil), c0...), append([]float32(nil), c0...)
		Gemm6x16Strided(kc, &at[0], 1, 8, &b[0], &got[0], ldc, tc.alpha, tc.beta)
		gemm6x16Strided(kc, &at[0], 1, 8, &b[0], &want[0], ldc, tc.alpha, tc.beta)
		requireBits(t, want, got, "Gemm6x16Strided transposed %s", name)

		for mr := 1; mr <= 6; mr++ {
			got, want = append([]float32(nil), c0...), append([]float32(nil), c0...)
			Gemm6x16Edge(kc, &a[0], 1, 6, &b[0], &got[0], ldc, tc.alpha, tc.beta, mr)
			gemm6x16Edge(kc, &a[0], 1, 6, &b[0], &want[0], ldc, tc.alpha, tc.beta, mr)
			requireBits(t, want, got, "Gemm6x16Edge mr=%d %s", mr, name)
		}

		ldb := 32 + 5
		ar, br := randFloats(rng, 2*kc), randFloats(rng, kc*ldb)
		c1 := randFloats(rng, 32)
		got, want = append([]float32(nil), c1...), append([]float32(nil), c1...)
		Gemm1x32(kc, &ar[0], 2, &br[0], ldb, &got[0], tc.alpha, tc.beta)
		gemm1x32(kc, &ar[0], 2, &br[0], ldb, &want[0], tc.alpha, tc.beta)
		requireBits(t, want, got, "Gemm1x32 %s", name)

		// 128 columns: four blocks of the 1×32 loop.
		ldb = 128 + 5
		br = randFloats(rng, kc*ldb)
		c2 := randFloats(rng, 128+3)
		got, want = append([]float32(nil), c2...), append([]float32(nil), c2...)
		Gemm1x128(kc, &ar[0], 2, &br[0], ldb, &got[0], tc.alpha, tc.beta)
		for j := 0; j < 128; j += 32 {
			gemm1x32(kc, &ar[0], 2, &br[j], ldb, &want[j], tc.alpha, tc.beta)
		}
		requireBits(t, want, got, "Gemm1x128 %s", name)
	}
}

func TestGemmLoopsMatchExactChains(t *testing.T) {
	// The loops against the definition in their doc comments evaluated
	// with exactFMA: one chain of fused multiply-adds per element in the
	// order of p, then alpha·T (rounded) and a fused multiply-add with
	// beta·c.
	rng := rand.New(rand.NewPCG(5, 6))
	for _, tc := range tileCases() {
		kc := tc.kc
		a, b := randFloats(rng, 6*kc), randFloats(rng, 16*kc)
		const ldc = 16
		c0 := randFloats(rng, 6*ldc)
		got := append([]float32(nil), c0...)
		gemm6x16(kc, &a[0], &b[0], &got[0], ldc, tc.alpha, tc.beta)
		want := make([]float32, len(c0))
		for r := 0; r < 6; r++ {
			for j := 0; j < 16; j++ {
				var s float32
				for p := 0; p < kc; p++ {
					s = exactFMA(a[6*p+r], b[16*p+j], s)
				}
				if tc.alpha != 1 {
					s *= tc.alpha
				}
				if tc.beta != 0 {
					s = exactFMA(tc.beta, c0[r*ldc+j], s)
				}
				want[r*ldc+j] = s
			}
		}
		requireBits(t, want, got, "gemm6x16 kc=%d alpha=%v beta=%v", kc, tc.alpha, tc.beta)
	}
}

func TestGemm6x16StridedBits(t *testing.T) {
	// Gemm6x16Strided on A in place and Gemm6x16 on the packed strip perform
	// the same fused multiply-add chains, so they store equal IEEE 754 bit
	// patterns (IEEE 754-2008 §5.4.1), for both layouts of A, every beta
	// path and k remainders of the four-way unrolled loop.
	rng := rand.New(rand.NewPCG(13, 14))
	for _, kc := range []int{1, 2, 3, 4, 5, 27, 256} {
		for _, tA := range []bool{false, true} {
			for _, beta := range []float32{0, 1, -0.5} {
				lda := kc + 3
				rows, ps, rs := 6, 1, lda
				if tA {
					lda, rows, ps, rs = 6+2, kc, 6+2, 1
				}
				a := randFloats(rng, rows*lda)
				bp := randFloats(rng, 16*kc)
				packed := make([]float32, 6*kc)
				for p := 0; p < kc; p++ {
					for r := 0; r < 6; r++ {
						packed[6*p+r] = a[r*rs+p*ps]
					}
				}
				want := make([]float32, 6*16)
				for i := range want {
					want[i] = float32(rng.Float64())
				}
				got := append([]float32(nil), want...)
				Gemm6x16(kc, &packed[0], &bp[0], &want[0], 16, 0.75, beta)
				Gemm6x16Strided(kc, &a[0], rs, ps, &bp[0], &got[0], 16, 0.75, beta)
				requireBits(t, want, got, "kc=%d tA=%v beta=%v", kc, tA, beta)
			}
		}
	}
}

func TestGemm6x32StridedMatchesLoop(t *testing.T) {
	// Gemm6x32Strided (its AVX-512 form on a CPU that has it, two
	// Gemm6x16Strided calls elsewhere) stores the bits of its loop, two
	// calls of the strided 6×16 loop, A read in place by rows and by
	// columns, with every alpha and beta of tileCases; c past the 32
	// columns is never written.
	rng := rand.New(rand.NewPCG(23, 24))
	for _, tc := range tileCases() {
		kc := tc.kc
		b := randFloats(rng, 32*kc+16)
		const ldc = 35
		c0 := randFloats(rng, 6*ldc)
		for _, layout := range []struct{ rs, ps, n int }{{kc + 3, 1, 6 * (kc + 3)}, {1, 9, 9 * kc}} {
			a := randFloats(rng, layout.n)
			want := append([]float32(nil), c0...)
			gemm6x32Strided(kc, &a[0], layout.rs, layout.ps, &b[0], &b[16*kc+7], &want[0], ldc, tc.alpha, tc.beta)
			got := append([]float32(nil), c0...)
			Gemm6x32Strided(kc, &a[0], layout.rs, layout.ps, &b[0], &b[16*kc+7], &got[0], ldc, tc.alpha, tc.beta)
			requireBits(t, want, got, "kc=%d rs=%d alpha=%v beta=%v", kc, layout.rs, tc.alpha, tc.beta)
		}
	}
}

func TestGemm6x32BiasMatchesLoopAndComposition(t *testing.T) {
	// Gemm6x32Bias (its AVX-512 form on a CPU that has it) stores the bits
	// of its loop, and those are the bits of the composition it replaces:
	// Gemm6x32Strided with beta = 1 on C holding the bias rows (one fused
	// multiply-add 1·bias + T, IEEE 754-2008 §5.4.1: the rounding of
	// bias + T), then Relu. The bias holds NaN, ±Inf and −0 beside random
	// values and row 2 of A is zero, so the Relu meets NaN, infinities and
	// zeros (never −0: a chain from +0 is never −0, nor is its sum with a
	// bias unless both are); c past the 32 columns is never written.
	rng := rand.New(rand.NewPCG(25, 26))
	for _, kc := range []int{1, 2, 5, 30, 64, 100, 256} {
		bp := randFloats(rng, 32*kc+16)
		bias := randFloats(rng, 32)
		bias[3], bias[7], bias[20], bias[31] = float32(math.NaN()), float32(math.Inf(1)), float32(math.Inf(-1)), float32(math.Copysign(0, -1))
		const ldc = 37
		for _, layout := range []struct{ rs, ps, n int }{{kc + 3, 1, 6 * (kc + 3)}, {1, 9, 9 * kc}} {
			a := randFloats(rng, layout.n)
			for p := 0; p < kc; p++ {
				a[2*layout.rs+p*layout.ps] = 0
			}
			for _, withBias := range []bool{true, false} {
				for _, relu := range []bool{true, false} {
					var bptr *float32
					if withBias {
						bptr = &bias[0]
					}
					name := fmt.Sprintf("kc=%d rs=%d bias=%t relu=%t", kc, layout.rs, withBias, relu)
					got := nanFloats(6 * ldc)
					Gemm6x32Bias(kc, &a[0], layout.rs, layout.ps, &bp[0], &bp[16*kc+5], &got[0], ldc, bptr, relu)
					want := nanFloats(6 * ldc)
					gemm6x32Bias(kc, &a[0], layout.rs, layout.ps, &bp[0], &bp[16*kc+5], &want[0], ldc, bptr, relu)
					requireBits(t, want, got, "%s: against the loop", name)

					comp := nanFloats(6 * ldc)
					beta := float32(0)
					if withBias {
						beta = 1
						for r := 0; r < 6; r++ {
							copy(comp[r*ldc:r*ldc+32], bias)
						}
					}
					Gemm6x32Strided(kc, &a[0], layout.rs, layout.ps, &bp[0], &bp[16*kc+5], &comp[0], ldc, 1, beta)
					if relu {
						for r := 0; r < 6; r++ {
							Relu(comp[r*ldc:r*ldc+32], comp[r*ldc:r*ldc+32])
						}
					}
					requireBits(t, comp, got, "%s: against bias rows, beta = 1 and Relu", name)
				}
			}
		}
	}
}

func TestGemm6x16EdgeBitsAndBounds(t *testing.T) {
	// Gemm6x16Edge must store, for the top mr rows of a tile, the bits
	// Gemm6x16 gives those elements in a full tile (the same fused
	// multiply-add chains, IEEE 754-2008 §5.4.1), and leave every other
	// element of C untouched: sentinels below and beside keep their bits.
	rng := rand.New(rand.NewPCG(15, 16))
	const ldc = 16 + 5
	for _, kc := range []int{1, 3, 9, 27, 256} {
		a := randFloats(rng, 6*kc)
		bp := randFloats(rng, 16*kc)
		for _, beta := range []float32{0, 1, -0.5} {
			for _, alpha := range []float32{1, 0.75} {
				c0 := make([]float32, (6+1)*ldc)
				for i := range c0 {
					c0[i] = float32(rng.Float64())
				}
				full := append([]float32(nil), c0...)
				Gemm6x16(kc, &a[0], &bp[0], &full[0], ldc, alpha, beta)
				for mr := 1; mr <= 6; mr++ {
					c := append([]float32(nil), c0...)
					Gemm6x16Edge(kc, &a[0], 1, 6, &bp[0], &c[0], ldc, alpha, beta, mr)
					for i := range c {
						r, j := i/ldc, i%ldc
						want := c0[i]
						if r < mr && j < 16 {
							want = full[i]
						}
						if math.Float32bits(want) != math.Float32bits(c[i]) {
							t.Fatalf("kc=%d alpha=%v beta=%v mr=%d: c[%d][%d] = %v, want %v", kc, alpha, beta, mr, r, j, c[i], want)
						}
					}
				}
			}
		}
	}
}

func TestConv6x16MatchesLoop(t *testing.T) {
	// Conv6x16 and each assembly form this CPU runs (AVX2, AVX-512) against
	// the loop, rows of B at scattered offsets, with and without the bias;
	// c past the 16 columns is never written.
	rng := rand.New(rand.NewPCG(7, 8))
	for _, kc := range []int{1, 2, 3, 4, 5, 27, 144} {
		a := randFloats(rng, 6*kc)
		b := randFloats(rng, 400)
		off := make([]int32, kc)
		for p := range off {
			off[p] = int32(rng.IntN(400 - 16))
		}
		bias := randFloats(rng, 6)
		for _, bp := range []*float32{nil, &bias[0]} {
			const ldc = 20
			want := nanFloats(6 * ldc)
			conv6x16(kc, &a[0], &b[0], &off[0], &want[0], ldc, bp)
			for _, f := range convForms() {
				got := nanFloats(6 * ldc)
				f.fn(kc, &a[0], &b[0], &off[0], &got[0], ldc, bp)
				requireBits(t, want, got, "%s kc=%d bias=%t", f.name, kc, bp != nil)
			}
		}
	}
}

func TestConv6x32MatchesLoop(t *testing.T) {
	// Conv6x32, Conv4x32 and their AVX-512 forms against two calls of the
	// 6×16 loop (conv6x32), B's halves at two bases that overlap or lie
	// apart, with and without the bias, at k depths with every remainder of
	// the four-deep unrolling; c past the 32 columns, and past row 4 for
	// Conv4x32, is never written.
	rng := rand.New(rand.NewPCG(9, 10))
	for _, kc := range []int{1, 2, 3, 4, 5, 6, 7, 27, 144, 288} {
		a := randFloats(rng, 6*kc)
		b := randFloats(rng, 600)
		off := make([]int32, kc)
		for p := range off {
			off[p] = int32(rng.IntN(400 - 16))
		}
		bias := randFloats(rng, 6)
		for _, b1 := range []int{16, 5, 183} {
			for _, bp := range []*float32{nil, &bias[0]} {
				const ldc = 37
				want := nanFloats(6 * ldc)
				conv6x32(kc, &a[0], &b[0], &b[b1], &off[0], &want[0], ldc, bp)
				for _, f := range wideConvForms() {
					want := append(want[:f.rows*ldc:f.rows*ldc], nanFloats((6-f.rows)*ldc)...)
					got := nanFloats(6 * ldc)
					f.fn(kc, &a[0], &b[0], &b[b1], &off[0], &got[0], ldc, bp)
					requireBits(t, want, got, "%s kc=%d b1=%d bias=%t", f.name, kc, b1, bp != nil)
				}
			}
		}
	}
}

func TestConv8x32MatchesLoop(t *testing.T) {
	// Conv8x32 and its AVX-512 form against two calls of the 4×32 loop
	// (conv8x32), A in two strips, with and without the bias, at k depths
	// with every remainder of the four-deep unrolling; c past the 32
	// columns and the 8 rows is never written.
	rng := rand.New(rand.NewPCG(19, 20))
	for _, kc := range []int{1, 2, 3, 4, 5, 7, 72, 144} {
		a0, a1 := randFloats(rng, 6*kc), randFloats(rng, 6*kc)
		b := randFloats(rng, 600)
		off := make([]int32, kc)
		for p := range off {
			off[p] = int32(rng.IntN(400 - 16))
		}
		bias := randFloats(rng, 8)
		for _, bp := range []*float32{nil, &bias[0]} {
			const ldc = 37
			want := nanFloats(9 * ldc)
			conv8x32(kc, &a0[0], &a1[0], &b[0], &b[183], &off[0], &want[0], ldc, bp)
			for name, fn := range eightConvForms() {
				got := nanFloats(9 * ldc)
				fn(kc, &a0[0], &a1[0], &b[0], &b[183], &off[0], &got[0], ldc, bp)
				requireBits(t, want, got, "%s kc=%d bias=%t", name, kc, bp != nil)
			}
		}
	}
}

func TestConv1x128MatchesLoop(t *testing.T) {
	// Conv1x128 and its AVX-512 form against the loop (row 0 of the 6×16
	// loop on eight strips), with and without the bias; c past the 128
	// positions is never written.
	rng := rand.New(rand.NewPCG(21, 22))
	for _, kc := range []int{1, 2, 5, 9, 72} {
		a := randFloats(rng, 6*kc)
		b := randFloats(rng, 800)
		off := make([]int32, kc)
		for p := range off {
			off[p] = int32(rng.IntN(800 - 128))
		}
		bias := randFloats(rng, 1)
		for _, bp := range []*float32{nil, &bias[0]} {
			want := nanFloats(130)
			conv1x128(kc, &a[0], &b[0], &off[0], &want[0], bp)
			for name, fn := range rowConvForms() {
				got := nanFloats(130)
				fn(kc, &a[0], &b[0], &off[0], &got[0], bp)
				requireBits(t, want, got, "%s kc=%d bias=%t", name, kc, bp != nil)
			}
		}
	}
}

func TestCopyKernels(t *testing.T) {
	// The copies equal the Go builtin copy row by row (common practice),
	// and write nothing outside the rows.
	rng := rand.New(rand.NewPCG(50, 51))
	for w := 1; w <= 41; w++ {
		rows, lds, ldd := 3, w+rng.IntN(3), w+2+rng.IntN(3)
		src := randFloats(rng, (rows-1)*lds+w)
		got := make([]float32, rows*ldd+1)
		want := make([]float32, rows*ldd+1)
		for i := range got {
			got[i], want[i] = -7, -7
		}
		CopyRows(&got[1], ldd, &src[0], lds, rows, w)
		for r := 0; r < rows; r++ {
			copy(want[1+r*ldd:1+r*ldd+w], src[r*lds:r*lds+w])
		}
		requireBits(t, want, got, "CopyRows width %d", w)
	}
	src := randFloats(rng, 4*20+16)
	got := make([]float32, 5*16)
	CopyRows16(&src[0], 20, &got[0], 5)
	for r := 0; r < 5; r++ {
		requireBits(t, src[20*r:20*r+16], got[16*r:16*r+16], "CopyRows16 row %d", r)
	}
	blk := randFloats(rng, 7*11+8)
	tr := make([]float32, 7*9+8)
	Transpose8x8(&blk[0], 11, &tr[0], 9)
	for r := 0; r < 8; r++ {
		for c := 0; c < 8; c++ {
			require.Equal(t, blk[r*11+c], tr[c*9+r], "Transpose8x8 (%d, %d)", r, c)
		}
	}
}

// specials32 are IEEE 754 binary32 bit patterns at the edges of Relu:
// ±0, the smallest and largest subnormals, the smallest normal, ±1, the
// largest finite, ±Inf and a quiet NaN (IEEE 754-2019, 3.4).
var specials32 = []uint32{
	0x00000000, 0x80000000, // +0, -0
	0x00000001, 0x80000001, // ±smallest subnormal
	0x007fffff, 0x807fffff, // ±largest subnormal
	0x00800000, 0x80800000, // ±smallest normal
	0x3f800000, 0xbf800000, // ±1
	0x7f7fffff, 0xff7fffff, // ±largest finite
	0x7f800000, 0xff800000, // ±Inf
	0x7fc00000, // quiet NaN
}

// TestReluMatchesGoMax checks Relu against Go's max, which the Go
// specification defines for floats: max(x, 0) is NaN for NaN and +0 for -0
// ("negative zero is smaller than positive zero"; The Go Programming
// Language Specification, Min and max). The derivative is g where x > 0 and
// +0 elsewhere, NaN included (an ordered comparison with NaN is false, IEEE
// 754-2019, 5.11). Every length up to 70 exercises the 32-, 8- and
// 1-element paths.
func TestReluMatchesGoMax(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 5))
	for n := 0; n <= 70; n++ {
		x := make([]float32, n)
		g := make([]float32, n)
		for i := range x {
			if rng.IntN(3) == 0 {
				x[i] = math.Float32frombits(specials32[rng.IntN(len(specials32))])
			} else {
				x[i] = float32(rng.NormFloat64())
			}
			g[i] = float32(rng.NormFloat64())
		}
		y := make([]float32, n)
		d := make([]float32, n)
		Relu(y, x)
		ReluGrad(d, x, g)
		for i, xi := range x {
			want := max(xi, 0) // Go spec semantics
			require.Equal(t, math.Float32bits(want), math.Float32bits(y[i]), "n=%d relu(%#x)", n, math.Float32bits(xi))
			var wd float32
			if xi > 0 {
				wd = g[i]
			}
			require.Equal(t, math.Float32bits(wd), math.Float32bits(d[i]), "n=%d ∂relu(%#x)", n, math.Float32bits(xi))
		}
		// The backward reads y = Relu(x) instead of x: the same mask.
		dy := make([]float32, n)
		ReluGrad(dy, y, g)
		for i := range d {
			require.Equal(t, math.Float32bits(d[i]), math.Float32bits(dy[i]), "n=%d ∂relu from y at x=%#x", n, math.Float32bits(x[i]))
		}
	}
	// The specials themselves, in a block the vector path takes whole.
	x := make([]float32, 32)
	for i := range x {
		x[i] = math.Float32frombits(specials32[i%len(specials32)])
	}
	y := make([]float32, 32)
	Relu(y, x)
	require.Equal(t, uint32(0x00000000), math.Float32bits(y[1]), "relu(-0) = +0 (Go spec, max)")
	require.True(t, math.IsNaN(float64(y[14])), "relu(NaN) = NaN (Go spec, max)")
	require.Equal(t, uint32(0x7f800000), math.Float32bits(y[12]), "relu(+Inf) = +Inf")
	require.Equal(t, uint32(0x00000000), math.Float32bits(y[13]), "relu(-Inf) = +0")
	// In place, as UnsafeDo runs it.
	want := append([]float32(nil), y...)
	Relu(x, x)
	for i := range x {
		require.Equal(t, math.Float32bits(want[i]), math.Float32bits(x[i]))
	}
}

func TestReluGradRowsMatchesGo(t *testing.T) {
	// ReluGradRows, its loop and (on amd64) its assembly store dy where
	// x > 0 and +0 elsewhere (Go's > on IEEE 754 values: false for NaN and
	// ±0), row by row between strided rows, widths with and without a
	// remainder of eight; dst between its rows is never written.
	rng := rand.New(rand.NewPCG(15, 16))
	forms := []struct {
		name string
		fn   func(dst *float32, ldd int, x, dy *float32, lds int, rows, w int)
	}{{"ReluGradRows", ReluGradRows}, {"loop", reluGradRows}}
	for _, w := range []int{1, 7, 8, 14, 16, 28, 32, 35} {
		const rows = 5
		lds, ldd := w+3, w+5
		x, dy := make([]float32, rows*lds), randFloats(rng, rows*lds)
		for i := range x {
			if rng.IntN(3) == 0 {
				x[i] = math.Float32frombits(specials32[rng.IntN(len(specials32))])
			} else {
				x[i] = float32(rng.NormFloat64())
			}
		}
		want := nanFloats(rows * ldd)
		for r := 0; r < rows; r++ {
			for j := 0; j < w; j++ {
				if x[r*lds+j] > 0 { // Go spec semantics
					want[r*ldd+j] = dy[r*lds+j]
				} else {
					want[r*ldd+j] = 0
				}
			}
		}
		for _, f := range forms {
			got := nanFloats(rows * ldd)
			f.fn(&got[0], ldd, &x[0], &dy[0], lds, rows, w)
			requireBits(t, want, got, "%s w=%d", f.name, w)
		}
	}
}

func TestWidenNarrowMatchGoConversions(t *testing.T) {
	// Widen and Narrow store the bits of Go's conversions (float64(x)
	// exact; float32(x) rounded to nearest, ties to even: the Go spec and
	// IEEE 754 §5.4.2) at every length through the vector steps and the
	// tail, on values that round up, down and to even, subnormals, values
	// past the float32 range, ±0, ±Inf and NaN.
	rng := rand.New(rand.NewPCG(17, 18))
	for n := 0; n <= 40; n++ {
		x32 := make([]float32, n)
		x64 := make([]float64, n)
		for i := range x32 {
			switch rng.IntN(4) {
			case 0:
				x32[i] = math.Float32frombits(specials32[rng.IntN(len(specials32))])
				x64[i] = []float64{0x1p-149 * 0.75, 0x1p-149 * 1.5, 0x1p-126 * (1 - 0x1p-30), 3.5e38, -1e300,
					math.Inf(1), math.NaN(), math.Copysign(0, -1), 1 + 0x1p-24, 1 + 3*0x1p-24}[rng.IntN(10)]
			default:
				x32[i] = float32(rng.NormFloat64())
				x64[i] = rng.NormFloat64() * math.Pow(2, float64(rng.IntN(60)-30))
			}
		}
		w := make([]float64, n+1)
		Widen(w, x32)
		nr := make([]float32, n+1)
		Narrow(nr, x64)
		for i := range x32 {
			require.Equal(t, math.Float64bits(float64(x32[i])), math.Float64bits(w[i]), "n=%d widen %#x", n, math.Float32bits(x32[i]))
			require.Equal(t, math.Float32bits(float32(x64[i])), math.Float32bits(nr[i]), "n=%d narrow %#x", n, math.Float64bits(x64[i]))
		}
		require.Zero(t, w[n], "past the end")
		require.Zero(t, nr[n], "past the end")
	}
}

func TestLerpNarrowAddScaledWidenRoundEachStep(t *testing.T) {
	// LerpNarrow and AddScaledWiden round the product, then the sum, to
	// float64 (IEEE 754 §5.4.1: each operation rounded on its own; Go's
	// explicit conversion keeps them apart), and LerpNarrow then to
	// float32 (§5.4.2), at every length through the vector steps and the
	// tail. The values are drawn so that a fused multiply-add would differ
	// on some of them (checked below), with ±0, ±Inf and NaN among them.
	rng := rand.New(rand.NewPCG(23, 24))
	specials := []float64{0, math.Copysign(0, -1), math.Inf(1), math.Inf(-1), math.NaN(), 1e300, -3.5e38}
	draw := func() float64 {
		if rng.IntN(8) == 0 {
			return specials[rng.IntN(len(specials))]
		}
		return rng.NormFloat64() * math.Pow(2, float64(rng.IntN(20)-10))
	}
	fusedDiffers := 0
	for n := 0; n <= 40; n++ {
		u, d := make([]float64, n), make([]float64, n+1)
		x := make([]float32, n)
		for i := range u {
			u[i], d[i], x[i] = draw(), draw(), float32(draw())
		}
		a, w := rng.Float64(), rng.NormFloat64()
		got := make([]float32, n+1)
		LerpNarrow(got, u, d, a)
		acc := make([]float64, n+1)
		want := make([]float64, n)
		for i := range acc[:n] {
			acc[i] = draw()
			want[i] = acc[i]
		}
		AddScaledWiden(acc, w, x)
		for i := range u {
			p := float64(a * d[i]) // the conversion keeps the compiler from fusing
			lerp := float32(u[i] + p)
			require.Equal(t, math.Float32bits(lerp), math.Float32bits(got[i]), "n=%d lerp u=%v d=%v a=%v", n, u[i], d[i], a)
			q := float64(w * float64(x[i]))
			sum := want[i] + q
			require.Equal(t, math.Float64bits(sum), math.Float64bits(acc[i]), "n=%d axpy x=%v w=%v", n, x[i], w)
			if f := math.FMA(w, float64(x[i]), want[i]); f == f && f != sum {
				fusedDiffers++
			}
		}
		require.Zero(t, got[n], "past the end")
		require.Zero(t, acc[n], "past the end")
	}
	require.Positive(t, fusedDiffers, "no value tells a fused multiply-add apart")
}

func TestMaxPool2x2MatchesLoop(t *testing.T) {
	// MaxPool2x2 and its gradient against their loops on inputs full of
	// ties and signed zeros, with and without NaNs (the assembly hands a
	// pass holding a NaN back to the loop), for output widths below, at and
	// past the 4- and 8-wide steps, odd sizes leaving an uncovered border.
	rng := rand.New(rand.NewPCG(21, 22))
	values := []float32{-2, -1, float32(math.Copysign(0, -1)), 0, 0, 1, 2, 2}
	for _, ow := range []int{1, 3, 4, 5, 8, 11, 16} {
		for _, nan := range []bool{false, true} {
			planes, h, w, oh := 3, 7, 2*ow+1, 3
			x := make([]float32, planes*h*w)
			for i := range x {
				x[i] = values[rng.IntN(len(values))]
			}
			if nan {
				x[rng.IntN(len(x))] = float32(math.NaN())
			}
			dy := randFloats(rng, planes*oh*ow)
			got, want := make([]float32, len(dy)), make([]float32, len(dy))
			MaxPool2x2(x, got, planes, h, w, oh, ow)
			maxPool2x2(x, want, planes, h, w, oh, ow)
			requireBits(t, want, got, "forward ow=%d nan=%t", ow, nan)
			gdx, wdx := make([]float32, len(x)), make([]float32, len(x))
			MaxPool2x2Grad(x, dy, gdx, planes, h, w, oh, ow)
			maxPool2x2Grad(x, dy, wdx, planes, h, w, oh, ow)
			requireBits(t, wdx, gdx, "gradient ow=%d nan=%t", ow, nan)
		}
	}
}

// BenchmarkFMAPeak reports the float32 fused multiply-add throughput of one
// core with no memory traffic: the ceiling for every GEMM benchmark here.
func BenchmarkFMAPeak(b *testing.B) {
	if !cpupeak.Available() {
		b.Skip("no AVX2/FMA on this CPU")
	}
	const iters = 1 << 16
	cpupeak.Bench(b, cpupeak.FlopsPerIteration()*iters, func() { cpupeak.Loop(iters) })
}

// BenchmarkGemm6x16 times the tile kernel alone on packed panels that stay
// in L1 (one 6×kc strip of A, one kc×16 strip of B), at the k depths of the
// models' products: 16, 27 (3×3×3 im2col), 72, 144, 256 and 288.
func BenchmarkGemm6x16(b *testing.B) {
	rng := rand.New(rand.NewPCG(11, 12))
	for _, kc := range []int{16, 27, 72, 144, 256, 288} {
		a := randFloats(rng, 6*kc)
		as := randFloats(rng, 6*(kc+3))
		p := randFloats(rng, 16*kc)
		var c [6 * 16]float32
		for _, beta := range []float32{0, 1} {
			b.Run(fmt.Sprintf("kc=%d/beta=%v/packed", kc, beta), func(b *testing.B) {
				cpupeak.Bench(b, 2*float64(6*16*kc), func() { Gemm6x16(kc, &a[0], &p[0], &c[0], 16, 1, beta) })
			})
			// The same strip of A read in place (rows kc+3 apart).
			b.Run(fmt.Sprintf("kc=%d/beta=%v/strided", kc, beta), func(b *testing.B) {
				cpupeak.Bench(b, 2*float64(6*16*kc), func() { Gemm6x16Strided(kc, &as[0], kc+3, 1, &p[0], &c[0], 16, 1, beta) })
			})
		}
	}
}

func BenchmarkRelu(b *testing.B) {
	const n = 64 * 16 * 32 * 32 // cnn-m's first Relu at batch 64
	x := make([]float32, n)
	for i := range x {
		x[i] = float32(i%7) - 3
	}
	y := make([]float32, n)
	b.Run("kernel", func(b *testing.B) {
		b.SetBytes(8 * n)
		for b.Loop() {
			Relu(y, x)
		}
	})
	b.Run("loop", func(b *testing.B) {
		b.SetBytes(8 * n)
		for b.Loop() {
			relu(y, x)
		}
	})
}

func BenchmarkReluGrad(b *testing.B) {
	const n = 64 * 16 * 32 * 32
	x := make([]float32, n)
	g := make([]float32, n)
	for i := range x {
		x[i] = float32(i%7) - 3
		g[i] = float32(i % 5)
	}
	d := make([]float32, n)
	b.Run("kernel", func(b *testing.B) {
		b.SetBytes(12 * n)
		for b.Loop() {
			ReluGrad(d, x, g)
		}
	})
	b.Run("loop", func(b *testing.B) {
		b.SetBytes(12 * n)
		for b.Loop() {
			reluGrad(d, x, g)
		}
	})
}

func TestAddToLerpReluGradMidAddRoundEachStep(t *testing.T) {
	// AddTo, Lerp and ReluGradMidAdd against their definitions written
	// out, each operation rounded to float32 on its own (IEEE 754 §5.4.1;
	// Go's explicit conversion keeps a product from being fused), at every
	// length through the vector steps and the tail. The values include ±0,
	// ±Inf, NaN and the edges of specials32 (a NaN result is compared as
	// NaN: which operand's NaN an operation returns, and so its sign, is
	// left open by IEEE 754 §6.2.3 and by Go); where ReluGradMidAdd's
	// condition fails dst keeps its bits (−0 stays −0), and a NaN sum of
	// the ends fails it, as does a sum of exactly 0.
	rng := rand.New(rand.NewPCG(25, 26))
	draw := func() float32 {
		if rng.IntN(6) == 0 {
			return math.Float32frombits(specials32[rng.IntN(len(specials32))])
		}
		return float32(rng.NormFloat64() * math.Pow(2, float64(rng.IntN(20)-10)))
	}
	same := func(want, got float32) bool {
		return math.Float32bits(want) == math.Float32bits(got) || (want != want && got != got)
	}
	fusedDiffers, kept, added := 0, 0, 0
	for n := 0; n <= 40; n++ {
		lo, hi, dy := make([]float32, n+1), make([]float32, n+1), make([]float32, n+1)
		acc := make([]float32, n+1)
		for i := range n {
			lo[i], hi[i], dy[i], acc[i] = draw(), draw(), draw(), draw()
			if rng.IntN(6) == 0 {
				hi[i] = -lo[i] // the ends' sum exactly 0: the kink itself
			}
		}
		f := float32(rng.Float64())
		got := make([]float32, n+1)
		Lerp(got, lo[:n], hi, f)
		sum := slices.Clone(acc)
		AddTo(sum, dy[:n])
		mid := slices.Clone(acc)
		ReluGradMidAdd(mid, lo[:n], hi, dy)
		for i := range n {
			p := float32(f * (hi[i] - lo[i]))
			want := lo[i] + p
			require.True(t, same(want, got[i]), "n=%d lerp lo=%v hi=%v f=%v", n, lo[i], hi[i], f)
			fused := float32(math.FMA(float64(f), float64(hi[i]-lo[i]), float64(lo[i])))
			if fused == fused && fused != want {
				fusedDiffers++
			}
			require.True(t, same(acc[i]+dy[i], sum[i]), "n=%d add %v + %v", n, acc[i], dy[i])
			w := acc[i]
			if lo[i]+hi[i] > 0 {
				w += dy[i]
				added++
			} else {
				kept++
			}
			require.True(t, same(w, mid[i]), "n=%d relu grad a=%v b=%v dy=%v dst=%v", n, lo[i], hi[i], dy[i], acc[i])
		}
		require.Zero(t, got[n], "past the end")
		require.Equal(t, math.Float32bits(acc[n]), math.Float32bits(sum[n]), "past the end")
		require.Equal(t, math.Float32bits(acc[n]), math.Float32bits(mid[n]), "past the end")
	}
	require.Positive(t, fusedDiffers, "no value tells a fused multiply-add apart")
	require.Positive(t, kept)
	require.Positive(t, added)
}
