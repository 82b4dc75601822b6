package ops

import (
	"github.com/apportion/apportion/internal/cpupeak"

	"github.com/apportion/apportion/nn/internal/asm/f32"

	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/stretchr/testify/require"
)

// sgemmEdgeDims are sizes around the register tile (6, 16), the row-kernel
// width (32) and the k block (256).
var sgemmEdgeDims = []int{1, 5, 6, 7, 15, 16, 17, 255, 257}

func TestSgemmPrepackedMatchesUnpackedAndGonum(t *testing.T) {
	if !f32.Asm() {
		t.Skip("no AVX2/FMA kernel on this CPU; nothing is prepacked")
	}
	rng := rand.New(rand.NewPCG(21, 22))
	scalars := []float32{1, 0, 0.5, -2}
	cases := 0
	for _, m := range sgemmEdgeDims {
		for _, n := range sgemmEdgeDims {
			for _, k := range sgemmEdgeDims {
				// One random transpose pair, alpha, beta and stride padding per
				// shape, as in TestSgemmClosedForm.
				tr := rng.IntN(4)
				tA, tB := tr&1 != 0, tr&2 != 0
				alpha, beta := scalars[rng.IntN(4)], scalars[rng.IntN(4)]
				pad := rng.IntN(3) * 3
				var fill float32
				if beta == 0 {
					fill = float32(math.NaN()) // BLAS: beta == 0 means C is not read
				}
				a, lda, b, ldb, c, ldc := sgemmOperands(rng, tA, tB, m, n, k, pad, fill)
				pb := newSgemmPrepacked(tB, n, k)
				require.NotNil(t, pb)
				name := fmt.Sprintf("m=%d n=%d k=%d tA=%v tB=%v alpha=%v beta=%v pad=%d", m, n, k, tA, tB, alpha, beta, pad)

				// The float64 triple loop (Dongarra et al. 1990, §2).
				want := sgemmNaive(tA, tB, m, n, k, float64(alpha), a, lda, b, ldb, float64(beta), c, ldc)
				unpacked := append([]float32(nil), c...)
				sgemm(tA, tB, m, n, k, alpha, a, lda, b, ldb, beta, unpacked, ldc)
				ref := append([]float32(nil), c...)
				if beta == 0 {
					clear(ref) // gonum scales C by beta, NaN·0 stays NaN
				}
				sgemmGonum(tA, tB, m, n, k, alpha, a, lda, b, ldb, beta, ref, ldc)
				sgemmPre(tA, m, n, k, alpha, a, lda, pb, b, ldb, beta, c, ldc)

				sgemmClose(t, name+" prepacked vs float64", want, c, m, n, ldc, k)
				// gonum's blas32 Sgemm, an independent implementation (common
				// practice), within the same rounding bound.
				gw := make([]float64, m*n)
				for i := 0; i < m; i++ {
					for j := 0; j < n; j++ {
						gw[i*n+j] = float64(ref[i*ldc+j])
					}
				}
				sgemmClose(t, name+" prepacked vs gonum", gw, c, m, n, ldc, k)
				// The same fused multiply-add chains as the unpacked driver:
				// equal IEEE 754 bit patterns.
				for i := 0; i < m; i++ {
					for j := 0; j < n; j++ {
						if math.Float32bits(c[i*ldc+j]) != math.Float32bits(unpacked[i*ldc+j]) {
							require.Equal(t, math.Float32bits(unpacked[i*ldc+j]), math.Float32bits(c[i*ldc+j]), "%s: C[%d][%d] prepacked %v, unpacked %v", name, i, j, c[i*ldc+j], unpacked[i*ldc+j])
						}
					}
				}
				cases++
			}
		}
	}
	t.Logf("%d shapes: prepacked = unpacked bit for bit, both within rounding of float64 and gonum", cases)
}

