package f32

import (
	"math"
	"unsafe"
)

// The plain-Go loops that define the kernels (see the package doc). A tile
// kernel reads its operands through pointers, as the assembly does; the
// loops view them as slices just long enough for the elements they read.

// fma returns x·y + z rounded once to float32, as the fused multiply-add
// instructions do (IEEE 754-2008 §5.4.1, fusedMultiplyAdd). The product of
// two float32 values is exact in float64 (48 significant bits of 53), so s,
// its sum with z rounded to float64, is the exact result rounded once; a
// second rounding to float32 can err only when s lands exactly on a float32
// midpoint (every float32 midpoint being a float64, an exact result on the
// other side of it would have rounded to it or beyond), which fmaMidpoint
// settles. Subnormal float32 results take that path too.
func fma(x, y, z float32) float32 {
	p := float64(x) * float64(y)
	s := p + float64(z)
	if b := math.Float64bits(s); b&(1<<29-1) != 1<<28 && b&(0x7ff<<52) >= (1023-126)<<52 {
		return float32(s)
	}
	return fmaMidpoint(p, float64(z), s)
}

// fmaMidpoint rounds p + z = s + e to float32 by way of s rounded to odd
// (Boldo and Melquiond 2008, "Emulation of FMA and correctly rounded sums:
// proved algorithms using rounding to odd", Theorem 1: a float64 rounded to
// odd, 53 ≥ 24 + 2 bits, rounds to float32 as the exact sum would), the
// rounding error e taken exactly with Knuth's TwoSum (Knuth, TAOCP vol. 2,
// §4.2.2, Theorem B).
func fmaMidpoint(p, z, s float64) float32 {
	if s-s != 0 { // ±Inf or NaN
		return float32(s)
	}
	bp := s - p
	e := (p - (s - bp)) + (z - bp)
	// Round to odd: truncate s toward zero (one step back when it was
	// rounded away from zero, e and s of opposite signs), then set the
	// last bit when the sum was inexact (e ≠ 0).
	sb, eb := math.Float64bits(s), math.Float64bits(e)
	inexact := (eb<<1 | -(eb << 1)) >> 63
	away := (eb ^ sb) >> 63 & inexact
	return float32(math.Float64frombits((sb - away) | inexact))
}

// tile6x16 is the 6×16 accumulator tile of the 6×16 kernels.
type tile6x16 [6 * 16]float32

// store6x16 stores rows r < mr of the tile t into c (rows ldc apart):
// c[r·ldc+j] = alpha·t[r][j] + beta·c[r·ldc+j], the product by alpha
// rounded (and skipped when alpha is 1, where it is exact), the sum one
// fused multiply-add, and c not read when beta is 0.
func store6x16(t *tile6x16, mr int, c *float32, ldc int, alpha, beta float32) {
	cs := unsafe.Slice(c, (mr-1)*ldc+16)
	for r := 0; r < mr; r++ {
		row := cs[r*ldc : r*ldc+16]
		for j := range row {
			v := t[r*16+j]
			if alpha != 1 {
				v = float32(v * alpha)
			}
			if beta != 0 {
				v = fma(beta, row[j], v)
			}
			row[j] = v
		}
	}
}

// gemm6x16Chains accumulates the tile over p < kc from A element (r, p) at
// a[r·rs + p·ps] and B row p at b[16p], each element one chain of fused
// multiply-adds from zero in the order of p.
func gemm6x16Chains(t *tile6x16, kc int, a *float32, rs, ps int, b *float32) {
	as := unsafe.Slice(a, 5*rs+(kc-1)*ps+1)
	bs := unsafe.Slice(b, 16*kc)
	for p := 0; p < kc; p++ {
		brow := bs[16*p : 16*p+16]
		for r := 0; r < 6; r++ {
			ar := as[r*rs+p*ps]
			acc := t[16*r : 16*r+16]
			for j, bv := range brow {
				acc[j] = fma(ar, bv, acc[j])
			}
		}
	}
}

func gemm6x16(kc int, a, b, c *float32, ldc int, alpha, beta float32) {
	var t tile6x16
	gemm6x16Chains(&t, kc, a, 1, 6, b)
	store6x16(&t, 6, c, ldc, alpha, beta)
}

