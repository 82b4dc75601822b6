package ops

import (
	"fmt"

	"github.com/apportion/apportion/nn/internal/asm/f32"
)

// sgemmPrepacked holds a B operand that never changes between products (a
// model weight) in the layouts the float32 GEMM reads, each made on the
// first product that needs it instead of on every call:
//
//   - panels: every kc×nc block of op(B) in the strip layout of
//     sgemmPackPanelB, blocks ordered as the packed driver visits them (jc
//     outer, pc inner). Block (jc, pc) starts at jc·k + pc·ncPad, where ncPad
//     is nc rounded up to a multiple of sgemmNR, and its strip jr at a further
//     jr·kc.
//   - rows (tB only): op(B) = Bᵀ stored row-major, k×n with stride n, which
//     the row kernel reads in place for products with few rows; with op(B) =
//     B the row kernel reads B itself.
//
// A program runs one batch size, so one op usually builds one layout: at
// most one extra copy of the weight. Products through sgemmPre round every
// element exactly like sgemm does (same kernels, same k blocks), so an op
// may take either path for any batch size without changing a bit of a row's
// result. A value is used by one goroutine at a time (each machine has its
// own ops), so the lazy building needs no lock.
type sgemmPrepacked struct {
	tB     bool
	k, n   int
	panels []float32
	rows   []float32
}

// newSgemmPrepacked returns an empty prepacked op(B), k×n, transposed when
// tB; nil when the CPU has no packed kernel (callers then use sgemm).
func newSgemmPrepacked(tB bool, n, k int) *sgemmPrepacked {
	if !f32.Asm() || n <= 0 || k <= 0 {
		return nil
	}
	return &sgemmPrepacked{tB: tB, k: k, n: n}
}

// rowsOf returns op(B) row-major with its stride: B itself when op(B) = B,
// else the transposed copy, made from b on first use.
func (p *sgemmPrepacked) rowsOf(b []float32, ldb int) ([]float32, int) {
	if !p.tB {
		return b, ldb
	}
	if p.rows == nil {
		k, n := p.k, p.n
		p.rows = make([]float32, k*n)
		for i := 0; i < k; i++ {
			row := p.rows[i*n : i*n+n]
			for j := range row {
				row[j] = b[j*ldb+i]
			}
		}
	}
	return p.rows, p.n
}

// panelsOf returns the packed panels, made from b on first use.
func (p *sgemmPrepacked) panelsOf(b []float32, ldb int) []float32 {
	if p.panels != nil {
		return p.panels
	}
	k, n := p.k, p.n
	size := 0
	for jc := 0; jc < n; jc += sgemmNC {
		size += k * sgemmRoundNR(min(sgemmNC, n-jc))
	}
	p.panels = make([]float32, size)
	off := 0
	for jc := 0; jc < n; jc += sgemmNC {
		nc := min(sgemmNC, n-jc)
		for pc := 0; pc < k; pc += sgemmKC {
			kc := min(sgemmKC, k-pc)
			sgemmPackPanelB(p.tB, b, ldb, pc, kc, jc, nc, p.panels[off:])
			off += kc * sgemmRoundNR(nc)
		}
	}
	return p.panels
}

// sgemmRoundNR rounds n up to a multiple of sgemmNR.
func sgemmRoundNR(n int) int { return (n + sgemmNR - 1) / sgemmNR * sgemmNR }

// sgemmPre computes C = alpha·op(A)·op(B) + beta·C like sgemm, op(B) k×n
// stored in b (row stride ldb, transposed when pb.tB) and read through pb's
// layouts. b must hold the same values on every call with pb: the layouts
// are made from the first call's b. Warm, it allocates nothing: the packing
// buffer of A and the edge tile come from sgemmBufs.
func sgemmPre(tA bool, m, n, k int, alpha float32, a []float32, lda int, pb *sgemmPrepacked, b []float32, ldb int, beta float32, c []float32, ldc int) {
	if pb.n != n || pb.k != k {
		panic(fmt.Sprintf("nn: sgemm: prepacked B is %d×%d, product needs %d×%d", pb.k, pb.n, k, n))
	}
	sgemmCheck(tA, pb.tB, m, n, k, a, lda, b, ldb, c, ldc)
	if m == 0 || n == 0 {
		return
	}
	if alpha == 0 || k == 0 {
		sgemmScale(m, n, beta, c, ldc)
		return
	}
	if n >= 32 && m < sgemmPreRowsBelow {
		n32 := n &^ 31
		rows, ld := pb.rowsOf(b, ldb)
		sgemmRowsLoop(tA, m, n32, k, alpha, a, lda, rows, ld, beta, c, ldc)
		if n32 < n {
			sgemmPrePanels(tA, m, n32, alpha, a, lda, pb.panelsOf(b, ldb), pb, beta, c, ldc)
		}
		return
	}
	sgemmPrePanels(tA, m, 0, alpha, a, lda, pb.panelsOf(b, ldb), pb, beta, c, ldc)
}