// TestSgemmRowBitsEveryPath checks that a row of C has one IEEE 754 bit
// pattern whatever path computes it: alone and inside m = 2, 3, 8 and 64
// (the row kernel below sgemmRowsBelow or sgemmPreRowsBelow rows, the packed
// kernels above), with B stored either way, packed per call or prepacked. Each element is one chain of correctly
// rounded fused multiply-adds (IEEE 754-2008 §5.4.1) in the order of k, so
// the bits cannot depend on the path if the chains agree.
func TestSgemmRowBitsEveryPath(t *testing.T) {
	if !f32.Asm() {
		t.Skip("no AVX2/FMA kernel on this CPU; gonum's Sgemm does not promise batch-invariant bits")
	}
	rng := rand.New(rand.NewPCG(23, 24))
	for _, s := range [][2]int{{256, 256}, {10, 256}, {100, 300}, {600, 9}, {33, 64}, {2, 64}} {
		n, k := s[0], s[1]
		const m = 64
		for _, tB := range []bool{false, true} {
			a, lda, b, ldb, _, _ := sgemmOperands(rng, false, tB, m, n, k, 0, 0)
			pb := newSgemmPrepacked(tB, n, k)
			bias := make([]float32, n)
			for j := range bias {
				bias[j] = float32(rng.Float64() - 0.5)
			}
			// ref is row i computed alone by the unpacked driver, C starting
			// as the bias row and accumulated with beta = 1 (the fused Gemm).
			ref := func(i int) []float32 {
				c := append([]float32(nil), bias...)
				sgemm(false, tB, 1, n, k, 0.75, a[i*lda:i*lda+k], k, b, ldb, 1, c, n)
				return c
			}
			for _, rows := range []int{1, 2, 3, 8, 64} {
				for _, pre := range []bool{false, true} {
					c := make([]float32, rows*n)
					for i := 0; i < rows; i++ {
						copy(c[i*n:], bias)
					}
					// Rows 64−rows..63 of A, so row 63 sits at the end of every batch.
					off := (m - rows) * lda
					if pre {
						sgemmPre(false, rows, n, k, 0.75, a[off:], lda, pb, b, ldb, 1, c, n)
					} else {
						sgemm(false, tB, rows, n, k, 0.75, a[off:], lda, b, ldb, 1, c, n)
					}
					for _, r := range []int{0, rows - 1} {
						want := ref(m - rows + r)
						for j := 0; j < n; j++ {
							if math.Float32bits(want[j]) != math.Float32bits(c[r*n+j]) {
								require.Equal(t, math.Float32bits(want[j]), math.Float32bits(c[r*n+j]),
									"n=%d k=%d tB=%v rows=%d prepacked=%v: C[%d][%d] in batch %v, alone %v", n, k, tB, rows, pre, r, j, c[r*n+j], want[j])
							}
						}
					}
				}
			}
		}
	}
}

func TestSgemmPrepackedRefusesBadShapes(t *testing.T) {
	if !f32.Asm() {
		t.Skip("no AVX2/FMA kernel on this CPU; nothing is prepacked")
	}
	// The kernel writes through pointers: a product of another shape than
	// the packed one, or a short B, must be refused before it runs (common
	// practice, as gonum's BLAS panics on bad dimensions).
	pb := newSgemmPrepacked(false, 16, 8)
	b := make([]float32, 8*16)
	require.Panics(t, func() {
		sgemmPre(false, 2, 16, 9, 1, make([]float32, 2*9), 9, pb, make([]float32, 9*16), 16, 0, make([]float32, 2*16), 16)
	}, "k differs from the packed B")
	require.Panics(t, func() {
		sgemmPre(false, 2, 16, 8, 1, make([]float32, 2*8), 8, pb, b, 16, 0, make([]float32, 16), 16)
	}, "short C")
	require.Panics(t, func() {
		sgemmPre(false, 2, 16, 8, 1, make([]float32, 2*8), 8, newSgemmPrepacked(true, 16, 8), make([]float32, 100), 8, 0, make([]float32, 2*16), 16)
	}, "short B")
}

