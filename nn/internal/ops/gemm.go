package ops

import (
	"github.com/apportion/apportion/nn/internal/asm/f32"

	"fmt"
	"sync"

	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/blas32"
)

// Register tile and cache blocks of the packed float32 GEMM (Goto and van de
// Geijn 2008, "Anatomy of high-performance matrix multiplication", §4): a
// sgemmMR×sgemmNR tile of C lives in 12 YMM registers while the kernel
// streams a sgemmKC-deep sliver of packed A and B; a sgemmMC×sgemmKC block
// of A stays in L2 and a sgemmKC×sgemmNC panel of B in L3: a 6×256 strip of
// A (6 KiB) and a 256×16 strip of B (16 KiB) fit a 32 KiB L1d together.
// sgemmKC also sets where each element's chain of fused multiply-adds
// restarts, so changing it changes the bits of products with k > sgemmKC.
// DEVELOPERS.md gives the measurements behind the block sizes.
const (
	sgemmMR = 6
	sgemmNR = 16
	sgemmKC = 256
	sgemmMC = 96  // multiple of sgemmMR
	sgemmNC = 512 // multiple of sgemmNR

	// Products with op(B) = B and fewer rows than sgemmRowsBelow skip
	// packing (sgemmRows); with a prepacked B (sgemmPre), products with
	// fewer than sgemmPreRowsBelow rows: there the row kernel beats packing
	// (BenchmarkSgemm; the figures are in DEVELOPERS.md).
	sgemmRowsBelow    = sgemmMR
	sgemmPreRowsBelow = 3
)

// sgemmBufs pools the packing buffers, so a call allocates
// nothing once the pools are warm and concurrent calls never share one.
var sgemmBufs = sync.Pool{New: func() any {
	return &sgemmScratch{a: make([]float32, sgemmMC*sgemmKC), b: make([]float32, sgemmKC*sgemmNC)}
}}

// sgemmScratch is one call's packing buffers and edge tile.
type sgemmScratch struct {
	a, b []float32
	tile sgemmTile
}

// sgemmTile is the scratch of one edge tile of sgemmMR rows, up to two
// strips (2·sgemmNR columns) wide.
type sgemmTile [sgemmMR * 2 * sgemmNR]float32

