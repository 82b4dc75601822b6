package ops

import "math"

// Windowed pools: any kernel, strides, pads, dilations and ceil mode. The
// clipping of each window to the input (and, for count_include_pad, to the
// padded input) depends on one output coordinate per axis only, so it is
// computed once per output row and column when the op first sees a shape
// (poolSpans) instead of once per window.

// poolSpan is the clipping of the windows at one output position along one
// axis: the window starts at input position start (possibly in the begin
// padding); taps [lo, hi) lie inside the input and taps [padLo, padHi)
// inside the padded input.
type poolSpan struct{ start, lo, hi, padLo, padHi int }

// poolSpans returns the spans of the out output positions of an axis of
// input size n, kernel k, stride s, dilation d and pads (pb, pe).
func poolSpans(out, n, k, s, d, pb, pe int) []poolSpan {
	spans := make([]poolSpan, out)
	for o := range spans {
		start := o*s - pb
		lo, hi := poolRange(start, k, d, n)
		plo, phi := poolRange(start+pb, k, d, n+pb+pe)
		spans[o] = poolSpan{start, lo, hi, plo, phi}
	}
	return spans
}

// poolWindows holds the row and column spans of a 2-D geometry.
type poolWindows struct{ rows, cols []poolSpan }

// poolWindowsOf computes the spans of g.
func poolWindowsOf(g *convGeom) poolWindows {
	return poolWindows{
		rows: poolSpans(g.oh, g.h, g.kh, g.sh, g.dh, g.pt, g.pb),
		cols: poolSpans(g.ow, g.w, g.kw, g.sw, g.dw, g.pl, g.pr),
	}
}

// divisor is the AveragePool divisor D of the window at (r, c): the number
// of its taps inside the input, or with includePad inside the padded input.
func (r *poolSpan) divisor(c *poolSpan, includePad bool) int {
	if includePad {
		return (r.padHi - r.padLo) * (c.padHi - c.padLo)
	}
	return (r.hi - r.lo) * (c.hi - c.lo)
}

// poolWindowArgmax returns the plane index of the first maximum of the
// window at (r, c), the first NaN if there is one, or −1 when the window
// holds no input element.
func poolWindowArgmax[T float](g *convGeom, xp []T, r, c *poolSpan) int {
	if r.lo >= r.hi || c.lo >= c.hi {
		return -1
	}
	best := (r.start+r.lo*g.dh)*g.w + c.start + c.lo*g.dw
	bv := xp[best]
	if bv != bv {
		return best
	}
	for i := r.lo; i < r.hi; i++ {
		row := (r.start+i*g.dh)*g.w + c.start
		for j := c.lo; j < c.hi; j++ {
			k := row + j*g.dw
			// !(v <= bv) is v > bv or v NaN (bv is never NaN).
			if v := xp[k]; !(v <= bv) {
				if v != v {
					return k
				}
				best, bv = k, v
			}
		}
	}
	return best
}

// poolWindowForward computes max or average pooling over planes (n·c)
// planes:
//
//	max: y = the first maximum (or first NaN) of the window, −Inf for a
//	     window with no input element;
//	avg: y = (0 + Σ window, in row-major order) / D, 0 for D = 0.
func poolWindowForward[T float](g *convGeom, win *poolWindows, planes int, takeMax, includePad bool, x, y []T) {
	hw, p := g.h*g.w, g.oh*g.ow
	for pl := 0; pl < planes; pl++ {
		xp := x[pl*hw : (pl+1)*hw]
		yp := y[pl*p : (pl+1)*p]
		if takeMax {
			poolWindowMaxPlane(g, win, xp, yp)
		} else {
			poolWindowAvgPlane(g, win, includePad, xp, yp)
		}
	}
}

// poolWindowMaxPlane is the max pool of one plane; the geometry is held in
// locals so that the inner loop keeps them in registers.
func poolWindowMaxPlane[T float](g *convGeom, win *poolWindows, xp, yp []T) {
	w, dh, dw, ow := g.w, g.dh, g.dw, g.ow
	ninf := T(math.Inf(-1))
	for oy, r := range win.rows {
		yr := yp[oy*ow : (oy+1)*ow]
		for ox, c := range win.cols[:len(yr)] {
			if r.lo >= r.hi || c.lo >= c.hi {
				yr[ox] = ninf
				continue
			}
			bv := xp[(r.start+r.lo*dh)*w+c.start+c.lo*dw]
		scan:
			for i := r.lo; i < r.hi && bv == bv; i++ {
				row := (r.start+i*dh)*w + c.start
				for j := c.lo; j < c.hi; j++ {
					// !(v <= bv) is v > bv or v NaN (bv is not NaN).
					if v := xp[row+j*dw]; !(v <= bv) {
						bv = v
						if v != v {
							break scan
						}
					}
				}
			}
			yr[ox] = bv
		}
	}
}

// poolWindowAvgPlane is the average pool of one plane.
func poolWindowAvgPlane[T float](g *convGeom, win *poolWindows, includePad bool, xp, yp []T) {
	w, dh, dw, ow := g.w, g.dh, g.dw, g.ow
	for oy, r := range win.rows {
		yr := yp[oy*ow : (oy+1)*ow]
		for ox, c := range win.cols[:len(yr)] {
			var s T
			for i := r.lo; i < r.hi; i++ {
				row := (r.start+i*dh)*w + c.start
				for j := c.lo; j < c.hi; j++ {
					s += xp[row+j*dw]
				}
			}
			if d := r.divisor(&c, includePad); d > 0 {
				s /= T(d)
			}
			yr[ox] = s
		}
	}
}

// poolWindowBackward adds into the zeroed dx the pooling gradient, window
// by window in output order: dy to each window's argmax (max), or dy/D to
// each input element of the window (average).
func poolWindowBackward[T float](g *convGeom, win *poolWindows, planes int, takeMax, includePad bool, x, dy, dx []T) {
	hw, p := g.h*g.w, g.oh*g.ow
	for pl := 0; pl < planes; pl++ {
		xp := x[pl*hw : (pl+1)*hw]
		dxp := dx[pl*hw : (pl+1)*hw]
		dyp := dy[pl*p : (pl+1)*p]
		for oy := range win.rows {
			r := &win.rows[oy]
			for ox, d := range dyp[oy*g.ow : (oy+1)*g.ow] {
				c := &win.cols[ox]
				if takeMax {
					if k := poolWindowArgmax(g, xp, r, c); k >= 0 {
						dxp[k] += d
					}
					continue
				}
				div := r.divisor(c, includePad)
				if div == 0 {
					continue
				}
				d /= T(div)
				for i := r.lo; i < r.hi; i++ {
					row := (r.start+i*g.dh)*g.w + c.start
					for j := c.lo; j < c.hi; j++ {
						dxp[row+j*g.dw] += d
					}
				}
			}
		}
	}
}