func TestSgemmPrepackedNoAllocs(t *testing.T) {
	if raceEnabled {
		t.Skip("the race detector makes sync.Pool drop items, which changes allocation counts")
	}
	if !f32.Asm() {
		t.Skip("no AVX2/FMA kernel on this CPU; nothing is prepacked")
	}
	// Zero allocations per warm call (the buffer contract of the ops, common
	// practice for hot loops): the A buffer and edge tile come from a pool.
	rng := rand.New(rand.NewPCG(25, 26))
	for _, m := range []int{1, 7, 64} {
		a, lda, b, ldb, c, ldc := sgemmOperands(rng, false, true, m, 100, 256, 0, 0)
		pb := newSgemmPrepacked(true, 100, 256)
		allocs := testing.AllocsPerRun(20, func() {
			sgemmPre(false, m, 100, 256, 1, a, lda, pb, b, ldb, 0, c, ldc)
		})
		require.Zero(t, allocs, "m=%d", m)
	}
}

// BenchmarkSgemmPrepacked times products whose B is a prepacked weight,
// against sgemm packing it on every call: mlp-m's layers forward (Wᵀ,
// transB) and backward (W) at batch 1, 8 and 64.
func TestSgemmPreEpilogueMatchesFilledBiasAndRelu(t *testing.T) {
	if !f32.WideTiles() {
		t.Skip("no wide tiles on this CPU; the epilogue path does not run")
	}
	// sgemmPreEpilogue against what it replaces, bit for bit: sgemmPre with
	// beta = 1 on C holding the bias rows (none: beta = 0), then f32.Relu;
	// and against the float64 triple loop (Dongarra et al. 1990, §2) plus
	// the bias, within rounding. Rows around the tile (6) and the row block
	// (96), columns around the pair of strips (32), k up to one k block.
	rng := rand.New(rand.NewPCG(41, 42))
	cases := 0
	for _, m := range []int{3, 5, 6, 7, 95, 96, 97, 203} {
		for _, n := range []int{32, 33, 48, 64, 100, 256, 530} {
			for _, k := range []int{1, 30, 64, 256} {
				tB := rng.IntN(2) == 1
				pad := rng.IntN(3) * 3
				a, lda, b, ldb, c, ldc := sgemmOperands(rng, false, tB, m, n, k, pad, float32(math.NaN()))
				bias := make([]float32, n)
				for j := range bias {
					bias[j] = float32(rng.NormFloat64())
				}
				for _, withBias := range []bool{true, false} {
					for _, relu := range []bool{true, false} {
						name := fmt.Sprintf("m=%d n=%d k=%d tB=%v bias=%v relu=%v", m, n, k, tB, withBias, relu)
						var bs []float32
						want := append([]float32(nil), c...)
						var beta float32
						if withBias {
							bs, beta = bias, 1
							for i := 0; i < m; i++ {
								copy(want[i*ldc:i*ldc+n], bias)
							}
						}
						naive := sgemmNaive(false, tB, m, n, k, 1, a, lda, b, ldb, float64(beta), want, ldc)
						sgemmPre(false, m, n, k, 1, a, lda, newSgemmPrepacked(tB, n, k), b, ldb, beta, want, ldc)
						got := append([]float32(nil), c...)
						sgemmPreEpilogue(m, n, k, a, lda, newSgemmPrepacked(tB, n, k), b, ldb, bs, relu, got, ldc)
						if relu {
							for i := 0; i < m; i++ {
								f32.Relu(want[i*ldc:i*ldc+n], want[i*ldc:i*ldc+n])
								for j := 0; j < n; j++ {
									naive[i*n+j] = max(naive[i*n+j], 0)
								}
							}
						}
						sgemmClose(t, name+" vs float64", naive, got, m, n, ldc, k+1)
						for i := range want {
							if math.Float32bits(want[i]) != math.Float32bits(got[i]) {
								require.Equal(t, math.Float32bits(want[i]), math.Float32bits(got[i]), "%s: element %d: epilogue %v, filled bias %v", name, i, got[i], want[i])
							}
						}
						cases++
					}
				}
			}
		}
	}
	t.Logf("%d cases: the epilogue stores the bits of the filled bias and Relu", cases)
}

