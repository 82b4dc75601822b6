package ops

import "github.com/apportion/apportion/nn/internal/asm/f32"

// A float32 convolution driver on the packed GEMM of gemm.go that
// never materialises the im2col matrix: for one sample and one group it
// computes Y = W·im2col(X) (M = output channels, N = output positions,
// K = input channels × kernel) strip by strip, sgemmNR output positions at
// a time. With a unit column stride, row p = (ci, i, j) of a strip is 16
// contiguous values of the padded image at a fixed offset, so
// f32.Conv6x16 reads the strip in place through a table of offsets, and
// f32.Conv6x32 (f32.Conv4x32, f32.Conv8x32 for blocks of 4 rows) two
// strips side by side (twice the independent chains of fused
// multiply-adds, each weight loaded once for both); other strides pack it
// (sconvPackStrip, the sgemmPackPanelB layout). Every block of rows of the
// packed weights (sconvBlock) runs against a strip while it is in L1. The
// weights are packed once per op instance (they are model constants), one
// strip per block in the sgemmPackBlockA layout over the whole K, so each output
// element is one chain of fused multiply-adds over p = 0..K−1 plus the bias
// added with one rounding when the tile is stored, whatever else is in the
// batch.
//
// Orientation: output channels are the M side. Without the 4-row kernels
// that wastes 2 of 18 kernel rows for 16 channels, but the kernel writes
// straight into NCHW rows and one strip of positions serves every channel
// tile while it is in L1.
// The transposed orientation (M = positions, N = channels, a transposed
// write-back) measured slower on every cnn shape (BenchmarkConvOrientation;
// the figures are in DEVELOPERS.md).

// sconvGeom is the geometry of the driver: an input of c channels of
// hp×wp already padded (the pads of the convolution have been applied, so
// every window is inside the image), kh×kw kernels with dilations dh, dw,
// strides sh, sw, and an output of oh×ow.
type sconvGeom struct {
	c, hp, wp int
	kh, kw    int
	dh, dw    int
	sh, sw    int
	oh, ow    int
}

// k returns the inner dimension of the product: c·kh·kw.
func (g *sconvGeom) k() int { return g.c * g.kh * g.kw }

// sconvPackedLen returns the length of the packed weights of m rows and k
// columns: one strip of sgemmMR rows of k values per block (sconvBlock).
func sconvPackedLen(m, k int) int {
	strips := 0
	for ir := 0; ir < m; ir += sconvBlock(m, ir) {
		strips++
	}
	return strips * sgemmMR * k
}

// sconvPackWeights packs the m×k row-major matrix w into dst
// (sconvPackedLen(m, k) elements) as one strip per block of rows
// (sconvBlock), each over the whole k in the layout of sgemmPackBlockA with
// kc = k: strip s, at s·sgemmMR·k, holds the sgemmMR values of column p at
// p·sgemmMR, zeros past the block's last valid row.
func sconvPackWeights(w []float32, m, k int, dst []float32) {
	for ir, s := 0, 0; ir < m; s++ {
		blk := sconvBlock(m, ir)
		sgemmPackBlockA(false, w, k, ir, min(blk, m-ir), 0, k, dst[s*sgemmMR*k:])
		ir += blk
	}
}

// sconvBlock returns the rows of the block of the product's m rows (output
// channels) that starts at row ir: sgemmMR for the 6-row kernels, or 4
// where the CPU has 4-row kernels (f32.WideTiles) and that wastes fewer
// rows: every block when m is a multiple of 8 but not of 6 (pairs of them
// run as f32.Conv8x32), else the last 4 or fewer and the last 7 or 8 as two
// blocks of 4. A block starts at most 4 rows before m, so a 6-row kernel on
// any block reads and writes inside buffers of m rounded up to a multiple
// of sgemmMR (m mod 6 is 2 or 4 wherever blocks of 4 start inside).
func sconvBlock(m, ir int) int {
	if !f32.WideTiles() {
		return sgemmMR
	}
	if left := m - ir; m%8 == 0 && m%sgemmMR != 0 || left <= 4 || left == 7 || left == 8 {
		return 4
	}
	return sgemmMR
}

