package ops

import (
	"github.com/apportion/apportion/internal/cpupeak"

	"github.com/apportion/apportion/nn/internal/asm/f32"

	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"testing"

	"github.com/stretchr/testify/require"
)

// sgemmNaive is the closed form C = alpha·op(A)·op(B) + beta·C evaluated as
// a triple loop in float64 (the definition of GEMM in the BLAS reference,
// Dongarra et al. 1990, "A set of level 3 basic linear algebra
// subprograms", §2), with C not read when beta == 0.
func sgemmNaive(tA, tB bool, m, n, k int, alpha float64, a []float32, lda int, b []float32, ldb int, beta float64, c []float32, ldc int) []float64 {
	out := make([]float64, m*n)
	for i := 0; i < m; i++ {
		for j := 0; j < n; j++ {
			var s float64
			for p := 0; p < k; p++ {
				var av, bv float32
				if tA {
					av = a[p*lda+i]
				} else {
					av = a[i*lda+p]
				}
				if tB {
					bv = b[j*ldb+p]
				} else {
					bv = b[p*ldb+j]
				}
				s += float64(av) * float64(bv)
			}
			s *= alpha
			if beta != 0 {
				s += beta * float64(c[i*ldc+j])
			}
			out[i*n+j] = s
		}
	}
	return out
}

// sgemmOperands returns random stored A, B, C for the given shape with row
// strides padded by pad, and C filled with fill when fill is not zero.
func sgemmOperands(rng *rand.Rand, tA, tB bool, m, n, k, pad int, fill float32) (a []float32, lda int, b []float32, ldb int, c []float32, ldc int) {
	ra, ca := m, k
	if tA {
		ra, ca = k, m
	}
	rb, cb := k, n
	if tB {
		rb, cb = n, k
	}
	lda, ldb, ldc = ca+pad, cb+pad, n+pad
	rnd := func(rows, ld int) []float32 {
		s := make([]float32, rows*ld)
		for i := range s {
			s[i] = float32(rng.Float64()*2 - 1)
		}
		return s
	}
	a, b, c = rnd(ra, lda), rnd(rb, ldb), rnd(m, ldc)
	if fill != 0 {
		for i := range c {
			c[i] = fill
		}
	}
	return a, lda, b, ldb, c, ldc
}

// sgemmClose requires got (m×n with stride ldc) to match the float64 closed
// form within 1e-5·k relative to the magnitude of the terms (common
// practice: the float32 rounding error of a k-term dot product grows at most
// linearly in k, Higham 2002, "Accuracy and Stability of Numerical
// Algorithms", §3.1, eq. 3.5).
func sgemmClose(t *testing.T, name string, want []float64, got []float32, m, n, ldc, k int) {
	t.Helper()
	tol := 1e-5 * float64(max(k, 1))
	for i := 0; i < m; i++ {
		for j := 0; j < n; j++ {
			w, g := want[i*n+j], float64(got[i*ldc+j])
			// Checked by hand first: testify per element would dominate the run time.
			if math.IsNaN(g) || math.Abs(w-g) > tol*math.Max(1, math.Abs(w)) {
				require.InDelta(t, w, g, tol*math.Max(1, math.Abs(w)), "%s: C[%d][%d]", name, i, j)
			}
		}
	}
}