func BenchmarkSgemmPrepacked(b *testing.B) {
	if !f32.Asm() {
		b.Skip("no AVX2/FMA kernel on this CPU")
	}
	shapes := []struct {
		name    string
		m, n, k int
		tB      bool
	}{
		{"fwd_tB_1x256x100", 1, 256, 100, true},
		{"fwd_tB_1x256x256", 1, 256, 256, true},
		{"fwd_tB_1x10x256", 1, 10, 256, true},
		{"bwd_1x100x256", 1, 100, 256, false},
		{"bwd_1x256x256", 1, 256, 256, false},
		{"fwd_tB_8x256x256", 8, 256, 256, true},
		{"fwd_tB_64x256x100", 64, 256, 100, true},
		{"fwd_tB_64x256x256", 64, 256, 256, true},
		{"fwd_tB_64x10x256", 64, 10, 256, true},
		{"bwd_64x100x256", 64, 100, 256, false},
		{"bwd_64x256x256", 64, 256, 256, false},
		{"bwd_64x256x10", 64, 256, 10, false},
	}
	for _, s := range shapes {
		rng := rand.New(rand.NewPCG(7, 8))
		a, lda, bb, ldb, c, ldc := sgemmOperands(rng, false, s.tB, s.m, s.n, s.k, 0, 0)
		pb := newSgemmPrepacked(s.tB, s.n, s.k)
		flops := 2 * float64(s.m*s.n*s.k)
		b.Run(s.name+"/packed-per-call", func(b *testing.B) {
			b.ReportAllocs()
			cpupeak.Bench(b, flops, func() { sgemm(false, s.tB, s.m, s.n, s.k, 1, a, lda, bb, ldb, 0, c, ldc) })
		})
		b.Run(s.name+"/prepacked", func(b *testing.B) {
			b.ReportAllocs()
			cpupeak.Bench(b, flops, func() { sgemmPre(false, s.m, s.n, s.k, 1, a, lda, pb, bb, ldb, 0, c, ldc) })
		})
	}
}

// sgemmPackBlockARef is the element-by-element sgemmPackBlockA for op(A) =
// A, the reference of TestSgemmPackBlockA and BenchmarkSgemmPackA.
func sgemmPackBlockARef(a []float32, lda, ic, mc, pc, kc int, dst []float32) {
	for ir := 0; ir < mc; ir += sgemmMR {
		mr := min(sgemmMR, mc-ir)
		d := dst[ir*kc : ir*kc+kc*sgemmMR]
		clear(d)
		for r := 0; r < mr; r++ {
			src := a[(ic+ir+r)*lda+pc : (ic+ir+r)*lda+pc+kc]
			for p, v := range src {
				d[p*sgemmMR+r] = v
			}
		}
	}
}

func TestSgemmPackBlockA(t *testing.T) {
	// The strip layout documented at sgemmPackBlockA, written element by
	// element (sgemmPackBlockARef), must come out of the six-row packer
	// unchanged, zero padding included (common practice: a fast path
	// checked against its plain definition).
	rng := rand.New(rand.NewPCG(27, 28))
	for _, s := range [][4]int{{6, 16, 0, 16}, {13, 40, 3, 30}, {64, 300, 0, 256}, {5, 7, 0, 7}, {17, 257, 1, 255}} {
		mc, lda, pc, kc := s[0], s[1], s[2], s[3]
		a := make([]float32, (mc+2)*lda)
		for i := range a {
			a[i] = float32(rng.Float64())
		}
		strips := (mc + sgemmMR - 1) / sgemmMR
		got := make([]float32, strips*sgemmMR*kc)
		want := make([]float32, len(got))
		for i := range got {
			got[i] = float32(math.NaN())
		}
		sgemmPackBlockA(false, a, lda, 1, mc, pc, kc, got)
		sgemmPackBlockARef(a, lda, 1, mc, pc, kc, want)
		for i := range want {
			require.Equal(t, math.Float32bits(want[i]), math.Float32bits(got[i]), "mc=%d lda=%d pc=%d kc=%d: dst[%d]", mc, lda, pc, kc, i)
		}
	}
}