// sconvPad copies the c channels of x (h×w each) into dst (c channels of
// (h+pt+pb)×(w+pl+pr)), with zeros in the padding. A negative pad crops
// that many rows or columns instead.
func sconvPad(x []float32, c, h, w, pt, pb, pl, pr int, dst []float32) {
	hp, wp := h+pt+pb, w+pl+pr
	// Destination columns [c0, c1) read source columns c0−pl ... c1−1−pl.
	c0, c1 := max(pl, 0), min(wp, w+pl)
	for ci := 0; ci < c; ci++ {
		xc := x[ci*h*w : (ci+1)*h*w]
		dc := dst[ci*hp*wp : (ci+1)*hp*wp]
		for r := 0; r < hp; r++ {
			d := dc[r*wp : (r+1)*wp]
			sr := r - pt
			if sr < 0 || sr >= h || c0 >= c1 {
				clear(d)
				continue
			}
			clear(d[:c0])
			copy(d[c0:c1], xc[sr*w+c0-pl:sr*w+c1-pl])
			clear(d[c1:])
		}
	}
}

// sconvPackStrip packs the sgemmNR columns q0..q0+sgemmNR−1 of im2col(xp)
// (output positions q = oy·ow + ox, nr of them valid, zeros past them)
// into dst in the sgemmPackPanelB layout: dst[p·NR + t] =
// xp[ci, oy·sh + i·dh, ox·sw + j·dw] for p = (ci·kh + i)·kw + j.
func sconvPackStrip(g *sconvGeom, xp []float32, q0, nr int, dst []float32) {
	k := g.k()
	dst = dst[:k*sgemmNR]
	plane := g.hp * g.wp
	oy0, ox0 := q0/g.ow, q0%g.ow
	if nr == sgemmNR && g.sw == 1 && ox0+sgemmNR <= g.ow {
		// The whole strip lies in one output row: each p is one run of 16
		// contiguous input values.
		p := 0
		for ci := 0; ci < g.c; ci++ {
			for i := 0; i < g.kh; i++ {
				row := xp[ci*plane+(oy0*g.sh+i*g.dh)*g.wp+ox0:]
				for j := 0; j < g.kw; j++ {
					*(*[sgemmNR]float32)(dst[p*sgemmNR:]) = *(*[sgemmNR]float32)(row[j*g.dw:])
					p++
				}
			}
		}
		return
	}
	if nr < sgemmNR {
		clear(dst)
	}
	// Segments of the strip, one per output row it touches.
	for t0 := 0; t0 < nr; {
		oy, ox := (q0+t0)/g.ow, (q0+t0)%g.ow
		cnt := min(nr-t0, g.ow-ox)
		p := 0
		for ci := 0; ci < g.c; ci++ {
			for i := 0; i < g.kh; i++ {
				row := xp[ci*plane+(oy*g.sh+i*g.dh)*g.wp:]
				for j := 0; j < g.kw; j++ {
					d := dst[p*sgemmNR+t0 : p*sgemmNR+t0+cnt]
					p++
					base := ox*g.sw + j*g.dw
					if g.sw == 1 {
						copy(d, row[base:base+cnt])
						continue
					}
					for t := range d {
						d[t] = row[base+t*g.sw]
					}
				}
			}
		}
		t0 += cnt
	}
}

// Strip modes of a geometry (sconvPlan.mode).
const (
	// sconvRows: unit column stride and ow a multiple of sgemmNR, so every
	// strip lies in one output row, is read in place as k runs of 16
	// contiguous inputs, and the kernel writes straight into the output rows.
	sconvRows = iota
	// sconvGrid: unit strides, ow not a multiple of sgemmNR. Output
	// positions run over the padded width, q' = oy·wp + ox, so im2col row p
	// is the padded image shifted by off[p] and every strip is again k runs
	// of 16 read in place; the wp − ow columns past each row are computed and dropped when
	// the result is copied out of a scratch matrix.
	sconvGrid
	// sconvStrided: other strides, packed element by element.
	sconvStrided
)