// sgemm computes C = alpha·op(A)·op(B) + beta·C for row-major matrices with
// the semantics of gonum's blas32 Sgemm: op(X) is X or Xᵀ as tA, tB say,
// op(A) is m×k, op(B) is k×n, C is m×n, and lda, ldb, ldc are the row
// strides of the stored matrices. When beta == 0 the old contents of C are
// not read, so NaN there is overwritten. It runs the packed kernels of
// package f32 where they run in assembly (f32.Asm) and gonum's BLAS
// otherwise. Bad dimensions panic like gonum's; callers validate shapes
// first.
//
// With the kernels, each element of C is the same chain of fused
// multiply-adds whatever m, n and its position in C, so a row of a batched
// product is bit-identical to the same row computed alone (requests
// coalesced into one batch rely on this). That is why small products are
// not routed to gonum, whose sums round differently (and, with both
// operands transposed, differently for different m). Every path keeps the
// chain: f32.Gemm6x16 on packed strips of A, f32.Gemm6x16Strided on A in
// place, the row kernel f32.Gemm1x32, and sgemmPre on a prepacked B. Each chain starts at zero
// for every sgemmKC-deep block of k; a block ends with alpha·T (exact and
// skipped when alpha == 1) added to beta·C (beta = 1 after the first block).
func sgemm(tA, tB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	if !f32.Asm() {
		sgemmGonum(tA, tB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
		return
	}
	sgemmPacked(tA, tB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
}

// sgemmGonum is sgemm through gonum's pure-Go BLAS.
func sgemmGonum(tA, tB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	ta, tb := blas.NoTrans, blas.NoTrans
	if tA {
		ta = blas.Trans
	}
	if tB {
		tb = blas.Trans
	}
	blas32.Implementation().Sgemm(ta, tb, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
}

// sgemmCheck panics unless the stored matrices hold op(A) m×k, op(B) k×n
// and C m×n with the given strides: the kernel writes through pointers, so
// every index it touches must be inside the slices.
func sgemmCheck(tA, tB bool, m, n, k int, a []float32, lda int, b []float32, ldb int, c []float32, ldc int) {
	ra, ca := m, k
	if tA {
		ra, ca = k, m
	}
	rb, cb := k, n
	if tB {
		rb, cb = n, k
	}
	need := func(name string, rows, cols, ld, have int) {
		if rows < 0 || cols < 0 || ld < max(cols, 1) {
			panic(fmt.Sprintf("nn: sgemm: %s is %d×%d with stride %d", name, rows, cols, ld))
		}
		if rows > 0 && cols > 0 && have < (rows-1)*ld+cols {
			panic(fmt.Sprintf("nn: sgemm: %s %d×%d with stride %d needs %d elements, have %d", name, rows, cols, ld, (rows-1)*ld+cols, have))
		}
	}
	need("A", ra, ca, lda, len(a))
	need("B", rb, cb, ldb, len(b))
	need("C", m, n, ldc, len(c))
}

// sgemmPacked is sgemm through the packed kernels of package f32.
func sgemmPacked(tA, tB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	sgemmCheck(tA, tB, m, n, k, a, lda, b, ldb, c, ldc)
	if m == 0 || n == 0 {
		return
	}
	if alpha == 0 || k == 0 {
		sgemmScale(m, n, beta, c, ldc)
		return
	}
	if !tB && n >= 32 && m < sgemmRowsBelow {
		sgemmRows(tA, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
		return
	}
	scratch := sgemmBufs.Get().(*sgemmScratch)
	defer sgemmBufs.Put(scratch)
	for jc := 0; jc < n; jc += sgemmNC {
		nc := min(sgemmNC, n-jc)
		for pc := 0; pc < k; pc += sgemmKC {
			kc := min(sgemmKC, k-pc)
			// Later k-blocks add to what the first one stored.
			bet := beta
			if pc > 0 {
				bet = 1
			}
			sgemmPackPanelB(tB, b, ldb, pc, kc, jc, nc, scratch.b)
			for ic := 0; ic < m; ic += sgemmMC {
				mc := min(sgemmMC, m-ic)
				sgemmBlock(tA, a, lda, ic, mc, pc, kc, nc, 0, alpha, bet, scratch.a, scratch.b, &scratch.tile, c[ic*ldc+jc:], ldc)
			}
		}
	}
}

// sgemmRows computes sgemm for products with few rows and op(B) = B
// without packing: packing B would cost as much as the product. Columns
// past the last multiple of 32 go through the packed path. The k blocks are
// those of the packed path, so every element rounds the same either way.
func sgemmRows(tA bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	n32 := n &^ 31
	sgemmRowsLoop(tA, m, n32, k, alpha, a, lda, b, ldb, beta, c, ldc)
	if n32 < n {
		sgemmPacked(tA, false, m, n-n32, k, alpha, a, lda, b[n32:], ldb, beta, c[n32:], ldc)
	}
}

// sgemmScale sets C = beta·C, writing zeros without reading C when beta == 0.
func sgemmScale(m, n int, beta float32, c []float32, ldc int) {
	for i := 0; i < m; i++ {
		row := c[i*ldc : i*ldc+n]
		if beta == 0 {
			clear(row)
			continue
		}
		for j := range row {
			row[j] *= beta
		}
	}
}

// sgemmPackBlockA packs rows ic..ic+mc, columns pc..pc+kc of op(A) into
// strips of sgemmMR rows: strip s holds, for each p < kc, the sgemmMR values
// op(A)[ic+s·MR+r][pc+p] at dst[s·MR·kc + p·MR + r], zero past row m.
func sgemmPackBlockA(tA bool, a []float32, lda, ic, mc, pc, kc int, dst []float32) {
	for ir := 0; ir < mc; ir += sgemmMR {
		mr := min(sgemmMR, mc-ir)
		d := dst[ir*kc : ir*kc+kc*sgemmMR]
		i0 := ic + ir
		if tA {
			// op(A)[i][p] = A[p][i]: each p is a contiguous run of rows.
			for p := 0; p < kc; p++ {
				src := a[(pc+p)*lda+i0 : (pc+p)*lda+i0+mr]
				dp := d[p*sgemmMR : p*sgemmMR+sgemmMR]
				copy(dp, src)
				clear(dp[mr:])
			}
			continue
		}
		if mr == sgemmMR {
			// Six rows read side by side, d written in order.
			o := i0*lda + pc
			r0 := a[o : o+kc]
			r1 := a[o+lda : o+lda+kc][:len(r0)]
			r2 := a[o+2*lda : o+2*lda+kc][:len(r0)]
			r3 := a[o+3*lda : o+3*lda+kc][:len(r0)]
			r4 := a[o+4*lda : o+4*lda+kc][:len(r0)]
			r5 := a[o+5*lda : o+5*lda+kc][:len(r0)]
			for p := range r0 {
				q := d[p*sgemmMR : p*sgemmMR+sgemmMR : p*sgemmMR+sgemmMR]
				q[0], q[1], q[2], q[3], q[4], q[5] = r0[p], r1[p], r2[p], r3[p], r4[p], r5[p]
			}
			continue
		}
		clear(d)
		for r := 0; r < mr; r++ {
			src := a[(i0+r)*lda+pc : (i0+r)*lda+pc+kc]
			for p, v := range src {
				d[p*sgemmMR+r] = v
			}
		}
	}
}

// sgemmPackPanelB packs rows pc..pc+kc, columns jc..jc+nc of op(B) into
// strips of sgemmNR columns: strip s holds, for each p < kc, the sgemmNR
// values op(B)[pc+p][jc+s·NR+j] at dst[s·NR·kc + p·NR + j], zero past
// column n.
func sgemmPackPanelB(tB bool, b []float32, ldb, pc, kc, jc, nc int, dst []float32) {
	for jr := 0; jr < nc; jr += sgemmNR {
		nr := min(sgemmNR, nc-jr)
		d := dst[jr*kc : jr*kc+kc*sgemmNR]
		j0 := jc + jr
		if !tB {
			if nr == sgemmNR && kc > 0 {
				// Bounds checked here for the whole strip, copied by the kernel.
				last := (pc+kc-1)*ldb + j0
				_ = b[last+sgemmNR-1]
				_ = d[kc*sgemmNR-1]
				f32.CopyRows16(&b[pc*ldb+j0], ldb, &d[0], kc)
				continue
			}
			for p := 0; p < kc; p++ {
				src := b[(pc+p)*ldb+j0 : (pc+p)*ldb+j0+nr]
				dp := d[p*sgemmNR : p*sgemmNR+sgemmNR]
				copy(dp, src)
				clear(dp[nr:])
			}
			continue
		}
		// op(B)[p][j] = B[j][p]: each column j is a contiguous run.
		if nr < sgemmNR {
			clear(d)
		}
		if nr == sgemmNR {
			// 8×8 blocks transposed in registers, the k tail by hand.
			k8 := kc &^ 7
			for jb := 0; jb < sgemmNR; jb += 8 {
				for p := 0; p < k8; p += 8 {
					src := b[(j0+jb)*ldb+pc+p : (j0+jb+7)*ldb+pc+p+8]
					f32.Transpose8x8(&src[0], ldb, &d[p*sgemmNR+jb], sgemmNR)
				}
			}
			for j := 0; j < nr; j++ {
				for p := k8; p < kc; p++ {
					d[p*sgemmNR+j] = b[(j0+j)*ldb+pc+p]
				}
			}
			continue
		}
		for j := 0; j < nr; j++ {
			src := b[(j0+j)*ldb+pc : (j0+j)*ldb+pc+kc]
			for p, v := range src {
				d[p*sgemmNR+j] = v
			}
		}
	}
}