// sgemmPrePanels is the packed driver over pb's panels for the columns j0..n
// of C; j0 must be a multiple of sgemmNR.
func sgemmPrePanels(tA bool, m, j0 int, alpha float32, a []float32, lda int, panels []float32, pb *sgemmPrepacked, beta float32, c []float32, ldc int) {
	n, k := pb.n, pb.k
	scratch := sgemmBufs.Get().(*sgemmScratch)
	defer sgemmBufs.Put(scratch)
	off := 0
	for jc := 0; jc < n; jc += sgemmNC {
		nc := min(sgemmNC, n-jc)
		ncPad := sgemmRoundNR(nc)
		if jc+nc <= j0 {
			off += k * ncPad
			continue
		}
		jr0 := max(j0-jc, 0)
		for pc := 0; pc < k; pc += sgemmKC {
			kc := min(sgemmKC, k-pc)
			bet := beta
			if pc > 0 {
				bet = 1
			}
			bufB := panels[off : off+kc*ncPad]
			off += kc * ncPad
			for ic := 0; ic < m; ic += sgemmMC {
				mc := min(sgemmMC, m-ic)
				sgemmBlock(tA, a, lda, ic, mc, pc, kc, nc, jr0, alpha, bet, scratch.a, bufB, &scratch.tile, c[ic*ldc+jc:], ldc)
			}
		}
	}
}

// sgemmMacro multiplies a packed mc×kc block of A by the columns jr0..nc of
// a packed kc×nc panel of B into C (c[0] is the block's top-left element),
// as C = alpha·A·B + bet·C per register tile.
func sgemmMacro(mc, nc, kc, jr0 int, alpha, bet float32, bufA, bufB []float32, tile *sgemmTile, c []float32, ldc int) {
	for jr := jr0; jr < nc; jr += sgemmNR {
		nr := min(sgemmNR, nc-jr)
		bp := &bufB[jr*kc]
		if f32.WideTiles() && jr+2*sgemmNR <= nc {
			// Two whole strips of B: the 6×32 tile (the strided form reads
			// the packed strips of A), bottom edges through tile.
			sgemmMacroWide(mc, kc, alpha, bet, bufA, bp, &bufB[(jr+sgemmNR)*kc], tile, c[jr:], ldc)
			jr += sgemmNR
			continue
		}
		for ir := 0; ir < mc; ir += sgemmMR {
			mr := min(sgemmMR, mc-ir)
			ap := &bufA[ir*kc]
			ci := ir*ldc + jr
			if mr == sgemmMR && nr == sgemmNR {
				f32.Gemm6x16(kc, ap, bp, &c[ci], ldc, alpha, bet)
				continue
			}
			if nr == sgemmNR {
				// Bottom edge, whole columns: only mr rows of C are touched.
				f32.Gemm6x16Edge(kc, ap, 1, sgemmMR, bp, &c[ci], ldc, alpha, bet, mr)
				continue
			}
			// Edge tile: the kernel updates a full tile loaded with the
			// part of C inside it (the zero-padded panels fill the rest),
			// so edge elements round exactly like interior ones.
			clear(tile[:])
			if bet != 0 {
				for i := 0; i < mr; i++ {
					copy(tile[i*sgemmNR:i*sgemmNR+nr], c[ci+i*ldc:ci+i*ldc+nr])
				}
			}
			f32.Gemm6x16(kc, ap, bp, &tile[0], sgemmNR, alpha, bet)
			for i := 0; i < mr; i++ {
				copy(c[ci+i*ldc:ci+i*ldc+nr], tile[i*sgemmNR:i*sgemmNR+nr])
			}
		}
	}
}

