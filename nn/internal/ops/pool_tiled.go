package ops

import "github.com/apportion/apportion/nn/internal/asm/f32"

// Tiled pools: a kh×kw window with strides (kh, kw), no begin pads and no
// dilation, whose windows all lie inside the input, cuts each plane into
// disjoint tiles (the 2×2 stride-2 max pool of most convolutional networks
// is one). Every input element then belongs to at most one window, so the
// kernels below walk the tiles row pair by row pair without any window
// clipping, and the backward pass writes every element of dx exactly once
// (dy to its tile's argmax, zero elsewhere, zero in the uncovered border
// when H or W is not a multiple of the kernel) instead of clearing dx and
// accumulating into it.
//
// They compute bit for bit what the windowed kernels (pool_window.go)
// compute on the same geometry: the maximum is the first maximal element in row-major
// window order (strict >, so of +0 and −0 the first one seen wins), the
// first NaN in that order wins over everything, averages add in the same
// order from the same zero and divide by the same D = kh·kw (every window
// is whole, so count_include_pad changes nothing), and gradients
// are 0 + dy (which turns a −0 into +0, as the accumulation into a cleared
// dx does).

// poolTiled reports whether g is a tiled pool (see above). End pads and
// ceil mode are allowed as long as no window reaches into them.
func poolTiled(g *convGeom) bool {
	return g.sh == g.kh && g.sw == g.kw && g.dh == 1 && g.dw == 1 &&
		g.pt == 0 && g.pl == 0 && g.oh*g.kh <= g.h && g.ow*g.kw <= g.w
}

// poolTiledForward is the forward pool of a tiled geometry.
func poolTiledForward[T float](g *convGeom, planes int, takeMax bool, x, y []T) {
	if x32, ok := any(x).([]float32); ok && takeMax && g.kh == 2 && g.kw == 2 {
		f32.MaxPool2x2(x32, any(y).([]float32), planes, g.h, g.w, g.oh, g.ow)
		return
	}
	if !takeMax && g.kh == 2 && g.kw == 2 {
		poolAvg2x2Forward(g, planes, x, y)
		return
	}
	hw, p := g.h*g.w, g.oh*g.ow
	div := T(g.kh * g.kw)
	for pl := 0; pl < planes; pl++ {
		xp := x[pl*hw : (pl+1)*hw]
		yp := y[pl*p : (pl+1)*p]
		for oy := 0; oy < g.oh; oy++ {
			tile := xp[oy*g.kh*g.w:]
			yr := yp[oy*g.ow : (oy+1)*g.ow]
			for ox := range yr {
				x0 := ox * g.kw
				if takeMax {
					yr[ox] = tile[poolTileArgmax(tile, x0, g.w, g.kh, g.kw)]
					continue
				}
				var s T
				for i := 0; i < g.kh; i++ {
					for _, v := range tile[i*g.w+x0 : i*g.w+x0+g.kw] {
						s += v
					}
				}
				yr[ox] = s / div
			}
		}
	}
}

// poolTiledBackward is the pool gradient of a tiled geometry; it overwrites
// all of dx.
func poolTiledBackward[T float](g *convGeom, planes int, takeMax bool, x, dy, dx []T) {
	if x32, ok := any(x).([]float32); ok && takeMax && g.kh == 2 && g.kw == 2 {
		f32.MaxPool2x2Grad(x32, any(dy).([]float32), any(dx).([]float32), planes, g.h, g.w, g.oh, g.ow)
		poolClearBorder(g, planes, dx)
		return
	}
	if !takeMax && g.kh == 2 && g.kw == 2 {
		poolAvg2x2Backward(g, planes, dy, dx)
		poolClearBorder(g, planes, dx)
		return
	}
	hw, p := g.h*g.w, g.oh*g.ow
	div := T(g.kh * g.kw)
	for pl := 0; pl < planes; pl++ {
		xp := x[pl*hw : (pl+1)*hw]
		dxp := dx[pl*hw : (pl+1)*hw]
		dyp := dy[pl*p : (pl+1)*p]
		for oy := 0; oy < g.oh; oy++ {
			tile := xp[oy*g.kh*g.w:]
			dtile := dxp[oy*g.kh*g.w:]
			dyr := dyp[oy*g.ow : (oy+1)*g.ow]
			for ox, d := range dyr {
				x0 := ox * g.kw
				if takeMax {
					k := poolTileArgmax(tile, x0, g.w, g.kh, g.kw)
					for i := 0; i < g.kh; i++ {
						clear(dtile[i*g.w+x0 : i*g.w+x0+g.kw])
					}
					dtile[k] = 0 + d
					continue
				}
				v := 0 + d/div
				for i := 0; i < g.kh; i++ {
					r := dtile[i*g.w+x0 : i*g.w+x0+g.kw]
					for j := range r {
						r[j] = v
					}
				}
			}
		}
	}
	poolClearBorder(g, planes, dx)
}