// sconvNW is the width of the widest convolution tile, f32.Conv6x32: two
// strips of sgemmNR output positions.
const sconvNW = 2 * sgemmNR

// sconvRowNW is the width of the one-row convolution tile, f32.Conv1x128.
const sconvRowNW = 128

// sconvTile is the scratch of one edge tile of the driver, for tiles of
// sgemmMR rows up to sconvNW wide.
type sconvTile [sgemmMR * sconvNW]float32

// sconvPlan is the per-geometry state of the driver: the strip mode and the
// offset of each im2col row p = (ci·kh + i)·kw + j in the padded image,
// off[p] = ci·hp·wp + i·dh·wp + j·dw.
type sconvPlan struct {
	g    sconvGeom
	mode int
	off  []int32
	pq   int // sconvGrid: grid positions oh·wp rounded up to sgemmNR
}

// sconvPlanFits reports whether the offsets of g fit in int32
// (f32.Conv6x16 reads them as such).
func sconvPlanFits(g *sconvGeom) bool {
	return int64(g.c)*int64(g.hp)*int64(g.wp)+int64(g.wp)+2*sgemmNR < 1<<31
}

// init sets the plan up for g, reusing its offset table.
func (pl *sconvPlan) init(g sconvGeom) {
	pl.g = g
	switch {
	case g.sw == 1 && g.ow%sgemmNR == 0:
		pl.mode = sconvRows
	case g.sw == 1 && g.sh == 1:
		pl.mode = sconvGrid
	default:
		pl.mode = sconvStrided
	}
	if !sconvPlanFits(&g) {
		pl.mode = sconvStrided
	}
	k := g.k()
	if cap(pl.off) < k {
		pl.off = make([]int32, k)
	}
	pl.off = pl.off[:k]
	p := 0
	for ci := 0; ci < g.c; ci++ {
		for i := 0; i < g.kh; i++ {
			for j := 0; j < g.kw; j++ {
				pl.off[p] = int32(ci*g.hp*g.wp + i*g.dh*g.wp + j*g.dw)
				p++
			}
		}
	}
	pl.pq = (g.oh*g.wp + sgemmNR - 1) / sgemmNR * sgemmNR
}

// padLen returns the length of the padded-input buffer the plan reads:
// the padded image plus, for sconvGrid, the slack the last strip reads past
// it (zeros; those columns are dropped).
func (pl *sconvPlan) padLen() int {
	n := pl.g.c * pl.g.hp * pl.g.wp
	if pl.mode == sconvGrid {
		n += pl.g.wp + 2*sgemmNR
	}
	return n
}

// needsPad reports whether the input must be copied into the padded
// buffer even without padding (sconvGrid reads past the image).
func (pl *sconvPlan) needsPad() bool { return pl.mode == sconvGrid }

// scratchLen returns the length of the output scratch matrix of m rows
// (sconvGrid only: m rounded up to sgemmMR rows of pq positions).
func (pl *sconvPlan) scratchLen(m int) int {
	if pl.mode != sconvGrid {
		return 0
	}
	return (m + sgemmMR - 1) / sgemmMR * sgemmMR * pl.pq
}