func gemm6x16Strided(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32) {
	var t tile6x16
	gemm6x16Chains(&t, kc, a, rs, ps, b)
	store6x16(&t, 6, c, ldc, alpha, beta)
}

func gemm6x16Edge(kc int, a *float32, rs, ps int, b, c *float32, ldc int, alpha, beta float32, mr int) {
	var t tile6x16
	gemm6x16Chains(&t, kc, a, rs, ps, b)
	store6x16(&t, mr, c, ldc, alpha, beta)
}

func gemm6x32Strided(kc int, a *float32, rs, ps int, b0, b1, c *float32, ldc int, alpha, beta float32) {
	gemm6x16Strided(kc, a, rs, ps, b0, c, ldc, alpha, beta)
	gemm6x16Strided(kc, a, rs, ps, b1, (*float32)(unsafe.Add(unsafe.Pointer(c), 16*4)), ldc, alpha, beta)
}

func gemm1x32(kc int, a *float32, inca int, b *float32, ldb int, c *float32, alpha, beta float32) {
	as := unsafe.Slice(a, (kc-1)*inca+1)
	bs := unsafe.Slice(b, (kc-1)*ldb+32)
	var t [32]float32
	for p := 0; p < kc; p++ {
		ap := as[p*inca]
		for j, bv := range bs[p*ldb : p*ldb+32] {
			t[j] = fma(ap, bv, t[j])
		}
	}
	cs := unsafe.Slice(c, 32)
	for j, v := range t {
		v = float32(v * alpha)
		if beta != 0 {
			v = fma(beta, cs[j], v)
		}
		cs[j] = v
	}
}

func conv6x16(kc int, a, b *float32, off *int32, c *float32, ldc int, bias *float32) {
	offs := unsafe.Slice(off, kc)
	n := int32(0)
	for _, o := range offs {
		n = max(n, o)
	}
	as := unsafe.Slice(a, 6*kc)
	bs := unsafe.Slice(b, int(n)+16)
	var t tile6x16
	for p, o := range offs {
		brow := bs[o : o+16]
		for r := 0; r < 6; r++ {
			ar := as[6*p+r]
			acc := t[16*r : 16*r+16]
			for j, bv := range brow {
				acc[j] = fma(ar, bv, acc[j])
			}
		}
	}
	if bias != nil {
		bs := unsafe.Slice(bias, 6)
		for r, bv := range bs {
			for j := range 16 {
				t[16*r+j] += bv
			}
		}
	}
	store6x16(&t, 6, c, ldc, 1, 0)
}

func conv6x32(kc int, a, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32) {
	conv6x16(kc, a, b0, off, c, ldc, bias)
	conv6x16(kc, a, b1, off, (*float32)(unsafe.Add(unsafe.Pointer(c), 16*4)), ldc, bias)
}

func conv4x32(kc int, a, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32) {
	var t tile6x32
	var b6 [6]float32
	conv6x32(kc, a, b0, b1, off, &t[0], 32, bias6(bias, &b6))
	store4x32(&t, c, ldc)
}

func conv8x32(kc int, a0, a1, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32) {
	conv4x32(kc, a0, b0, b1, off, c, ldc, bias)
	conv4x32(kc, a1, b0, b1, off, (*float32)(unsafe.Add(unsafe.Pointer(c), 4*ldc*4)), ldc, biasAdd(bias, 4))
}

// biasAdd returns bias advanced by r rows, or nil.
func biasAdd(bias *float32, r int) *float32 {
	if bias == nil {
		return nil
	}
	return (*float32)(unsafe.Add(unsafe.Pointer(bias), r*4))
}

func conv1x128(kc int, a, b *float32, off *int32, c *float32, bias *float32) {
	var t tile6x16
	var b6 [6]float32
	if bias != nil {
		b6[0] = *bias
	}
	cs := unsafe.Slice(c, 128)
	for j := 0; j < 128; j += 16 {
		conv6x16(kc, a, (*float32)(unsafe.Add(unsafe.Pointer(b), j*4)), off, &t[0], 16, bias1(bias, &b6))
		copy(cs[j:j+16], t[:16])
	}
}