// poolTileArgmax returns the index into tile of the first maximum of the
// kh×kw window whose top-left element is tile[x0] (rows w apart), the
// first NaN if there is one: poolArgmax without the clipping.
func poolTileArgmax[T float](tile []T, x0, w, kh, kw int) int {
	best := x0
	bv := tile[best]
	if bv != bv {
		return best
	}
	for i := 0; i < kh; i++ {
		row := i*w + x0
		for j, v := range tile[row : row+kw] {
			// !(v <= bv) is v > bv or v NaN (bv is never NaN): one
			// comparison on the common path.
			if !(v <= bv) {
				if v != v {
					return row + j
				}
				best, bv = row+j, v
			}
		}
	}
	return best
}

// poolAvg2x2Forward is the 2×2 tiled average pool: (0 + a + b + c + d)/4,
// added left to right like the windowed kernel. It multiplies by 0.25 instead of
// dividing by 4: both are the correctly rounded value of the same real
// quotient (IEEE 754 §4.3, 0.25 being exact), so the results are the same
// bits, at a fraction of the cost of a division.
func poolAvg2x2Forward[T float](g *convGeom, planes int, x, y []T) {
	hw, p, ow := g.h*g.w, g.oh*g.ow, g.ow
	for pl := 0; pl < planes; pl++ {
		xp := x[pl*hw : (pl+1)*hw]
		yp := y[pl*p : (pl+1)*p]
		for oy := 0; oy < g.oh; oy++ {
			r0 := xp[2*oy*g.w : 2*oy*g.w+2*ow]
			r1 := xp[(2*oy+1)*g.w : (2*oy+1)*g.w+2*ow]
			yr := yp[oy*ow : (oy+1)*ow]
			for ox := range yr {
				var s T
				s += r0[2*ox]
				s += r0[2*ox+1]
				s += r1[2*ox]
				s += r1[2*ox+1]
				yr[ox] = s * 0.25
			}
		}
	}
}

// poolAvg2x2Backward is the 2×2 tiled average pool gradient, 0 + dy/4 to
// every covered element (as a product with 0.25, see poolAvg2x2Forward);
// it writes the covered part of dx only.
func poolAvg2x2Backward[T float](g *convGeom, planes int, dy, dx []T) {
	hw, p, ow := g.h*g.w, g.oh*g.ow, g.ow
	for pl := 0; pl < planes; pl++ {
		dxp := dx[pl*hw : (pl+1)*hw]
		dyp := dy[pl*p : (pl+1)*p]
		for oy := 0; oy < g.oh; oy++ {
			o0, o1 := 2*oy*g.w, (2*oy+1)*g.w
			d0, d1 := dxp[o0:o0+2*ow], dxp[o1:o1+2*ow]
			for ox, d := range dyp[oy*ow : (oy+1)*ow] {
				var v T
				v += d * 0.25
				d0[2*ox], d0[2*ox+1], d1[2*ox], d1[2*ox+1] = v, v, v, v
			}
		}
	}
}

// poolClearBorder zeroes the elements of dx that no tile covers: the
// columns from ow·kw on and the rows from oh·kh on of every plane.
func poolClearBorder[T float](g *convGeom, planes int, dx []T) {
	cw, ch := g.ow*g.kw, g.oh*g.kh
	if cw == g.w && ch == g.h {
		return
	}
	hw := g.h * g.w
	for pl := 0; pl < planes; pl++ {
		dxp := dx[pl*hw : (pl+1)*hw]
		if cw < g.w {
			for i := 0; i < ch; i++ {
				clear(dxp[i*g.w+cw : (i+1)*g.w])
			}
		}
		clear(dxp[ch*g.w:])
	}
}
