package ops

import "math"

// The reference pooling kernels: the straightforward windowed loops, which
// clip every window to the input as they go. The op runs the table-driven
// (pool_window.go), tiled (pool_tiled.go) and global
// (pool_global.go) kernels instead; TestPoolMatchesReference,
// TestPoolTiledMatchesGeneric and TestPoolGlobalMatchesGeneric check them
// bit for bit against these, on top of the checks of the op against the
// ONNX backend test data (TestPoolONNX) and central finite differences
// (TestPoolGradients).

// poolDivisor is the AveragePool divisor D of the window at (y0, x0), the
// top-left input position (possibly in the padding).
func poolDivisor(g *convGeom, y0, x0 int, includePad bool) int {
	if includePad {
		iLo, iHi := poolRange(y0+g.pt, g.kh, g.dh, g.h+g.pt+g.pb)
		jLo, jHi := poolRange(x0+g.pl, g.kw, g.dw, g.w+g.pl+g.pr)
		return (iHi - iLo) * (jHi - jLo)
	}
	iLo, iHi := poolRange(y0, g.kh, g.dh, g.h)
	jLo, jHi := poolRange(x0, g.kw, g.dw, g.w)
	return (iHi - iLo) * (jHi - jLo)
}

// poolForward computes max or average pooling over planes (n·c) planes.
// A window with no input element yields −Inf (max) or 0 (average).
func poolForward[T float](g *convGeom, planes int, takeMax, includePad bool, x, y []T) {
	hw, p := g.h*g.w, g.oh*g.ow
	for pl := 0; pl < planes; pl++ {
		xp := x[pl*hw : (pl+1)*hw]
		yp := y[pl*p : (pl+1)*p]
		for oy := 0; oy < g.oh; oy++ {
			y0 := oy*g.sh - g.pt
			for ox := 0; ox < g.ow; ox++ {
				x0 := ox*g.sw - g.pl
				if takeMax {
					idx := poolArgmax(g, xp, y0, x0)
					if idx < 0 {
						yp[oy*g.ow+ox] = T(math.Inf(-1))
					} else {
						yp[oy*g.ow+ox] = xp[idx]
					}
					continue
				}
				var s T
				iLo, iHi := poolRange(y0, g.kh, g.dh, g.h)
				jLo, jHi := poolRange(x0, g.kw, g.dw, g.w)
				for i := iLo; i < iHi; i++ {
					row := (y0 + i*g.dh) * g.w
					for j := jLo; j < jHi; j++ {
						s += xp[row+x0+j*g.dw]
					}
				}
				if d := poolDivisor(g, y0, x0, includePad); d > 0 {
					s /= T(d)
				}
				yp[oy*g.ow+ox] = s
			}
		}
	}
}

// poolArgmax returns the plane index of the first maximum of the window at
// (y0, x0), or −1 when the window holds no input element. A NaN in the
// window wins, so that NaN inputs stay visible in the output.
func poolArgmax[T float](g *convGeom, xp []T, y0, x0 int) int {
	iLo, iHi := poolRange(y0, g.kh, g.dh, g.h)
	jLo, jHi := poolRange(x0, g.kw, g.dw, g.w)
	if iLo >= iHi || jLo >= jHi {
		return -1
	}
	best := (y0+iLo*g.dh)*g.w + x0 + jLo*g.dw
	bv := xp[best]
	if bv != bv {
		return best
	}
	for i := iLo; i < iHi; i++ {
		row := (y0 + i*g.dh) * g.w
		for j := jLo; j < jHi; j++ {
			k := row + x0 + j*g.dw
			v := xp[k]
			if v > bv {
				best, bv = k, v
			} else if v != v {
				return k // NaN propagates
			}
		}
	}
	return best
}

// poolBackward adds into the zeroed dx the pooling gradient: dy to each
// window's argmax (max), or dy/D to each input element of the window
// (average).
func poolBackward[T float](g *convGeom, planes int, takeMax, includePad bool, x, dy, dx []T) {
	hw, p := g.h*g.w, g.oh*g.ow
	for pl := 0; pl < planes; pl++ {
		xp := x[pl*hw : (pl+1)*hw]
		dxp := dx[pl*hw : (pl+1)*hw]
		dyp := dy[pl*p : (pl+1)*p]
		for oy := 0; oy < g.oh; oy++ {
			y0 := oy*g.sh - g.pt
			for ox := 0; ox < g.ow; ox++ {
				x0 := ox*g.sw - g.pl
				d := dyp[oy*g.ow+ox]
				if takeMax {
					if idx := poolArgmax(g, xp, y0, x0); idx >= 0 {
						dxp[idx] += d
					}
					continue
				}
				div := poolDivisor(g, y0, x0, includePad)
				if div == 0 {
					continue
				}
				d /= T(div)
				iLo, iHi := poolRange(y0, g.kh, g.dh, g.h)
				jLo, jHi := poolRange(x0, g.kw, g.dw, g.w)
				for i := iLo; i < iHi; i++ {
					row := (y0 + i*g.dh) * g.w
					for j := jLo; j < jHi; j++ {
						dxp[row+x0+j*g.dw] += d
					}
				}
			}
		}
	}
}