// sconvSample computes y (m rows of oh·ow, row-major) = W·im2col(xp) + b
// for one sample and group with the packed weights wp
// (sconvPackWeights of the m×k matrix) and bias b (nil, or m values padded
// with zeros to a multiple of sgemmMR). xp holds pl.padLen() elements for
// sconvGrid and the padded image otherwise; strip is scratch of k·sgemmNR
// elements (used by sconvStrided), cs of pl.scratchLen(m), and tile one
// edge tile, kept by the caller from call to call.
func sconvSample(pl *sconvPlan, xp, wp []float32, m int, b, y, strip, cs []float32, tile *sconvTile) {
	g := &pl.g
	k := g.k()
	strip = strip[:k*sgemmNR]
	if len(xp) < pl.padLen() || len(pl.off) != k || b != nil && len(b) < (m+sgemmMR-1)/sgemmMR*sgemmMR {
		panic("nn: sconvSample: padded input, bias or plan does not fit the geometry")
	}
	switch pl.mode {
	case sconvGrid:
		sconvGridSample(pl, xp, wp, m, b, y, cs)
	case sconvRows:
		sconvRowsSample(pl, xp, wp, m, b, y, tile)
	default:
		sconvStridedSample(pl, xp, wp, m, b, y, strip, tile)
	}
}

// sconvRowsSample is sconvSample for sconvRows: the kernel reads each strip
// in place and stores whole tiles straight into y, two strips at a time
// (f32.Conv6x32; the last one alone when the count is odd), each block of
// rows (sconvBlock) by its kernel, f32.Conv4x32 for blocks of 4, and edge
// tiles (fewer valid rows than the kernel stores) through tile.
func sconvRowsSample(pl *sconvPlan, xp, wp []float32, m int, b, y []float32, tile *sconvTile) {
	g := &pl.g
	k := g.k()
	p := g.oh * g.ow
	for q0 := 0; q0 < p; q0 += sconvNW {
		nw := min(sconvNW, p-q0)
		xb0 := &xp[sconvRowsStart(g, q0)]
		xb1 := xb0
		if nw == sconvNW {
			xb1 = &xp[sconvRowsStart(g, q0+sgemmNR)]
		}
		for ir, s := 0, 0; ir < m; s++ {
			blk := sconvBlock(m, ir)
			a := &wp[s*sgemmMR*k]
			var bp *float32
			if b != nil {
				bp = &b[ir]
			}
			// rows is how many rows the kernel stores: fewer valid ones
			// go through tile.
			mr, rows := min(blk, m-ir), sgemmMR
			if nw == sconvNW && blk < sgemmMR {
				rows = blk
			}
			c, ldc := &y[ir*p+q0], p
			if mr < rows {
				c, ldc = &tile[0], nw
			}
			switch {
			case sconvPair(m, ir, nw):
				f32.Conv8x32(k, a, &wp[(s+1)*sgemmMR*k], xb0, xb1, &pl.off[0], c, ldc, bp)
				ir, s = ir+blk, s+1
			case nw < sconvNW:
				f32.Conv6x16(k, a, xb0, &pl.off[0], c, ldc, bp)
			case rows < sgemmMR:
				f32.Conv4x32(k, a, xb0, xb1, &pl.off[0], c, ldc, bp)
			default:
				f32.Conv6x32(k, a, xb0, xb1, &pl.off[0], c, ldc, bp)
			}
			if mr < rows {
				for r := 0; r < mr; r++ {
					copy(y[(ir+r)*p+q0:(ir+r)*p+q0+nw], tile[r*nw:(r+1)*nw])
				}
			}
			ir += blk
		}
	}
}

// sconvPair reports whether the block at row ir and the next one run
// together as f32.Conv8x32 on a block of nw positions: two blocks of 4
// valid rows each, 32 positions wide.
func sconvPair(m, ir, nw int) bool {
	return nw == sconvNW && m-ir >= 8 && sconvBlock(m, ir) == 4 && sconvBlock(m, ir+4) == 4
}

// sconvRowsStart returns where, in the padded image, the strip of output
// positions q0..q0+sgemmNR−1 (one output row, sconvRows) reads its first
// im2col row.
func sconvRowsStart(g *sconvGeom, q0 int) int {
	oy, ox := q0/g.ow, q0%g.ow
	return oy*g.sh*g.wp + ox
}