// sgemmMacroWide is sgemmMacro for the two whole strips of B at b0 and b1
// (columns 0..31 of c) on the 6×32 tile, each element's chain that of
// f32.Gemm6x16 on the packed strips.
func sgemmMacroWide(mc, kc int, alpha, bet float32, bufA []float32, b0, b1 *float32, tile *sgemmTile, c []float32, ldc int) {
	const w = 2 * sgemmNR
	for ir := 0; ir < mc; ir += sgemmMR {
		mr := min(sgemmMR, mc-ir)
		ap := &bufA[ir*kc]
		if mr == sgemmMR {
			f32.Gemm6x32Strided(kc, ap, 1, sgemmMR, b0, b1, &c[ir*ldc], ldc, alpha, bet)
			continue
		}
		// The kernel updates a full tile loaded with the rows of C inside
		// it, so edge elements round exactly like interior ones.
		clear(tile[:])
		if bet != 0 {
			for i := 0; i < mr; i++ {
				copy(tile[i*w:(i+1)*w], c[(ir+i)*ldc:(ir+i)*ldc+w])
			}
		}
		f32.Gemm6x32Strided(kc, ap, 1, sgemmMR, b0, b1, &tile[0], w, alpha, bet)
		for i := 0; i < mr; i++ {
			copy(c[(ir+i)*ldc:(ir+i)*ldc+w], tile[i*w:(i+1)*w])
		}
	}
}

// sgemmRowsLoop runs the row kernel over the first n columns of C (n a
// multiple of 32) for each of the m rows, reading op(B) = B in place; the k
// blocks are those of the packed driver.
func sgemmRowsLoop(tA bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	for i := 0; i < m; i++ {
		// Row i of op(A): A[i][p] = a[i·lda+p], or Aᵀ[i][p] = a[p·lda+i].
		off, inc := i*lda, 1
		if tA {
			off, inc = i, lda
		}
		for pc := 0; pc < k; pc += sgemmKC {
			kc := min(sgemmKC, k-pc)
			bet := beta
			if pc > 0 {
				bet = 1
			}
			j := 0
			if f32.WideTiles() {
				// Four blocks of 32 at once: the same chains, more of them
				// in flight.
				for ; j+128 <= n; j += 128 {
					f32.Gemm1x128(kc, &a[off+pc*inc], inc, &b[pc*ldb+j], ldb, &c[i*ldc+j], alpha, bet)
				}
			}
			for ; j < n; j += 32 {
				f32.Gemm1x32(kc, &a[off+pc*inc], inc, &b[pc*ldb+j], ldb, &c[i*ldc+j], alpha, bet)
			}
		}
	}
}

// sgemmBlock multiplies rows ic..ic+mc, columns pc..pc+kc of op(A) by the
// columns jr0..nc of a packed kc×nc panel of B into C (c[0] is the element
// of row ic and the panel's first column). With op(A) = A and the strided
// kernel, full strips of A are read in place and only a last strip of
// fewer than sgemmMR rows is packed; otherwise the block is packed into
// bufA. Either way every element gets the same chain of fused
// multiply-adds.
func sgemmBlock(tA bool, a []float32, lda, ic, mc, pc, kc, nc, jr0 int, alpha, bet float32, bufA, bufB []float32, tile *sgemmTile, c []float32, ldc int) {
	if tA {
		sgemmPackBlockA(tA, a, lda, ic, mc, pc, kc, bufA)
		sgemmMacro(mc, nc, kc, jr0, alpha, bet, bufA, bufB, tile, c, ldc)
		return
	}
	full := mc / sgemmMR * sgemmMR
	if full < mc {
		// The partial strip goes through sgemmMacro on its packed copy.
		sgemmPackBlockA(false, a, lda, ic+full, mc-full, pc, kc, bufA)
		sgemmMacro(mc-full, nc, kc, jr0, alpha, bet, bufA, bufB, tile, c[full*ldc:], ldc)
	}
	for jr := jr0; jr < nc; jr += sgemmNR {
		nr := min(sgemmNR, nc-jr)
		bp := &bufB[jr*kc]
		if f32.WideTiles() && jr+2*sgemmNR <= nc {
			// Two whole strips of B side by side: the 6×32 tile.
			for ir := 0; ir < full; ir += sgemmMR {
				f32.Gemm6x32Strided(kc, &a[(ic+ir)*lda+pc], lda, 1, bp, &bufB[(jr+sgemmNR)*kc], &c[ir*ldc+jr], ldc, alpha, bet)
			}
			jr += sgemmNR
			continue
		}
		for ir := 0; ir < full; ir += sgemmMR {
			ap := &a[(ic+ir)*lda+pc]
			ci := ir*ldc + jr
			if nr == sgemmNR {
				f32.Gemm6x16Strided(kc, ap, lda, 1, bp, &c[ci], ldc, alpha, bet)
				continue
			}
			// Edge tile, as in sgemmMacro.
			clear(tile[:])
			if bet != 0 {
				for i := 0; i < sgemmMR; i++ {
					copy(tile[i*sgemmNR:i*sgemmNR+nr], c[ci+i*ldc:ci+i*ldc+nr])
				}
			}
			f32.Gemm6x16Strided(kc, ap, lda, 1, bp, &tile[0], sgemmNR, alpha, bet)
			for i := 0; i < sgemmMR; i++ {
				copy(c[ci+i*ldc:ci+i*ldc+nr], tile[i*sgemmNR:i*sgemmNR+nr])
			}
		}
	}
}