// BenchmarkSgemmPackA times packing mlp-m's 64×256 activations into strips.
func BenchmarkSgemmPackA(b *testing.B) {
	a := make([]float32, 64*256)
	dst := make([]float32, 66*256)
	b.Run("six-rows", func(b *testing.B) {
		for b.Loop() {
			sgemmPackBlockA(false, a, 256, 0, 64, 0, 256, dst)
		}
		b.ReportMetric(float64(len(a)*4)*float64(b.N)/b.Elapsed().Seconds()/1e9, "GB/s")
	})
	b.Run("element-wise", func(b *testing.B) {
		for b.Loop() {
			sgemmPackBlockARef(a, 256, 0, 64, 0, 256, dst)
		}
		b.ReportMetric(float64(len(a)*4)*float64(b.N)/b.Elapsed().Seconds()/1e9, "GB/s")
	})
}

func TestSgemmPackPanelB(t *testing.T) {
	// The strip layout documented at sgemmPackPanelB (dst[s·NR·kc + p·NR + j]
	// = op(B)[pc+p][jc+s·NR+j], zero past column n), written here element by
	// element, must come out of the packer for both layouts of B (common
	// practice: a fast path checked against its plain definition).
	rng := rand.New(rand.NewPCG(29, 30))
	for _, s := range [][5]int{{16, 16, 0, 16, 0}, {40, 33, 3, 30, 1}, {300, 64, 0, 256, 16}, {7, 5, 0, 7, 0}, {257, 40, 1, 255, 17}} {
		ldb, n, pc, kc, jc := s[0], s[1], s[2], s[3], s[4]
		for _, tB := range []bool{false, true} {
			rows := pc + kc
			if tB {
				rows = n
			}
			b := make([]float32, rows*ldb)
			for i := range b {
				b[i] = float32(rng.Float64())
			}
			nc := min(n, ldb) - jc
			if tB {
				nc = n - jc
				if ldb < pc+kc {
					continue
				}
			}
			if nc <= 0 {
				continue
			}
			strips := (nc + sgemmNR - 1) / sgemmNR
			got := make([]float32, strips*sgemmNR*kc)
			for i := range got {
				got[i] = float32(math.NaN())
			}
			sgemmPackPanelB(tB, b, ldb, pc, kc, jc, nc, got)
			for st := 0; st < strips; st++ {
				for p := 0; p < kc; p++ {
					for j := 0; j < sgemmNR; j++ {
						var want float32
						if col := jc + st*sgemmNR + j; col < jc+nc {
							if tB {
								want = b[col*ldb+pc+p]
							} else {
								want = b[(pc+p)*ldb+col]
							}
						}
						g := got[st*sgemmNR*kc+p*sgemmNR+j]
						require.Equal(t, math.Float32bits(want), math.Float32bits(g), "tB=%v ldb=%d n=%d pc=%d kc=%d jc=%d: strip %d p %d j %d", tB, ldb, n, pc, kc, jc, st, p, j)
					}
				}
			}
		}
	}
}

// BenchmarkSgemmPackB times packing a 256×256 panel of B (both layouts) and
// a 27×1024 im2col panel of cnn-m's first conv.
func BenchmarkSgemmPackB(b *testing.B) {
	for _, s := range []struct {
		name       string
		tB         bool
		kc, nc, ld int
	}{{"B_256x256", false, 256, 256, 256}, {"Bt_256x256", true, 256, 256, 256}, {"im2col_27x1024", false, 27, 512, 1024}} {
		src := make([]float32, 1024*1024)
		dst := make([]float32, sgemmKC*sgemmNC)
		b.Run(s.name, func(b *testing.B) {
			for b.Loop() {
				sgemmPackPanelB(s.tB, src, s.ld, 0, s.kc, 0, s.nc, dst)
			}
			b.ReportMetric(float64(s.kc*s.nc*4)*float64(b.N)/b.Elapsed().Seconds()/1e9, "GB/s")
		})
	}
}