// sconvStridedSample is sconvSample for sconvStrided: each strip is packed
// by sconvPackStrip and multiplied by f32.Gemm6x16, with the bias loaded into
// the tile and added by the beta = 1 store (the rounding of
// f32.Conv6x16's bias).
func sconvStridedSample(pl *sconvPlan, xp, wp []float32, m int, b, y, strip []float32, tile *sconvTile) {
	g := &pl.g
	k := g.k()
	p := g.oh * g.ow
	var beta float32
	if b != nil {
		beta = 1
	}
	for q0 := 0; q0 < p; q0 += sgemmNR {
		nr := min(sgemmNR, p-q0)
		sconvPackStrip(g, xp, q0, nr, strip)
		for ir, s := 0, 0; ir < m; s++ {
			blk := sconvBlock(m, ir)
			mr := min(blk, m-ir)
			if b != nil {
				for r := 0; r < sgemmMR; r++ {
					bv := b[ir+r]
					row := tile[r*sgemmNR : (r+1)*sgemmNR]
					for t := range row {
						row[t] = bv
					}
				}
			}
			f32.Gemm6x16(k, &wp[s*sgemmMR*k], &strip[0], &tile[0], sgemmNR, 1, beta)
			for r := 0; r < mr; r++ {
				copy(y[(ir+r)*p+q0:(ir+r)*p+q0+nr], tile[r*sgemmNR:r*sgemmNR+nr])
			}
			ir += blk
		}
	}
}

// sconvGridSample is sconvSample for sconvGrid: the kernel writes whole
// tiles, bias included, two strips at a time as in sconvRowsSample (a row
// of 128 positions at a time for one output channel), of the
// scratch matrix cs (rows rounded up to sgemmMR, pq grid positions), and
// the valid positions are copied to y.
func sconvGridSample(pl *sconvPlan, xp, wp []float32, m int, b, y, cs []float32) {
	g := &pl.g
	k := g.k()
	pq := pl.pq
	cs = cs[:pl.scratchLen(m)]
	q1 := 0 // where the tiles of 32 or 16 positions start
	if m == 1 && f32.WideTiles() {
		// One output channel (the input gradient of a one-channel image):
		// a row of 128 positions per call, eight chains, instead of a
		// block of 4 rows with one valid.
		var bp *float32
		if b != nil {
			bp = &b[0]
		}
		for ; q1+sconvRowNW <= pq; q1 += sconvRowNW {
			f32.Conv1x128(k, &wp[0], &xp[q1], &pl.off[0], &cs[q1], bp)
		}
	}
	for q0 := q1; q0 < pq; q0 += sconvNW {
		for ir, s := 0, 0; ir < m; s++ {
			blk := sconvBlock(m, ir)
			a := &wp[s*sgemmMR*k]
			var bp *float32
			if b != nil {
				bp = &b[ir]
			}
			nw := min(sconvNW, pq-q0)
			switch {
			case sconvPair(m, ir, nw):
				f32.Conv8x32(k, a, &wp[(s+1)*sgemmMR*k], &xp[q0], &xp[q0+sgemmNR], &pl.off[0], &cs[ir*pq+q0], pq, bp)
				ir, s = ir+blk, s+1
			case nw < sconvNW:
				f32.Conv6x16(k, a, &xp[q0], &pl.off[0], &cs[ir*pq+q0], pq, bp)
			case blk < sgemmMR:
				f32.Conv4x32(k, a, &xp[q0], &xp[q0+sgemmNR], &pl.off[0], &cs[ir*pq+q0], pq, bp)
			default:
				f32.Conv6x32(k, a, &xp[q0], &xp[q0+sgemmNR], &pl.off[0], &cs[ir*pq+q0], pq, bp)
			}
			ir += blk
		}
	}
	p := g.oh * g.ow
	if p == 0 {
		return
	}
	for mi := 0; mi < m; mi++ {
		// The slicing checks the bounds f32.CopyRows relies on.
		src := cs[mi*pq : mi*pq+(g.oh-1)*g.wp+g.ow]
		dst := y[mi*p : (mi+1)*p]
		f32.CopyRows(&dst[0], g.ow, &src[0], g.wp, g.oh, g.ow)
	}
}