// bias1 returns a 6-row bias for a 6-row kernel computing one row: nil, or
// b6 (holding bias[0] and zeros).
func bias1(bias *float32, b6 *[6]float32) *float32 {
	if bias == nil {
		return nil
	}
	return &b6[0]
}

// tile6x32 is the scratch of a 6×32 tile where a 4-row tile has no kernel
// of its own.
type tile6x32 [6 * 32]float32

// bias6 returns a 6-row bias for a 6-row kernel computing a 4-row tile:
// nil, or b6 holding bias[0..3] and two zeros.
func bias6(bias *float32, b6 *[6]float32) *float32 {
	if bias == nil {
		return nil
	}
	copy(b6[:], unsafe.Slice(bias, 4))
	return &b6[0]
}

// store4x32 copies the first four rows of t to c, rows ldc apart.
func store4x32(t *tile6x32, c *float32, ldc int) {
	cs := unsafe.Slice(c, 3*ldc+32)
	for r := 0; r < 4; r++ {
		copy(cs[r*ldc:r*ldc+32], t[32*r:32*r+32])
	}
}

func transpose8x8(src *float32, lds int, dst *float32, ldd int) {
	s := unsafe.Slice(src, 7*lds+8)
	d := unsafe.Slice(dst, 7*ldd+8)
	for r := 0; r < 8; r++ {
		for c := 0; c < 8; c++ {
			d[c*ldd+r] = s[r*lds+c]
		}
	}
}

func copyRows16(src *float32, lds int, dst *float32, rows int) {
	s := unsafe.Slice(src, (rows-1)*lds+16)
	d := unsafe.Slice(dst, 16*rows)
	for r := 0; r < rows; r++ {
		copy(d[16*r:16*r+16], s[r*lds:r*lds+16])
	}
}

func copyRows(dst *float32, ldd int, src *float32, lds int, rows, w int) {
	if rows == 0 || w == 0 {
		return
	}
	d := unsafe.Slice(dst, (rows-1)*ldd+w)
	s := unsafe.Slice(src, (rows-1)*lds+w)
	for r := 0; r < rows; r++ {
		copy(d[r*ldd:r*ldd+w], s[r*lds:r*lds+w])
	}
}

func relu(y, x []float32) {
	y = y[:len(x)]
	for i, v := range x {
		y[i] = max(v, 0)
	}
}

func reluGrad(d, x, dy []float32) {
	d, dy = d[:len(x)], dy[:len(x)]
	for i, v := range x {
		if v > 0 {
			d[i] = dy[i]
		} else {
			d[i] = 0
		}
	}
}

func reluGradRows(dst *float32, ldd int, x, dy *float32, lds int, rows, w int) {
	if rows == 0 || w == 0 {
		return
	}
	d := unsafe.Slice(dst, (rows-1)*ldd+w)
	xs := unsafe.Slice(x, (rows-1)*lds+w)
	dys := unsafe.Slice(dy, (rows-1)*lds+w)
	for r := 0; r < rows; r++ {
		reluGrad(d[r*ldd:r*ldd+w], xs[r*lds:r*lds+w], dys[r*lds:r*lds+w])
	}
}

// firstMax4 returns which element of the 2×2 window a b / c d holds its
// maximum (0 to 3, row-major): the first NaN if there is one, else the first
// maximal element (strict >, so of +0 and −0 the first one seen).
func widen(dst []float64, src []float32) {
	dst = dst[:len(src)]
	for i, v := range src {
		dst[i] = float64(v)
	}
}

func narrow(dst []float32, src []float64) {
	dst = dst[:len(src)]
	for i, v := range src {
		dst[i] = float32(v)
	}
}

// lerpNarrow and addScaledWiden convert each product to float64
// explicitly, which keeps the compiler from fusing it with the sum (the
// Go specification allows fusing x*y + z otherwise, and does it where the
// target has FMA), so that they round as the assembly does.
func lerpNarrow(dst []float32, u, d []float64, a float64) {
	dst, d = dst[:len(u)], d[:len(u)]
	for i, v := range u {
		dst[i] = float32(v + float64(a*d[i]))
	}
}