// sgemmEpilogueFits reports whether sgemmPreEpilogue runs an m×n×k product:
// on the wide tiles, with one k block (so the bias and the Relu apply as
// each element's single chain ends), at least one pair of whole strips of
// B, and enough rows that sgemmPre would take its packed driver.
func sgemmEpilogueFits(m, n, k int) bool {
	return f32.WideTiles() && k <= sgemmKC && n >= 2*sgemmNR && m >= sgemmPreRowsBelow
}

// sgemmPreEpilogue computes C = op(A)·op(B) + bias, then max(·, 0) when
// relu, for op(A) = A and a prepacked op(B), where sgemmEpilogueFits: the
// dense layer of a model, bias nil for none. Every element gets the bits of
// sgemmPre with beta = 1 on C holding the bias rows, then f32.Relu, and the
// same chain as in any other product; but the columns in pairs of whole
// strips take f32.Gemm6x32Bias, which adds the bias and applies the Relu
// as it stores the tile, so C is neither filled first nor read back. The
// columns past the last pair go through sgemmPrePanels on C filled with
// the bias there. Warm, it allocates nothing.
func sgemmPreEpilogue(m, n, k int, a []float32, lda int, pb *sgemmPrepacked, b []float32, ldb int, bias []float32, relu bool, c []float32, ldc int) {
	if pb.n != n || pb.k != k || !sgemmEpilogueFits(m, n, k) {
		panic(fmt.Sprintf("nn: sgemm: epilogue product %d×%d×%d with prepacked B %d×%d", m, n, k, pb.k, pb.n))
	}
	sgemmCheck(false, pb.tB, m, n, k, a, lda, b, ldb, c, ldc)
	if bias != nil && len(bias) != n {
		panic(fmt.Sprintf("nn: sgemm: bias of %d values for %d columns", len(bias), n))
	}
	panels := pb.panelsOf(b, ldb)
	n32 := n &^ (2*sgemmNR - 1)
	if n32 < n {
		var beta float32
		if bias != nil {
			for i := 0; i < m; i++ {
				copy(c[i*ldc+n32:i*ldc+n], bias[n32:])
			}
			beta = 1
		}
		sgemmPrePanels(false, m, n32, 1, a, lda, panels, pb, beta, c, ldc)
		if relu {
			for i := 0; i < m; i++ {
				f32.Relu(c[i*ldc+n32:i*ldc+n], c[i*ldc+n32:i*ldc+n])
			}
		}
	}
	scratch := sgemmBufs.Get().(*sgemmScratch)
	defer sgemmBufs.Put(scratch)
	biasAt := func(j int) *float32 {
		if bias == nil {
			return nil
		}
		return &bias[j]
	}
	const w = 2 * sgemmNR
	for ic := 0; ic < m; ic += sgemmMC {
		mc := min(sgemmMC, m-ic)
		full := mc / sgemmMR * sgemmMR
		for jr := 0; jr < n32; jr += w {
			// One k block: the strip of column j starts at panels[j·k].
			b0, b1 := &panels[jr*k], &panels[(jr+sgemmNR)*k]
			for ir := 0; ir < full; ir += sgemmMR {
				i := ic + ir
				f32.Gemm6x32Bias(k, &a[i*lda], lda, 1, b0, b1, &c[i*ldc+jr], ldc, biasAt(jr), relu)
			}
			if full == mc {
				continue
			}
			// The last rows: A's rows copied into a zero-padded strip, the
			// tile stored aside and its rows copied out.
			mr := mc - full
			i0 := ic + full
			strip := scratch.a[:sgemmMR*k]
			clear(strip[mr*k:])
			for r := 0; r < mr; r++ {
				copy(strip[r*k:(r+1)*k], a[(i0+r)*lda:(i0+r)*lda+k])
			}
			f32.Gemm6x32Bias(k, &strip[0], k, 1, b0, b1, &scratch.tile[0], w, biasAt(jr), relu)
			for r := 0; r < mr; r++ {
				copy(c[(i0+r)*ldc+jr:(i0+r)*ldc+jr+w], scratch.tile[r*w:(r+1)*w])
			}
		}
	}
}