func TestSgemmClosedForm(t *testing.T) {
	if !f32.Asm() {
		t.Skip("no AVX2/FMA kernel on this CPU; sgemm is gonum's Sgemm")
	}
	dims := []int{1, 2, 3, 5, 7, 8, 15, 16, 17, 31, 64, 100, 257}
	scalars := []float32{1, 0, 0.5, -2}
	rng := rand.New(rand.NewPCG(1, 2))
	cases := 0
	for _, m := range dims {
		for _, n := range dims {
			for _, k := range dims {
				// Every shape with one of the four transpose pairs and a random
				// alpha, beta and stride padding; the full cross product would
				// take minutes in the float64 reference.
				tr := rng.IntN(4)
				tA, tB := tr&1 != 0, tr&2 != 0
				alpha, beta := scalars[rng.IntN(4)], scalars[rng.IntN(4)]
				pad := rng.IntN(3) * 3
				var fill float32
				if beta == 0 {
					fill = float32(math.NaN()) // BLAS: beta == 0 means C is not read
				}
				a, lda, b, ldb, c, ldc := sgemmOperands(rng, tA, tB, m, n, k, pad, fill)
				want := sgemmNaive(tA, tB, m, n, k, float64(alpha), a, lda, b, ldb, float64(beta), c, ldc)
				sgemmPacked(tA, tB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
				name := fmt.Sprintf("m=%d n=%d k=%d tA=%v tB=%v alpha=%v beta=%v pad=%d", m, n, k, tA, tB, alpha, beta, pad)
				sgemmClose(t, name, want, c, m, n, ldc, k)
				cases++
			}
		}
	}
	t.Logf("%d shapes checked against the float64 triple loop", cases)
}

func TestSgemmTransposeScalars(t *testing.T) {
	if !f32.Asm() {
		t.Skip("no AVX2/FMA kernel on this CPU; sgemm is gonum's Sgemm")
	}
	// All four transpose pairs × all alpha, beta on shapes that cross the
	// register tile and the k, m, n cache blocks.
	shapes := [][3]int{{7, 17, 5}, {13, 33, 300}, {100, 530, 31}, {6, 16, 257}}
	rng := rand.New(rand.NewPCG(3, 4))
	for _, s := range shapes {
		m, n, k := s[0], s[1], s[2]
		for tr := 0; tr < 4; tr++ {
			tA, tB := tr&1 != 0, tr&2 != 0
			for _, alpha := range []float32{1, 0, 0.5, -2} {
				for _, beta := range []float32{1, 0, 0.5, -2} {
					var fill float32
					if beta == 0 {
						fill = float32(math.NaN())
					}
					a, lda, b, ldb, c, ldc := sgemmOperands(rng, tA, tB, m, n, k, 2, fill)
					want := sgemmNaive(tA, tB, m, n, k, float64(alpha), a, lda, b, ldb, float64(beta), c, ldc)
					sgemmPacked(tA, tB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
					sgemmClose(t, fmt.Sprintf("m=%d n=%d k=%d tA=%v tB=%v alpha=%v beta=%v", m, n, k, tA, tB, alpha, beta), want, c, m, n, ldc, k)
				}
			}
		}
	}
}

func TestSgemmMatchesGonum(t *testing.T) {
	// Reference implementation: gonum's blas32 Sgemm on the same operands,
	// through the dispatching sgemm (small products go to gonum itself).
	rng := rand.New(rand.NewPCG(5, 6))
	for _, s := range [][3]int{{64, 64, 64}, {64, 256, 256}, {32, 256, 144}, {16, 1024, 27}, {1, 10, 784}, {3, 5, 7}} {
		m, n, k := s[0], s[1], s[2]
		for tr := 0; tr < 4; tr++ {
			tA, tB := tr&1 != 0, tr&2 != 0
			a, lda, b, ldb, c, ldc := sgemmOperands(rng, tA, tB, m, n, k, 1, 0)
			ref := append([]float32(nil), c...)
			sgemmGonum(tA, tB, m, n, k, 0.5, a, lda, b, ldb, -2, ref, ldc)
			sgemm(tA, tB, m, n, k, 0.5, a, lda, b, ldb, -2, c, ldc)
			tol := 1e-5 * float64(k)
			for i := 0; i < m; i++ {
				for j := 0; j < n; j++ {
					w, g := float64(ref[i*ldc+j]), float64(c[i*ldc+j])
					require.InDelta(t, w, g, tol*math.Max(1, math.Abs(w)), "m=%d n=%d k=%d tA=%v tB=%v C[%d][%d]", m, n, k, tA, tB, i, j)
				}
			}
		}
	}
}

func TestSgemmDegenerate(t *testing.T) {
	// BLAS semantics (Dongarra et al. 1990): k == 0 or alpha == 0 leaves
	// C = beta·C, and beta == 0 writes exact zeros over NaN.
	for _, f := range []func(bool, bool, int, int, int, float32, []float32, int, []float32, int, float32, []float32, int){sgemmPacked, sgemmGonum} {
		if !f32.Asm() {
			break
		}
		c := []float32{float32(math.NaN()), float32(math.NaN()), 3, 4}
		f(false, false, 2, 2, 0, 1, make([]float32, 2), 1, make([]float32, 2), 2, 0, c, 2)
		require.Equal(t, []float32{0, 0, 0, 0}, c)
		c = []float32{1, 2, 3, 4}
		f(false, false, 2, 2, 1, 0, []float32{5, 6}, 1, []float32{7, 8}, 2, -2, c, 2)
		require.Equal(t, []float32{-2, -4, -6, -8}, c)
	}
	require.Panics(t, func() {
		sgemmPacked(false, false, 2, 2, 2, 1, make([]float32, 3), 2, make([]float32, 4), 2, 0, make([]float32, 4), 2)
	}, "short A must be refused before the kernel writes through pointers")
}

// BenchmarkSgemm compares gonum's Sgemm with the packed kernel on shapes from
// the models: square 64, mlp-m at batch 64, and the im2col GEMMs of cnn-m.
func BenchmarkSgemm(b *testing.B) {
	shapes := []struct {
		name    string
		m, n, k int
	}{
		{"64x64x64", 64, 64, 64},
		{"mlp-m_64x256x256", 64, 256, 256},
		{"conv_32x256x144", 32, 256, 144},
		{"conv_16x1024x27", 16, 1024, 27},
		{"conv_8x784x9", 8, 784, 9},
		{"conv_16x196x72", 16, 196, 72},
		{"row_1x256x256", 1, 256, 256},
		{"row_tB_1x256x256", 1, 256, 256},
		{"rows_2x256x256", 2, 256, 256},
		{"rows_3x256x256", 3, 256, 256},
		{"rows_4x256x256", 4, 256, 256},
		{"rows_6x256x256", 6, 256, 256},
		{"rows_8x256x256", 8, 256, 256},
		{"rows_12x256x256", 12, 256, 256},
		{"cols_256x1x256", 256, 1, 256},
		{"cols_256x4x256", 256, 4, 256},
		// cnn-s per sample: the backward im2col products Wᵀ·dY.
		{"convdx_tA_9x784x8", 9, 784, 8},
		{"convdx_tA_72x196x16", 72, 196, 16},
		// The Gemm heads: cnn-s fc at batch 64 and its backward product.
		{"fc_tB_64x10x784", 64, 10, 784},
		{"fcdx_64x784x10", 64, 784, 10},
	}
	impls := []struct {
		name string
		f    func(bool, bool, int, int, int, float32, []float32, int, []float32, int, float32, []float32, int)
	}{{"gonum", sgemmGonum}, {"apportion", sgemm}}
	for _, s := range shapes {
		for _, im := range impls {
			b.Run(s.name+"/"+im.name, func(b *testing.B) {
				rng := rand.New(rand.NewPCG(7, 8))
				tA, tB := strings.Contains(s.name, "tA"), strings.Contains(s.name, "tB")
				a, lda, bb, ldb, c, ldc := sgemmOperands(rng, tA, tB, s.m, s.n, s.k, 0, 0)
				b.ReportAllocs()
				cpupeak.Bench(b, 2*float64(s.m*s.n*s.k), func() { im.f(tA, tB, s.m, s.n, s.k, 1, a, lda, bb, ldb, 0, c, ldc) })
			})
		}
	}
}

func TestSgemmRowsMatchBatch(t *testing.T) {
	// A row of C computed alone must carry the same IEEE 754 bit pattern as
	// that row inside a batched product: every element is one chain of
	// correctly rounded fused multiply-adds (IEEE 754-2008 §5.4.1), so the
	// bits depend only on the order of the chain, which sgemm fixes by k.
	if !f32.Asm() {
		// gonum's Sgemm orders its sums by shape (with tA and tB a row
		// alone differs from the batched row in the last bits).
		t.Skip("no AVX2/FMA kernel on this CPU; gonum's Sgemm does not promise batch-invariant bits")
	}
	rng := rand.New(rand.NewPCG(9, 10))
	for _, s := range [][3]int{{64, 256, 256}, {13, 40, 300}, {7, 10, 784}, {64, 33, 9}} {
		m, n, k := s[0], s[1], s[2]
		for tr := 0; tr < 4; tr++ {
			tA, tB := tr&1 != 0, tr&2 != 0
			a, lda, b, ldb, c, ldc := sgemmOperands(rng, tA, tB, m, n, k, 0, 0)
			sgemm(tA, tB, m, n, k, 1, a, lda, b, ldb, 0, c, ldc)
			for _, i := range []int{0, m / 2, m - 1} {
				// Row i alone: op(A) row i is a 1×k matrix.
				row := make([]float32, k)
				for p := range row {
					if tA {
						row[p] = a[p*lda+i]
					} else {
						row[p] = a[i*lda+p]
					}
				}
				got := make([]float32, n)
				sgemm(false, tB, 1, n, k, 1, row, k, b, ldb, 0, got, n)
				for j := 0; j < n; j++ {
					if math.Float32bits(got[j]) != math.Float32bits(c[i*ldc+j]) {
						require.Equal(t, math.Float32bits(c[i*ldc+j]), math.Float32bits(got[j]),
							"m=%d n=%d k=%d tA=%v tB=%v: C[%d][%d] alone %v, batched %v", m, n, k, tA, tB, i, j, got[j], c[i*ldc+j])
					}
				}
			}
		}
	}
}