func addScaledWiden(dst []float64, w float64, x []float32) {
	dst = dst[:len(x)]
	for i, v := range x {
		dst[i] += float64(w * float64(v))
	}
}

func firstMax4(a, b, c, d float32) int {
	if a != a {
		return 0
	}
	k, m := 0, a
	if b > m {
		k, m = 1, b
	} else if b != b {
		return 1
	}
	if c > m {
		k, m = 2, c
	} else if c != c {
		return 2
	}
	if d > m {
		k = 3
	} else if d != d {
		return 3
	}
	return k
}

func maxPool2x2(x, y []float32, planes, h, w, oh, ow int) {
	hw, p := h*w, oh*ow
	for pl := 0; pl < planes; pl++ {
		xp := x[pl*hw : (pl+1)*hw]
		yp := y[pl*p : (pl+1)*p]
		for oy := 0; oy < oh; oy++ {
			r0 := xp[2*oy*w : 2*oy*w+2*ow]
			r1 := xp[(2*oy+1)*w : (2*oy+1)*w+2*ow]
			yr := yp[oy*ow : (oy+1)*ow]
			for ox := range yr {
				win := [4]float32{r0[2*ox], r0[2*ox+1], r1[2*ox], r1[2*ox+1]}
				yr[ox] = win[firstMax4(win[0], win[1], win[2], win[3])]
			}
		}
	}
}

func maxPool2x2Grad(x, dy, dx []float32, planes, h, w, oh, ow int) {
	hw, p := h*w, oh*ow
	for pl := 0; pl < planes; pl++ {
		xp := x[pl*hw : (pl+1)*hw]
		dxp := dx[pl*hw : (pl+1)*hw]
		dyp := dy[pl*p : (pl+1)*p]
		for oy := 0; oy < oh; oy++ {
			o0, o1 := 2*oy*w, (2*oy+1)*w
			r0, r1 := xp[o0:o0+2*ow], xp[o1:o1+2*ow]
			d0, d1 := dxp[o0:o0+2*ow], dxp[o1:o1+2*ow]
			for ox, d := range dyp[oy*ow : (oy+1)*ow] {
				k := firstMax4(r0[2*ox], r0[2*ox+1], r1[2*ox], r1[2*ox+1])
				d0[2*ox], d0[2*ox+1], d1[2*ox], d1[2*ox+1] = 0, 0, 0, 0
				switch k {
				case 0:
					d0[2*ox] = 0 + d
				case 1:
					d0[2*ox+1] = 0 + d
				case 2:
					d1[2*ox] = 0 + d
				default:
					d1[2*ox+1] = 0 + d
				}
			}
		}
	}
}

func gemm6x32Bias(kc int, a *float32, rs, ps int, b0, b1, c *float32, ldc int, bias *float32, relu bool) {
	var t [2]tile6x16
	gemm6x16Chains(&t[0], kc, a, rs, ps, b0)
	gemm6x16Chains(&t[1], kc, a, rs, ps, b1)
	cs := unsafe.Slice(c, 5*ldc+32)
	var bs []float32
	if bias != nil {
		bs = unsafe.Slice(bias, 32)
	}
	for r := 0; r < 6; r++ {
		for j := 0; j < 32; j++ {
			v := t[j/16][r*16+j%16]
			if bs != nil {
				v += bs[j]
			}
			if relu {
				v = max(v, 0)
			}
			cs[r*ldc+j] = v
		}
	}
}

func addTo(dst, src []float32) {
	dst = dst[:len(src)]
	for i, v := range src {
		dst[i] += v
	}
}

func lerp(dst, lo, hi []float32, f float32) {
	dst, hi = dst[:len(lo)], hi[:len(lo)]
	for i, v := range lo {
		dst[i] = v + float32(f*(hi[i]-v)) // the conversion keeps the compiler from fusing
	}
}

func reluGradMidAdd(dst, a, b, dy []float32) {
	dst, b, dy = dst[:len(a)], b[:len(a)], dy[:len(a)]
	for i, v := range a {
		if v+b[i] > 0 {
			dst[i] += dy[i]
		}
	}
}
