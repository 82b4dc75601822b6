package ops

import (
	"fmt"
	"sync"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/blas64"
)

// convGeom is the geometry of one 2-D sliding-window pass. 1-D (NCW) data
// is run as 2-D with a height of one, so every kernel below only handles
// the 2-D case.
type convGeom struct {
	h, w   int // input spatial size
	kh, kw int // kernel size
	oh, ow int // output spatial size
	pt, pl int // begin pads (top, left)
	pb, pr int // end pads (bottom, right)
	sh, sw int // strides
	dh, dw int // dilations
}

// convGeomOf builds the 2-D geometry for rank spatial axes (1 or 2) from
// ONNX-ordered pads, per-axis strides and dilations, and the output sizes
// out (already computed and validated by the caller).
func convGeomOf(rank int, in, kernel, pads, strides, dils, out []int) convGeom {
	if rank == 1 {
		return convGeom{h: 1, w: in[0], kh: 1, kw: kernel[0], oh: 1, ow: out[0],
			pl: pads[0], pr: pads[1], sh: 1, sw: strides[0], dh: 1, dw: dils[0]}
	}
	return convGeom{h: in[0], w: in[1], kh: kernel[0], kw: kernel[1], oh: out[0], ow: out[1],
		pt: pads[0], pl: pads[1], pb: pads[2], pr: pads[3],
		sh: strides[0], sw: strides[1], dh: dils[0], dw: dils[1]}
}

// convIm2col lays the receptive fields of c channels of x (c×h×w, row-major)
// out as the columns of col ((c·kh·kw)×(oh·ow)): row (ci·kh+i)·kw+j, column
// y·ow+x holds x[ci, y·sh−pt+i·dh, x·sw−pl+j·dw], or 0 in the padding.
// This is the im2col lowering of Chellapilla, Puri & Simard (2006),
// "High Performance Convolutional Neural Networks for Document Processing".
func convIm2col[T float](g *convGeom, c int, x, col []T) {
	p := g.oh * g.ow
	row := 0
	for ci := 0; ci < c; ci++ {
		xc := x[ci*g.h*g.w : (ci+1)*g.h*g.w]
		for i := 0; i < g.kh; i++ {
			for j := 0; j < g.kw; j++ {
				dst := col[row*p : (row+1)*p]
				row++
				for y := 0; y < g.oh; y++ {
					d := dst[y*g.ow : (y+1)*g.ow]
					iy := y*g.sh - g.pt + i*g.dh
					if iy < 0 || iy >= g.h {
						clear(d)
						continue
					}
					xr := xc[iy*g.w : (iy+1)*g.w]
					ix := j*g.dw - g.pl
					lo, hi := convSpan(ix, g.sw, g.w, g.ow)
					clear(d[:lo])
					clear(d[hi:])
					if lo == hi {
						continue
					}
					if g.sw == 1 {
						copy(d[lo:hi], xr[ix+lo:ix+hi])
						continue
					}
					for xo := lo; xo < hi; xo++ {
						d[xo] = xr[ix+xo*g.sw]
					}
				}
			}
		}
	}
}

// convSpan returns the range [lo, hi) of output columns xo in [0, ow) whose
// input column ix + xo·sw lies inside [0, w); the others read padding. The
// range is empty (lo == hi) when no column does.
func convSpan(ix, sw, w, ow int) (lo, hi int) {
	if ix < 0 {
		lo = (-ix + sw - 1) / sw
	}
	if rest := w - ix; rest > 0 {
		hi = min(ow, (rest+sw-1)/sw)
	}
	if lo > hi {
		lo = hi
	}
	return lo, hi
}

// convCol2im is the adjoint of convIm2col: it adds every entry of col back
// onto the input position it was read from (padding entries are dropped).
// dx must be zeroed by the caller when a plain (not accumulated) result is
// wanted.
func convCol2im[T float](g *convGeom, c int, col, dx []T) {
	p := g.oh * g.ow
	row := 0
	for ci := 0; ci < c; ci++ {
		xc := dx[ci*g.h*g.w : (ci+1)*g.h*g.w]
		for i := 0; i < g.kh; i++ {
			for j := 0; j < g.kw; j++ {
				src := col[row*p : (row+1)*p]
				row++
				for y := 0; y < g.oh; y++ {
					iy := y*g.sh - g.pt + i*g.dh
					if iy < 0 || iy >= g.h {
						continue
					}
					s := src[y*g.ow : (y+1)*g.ow]
					xr := xc[iy*g.w : (iy+1)*g.w]
					ix := j*g.dw - g.pl
					lo, hi := convSpan(ix, g.sw, g.w, g.ow)
					if lo == hi {
						continue
					}
					if g.sw == 1 {
						dst := xr[ix+lo : ix+hi]
						for k, v := range s[lo:hi] {
							dst[k] += v
						}
						continue
					}
					for xo := lo; xo < hi; xo++ {
						xr[ix+xo*g.sw] += s[xo]
					}
				}
			}
		}
	}
}

// convGemm computes c = alpha·op(a)·op(b) + beta·c for row-major matrices,
// op(a) m×k and op(b) k×n: float64 with gonum's pure-Go BLAS, float32 with
// sgemm.
func convGemm[T float](ta, tb bool, m, n, k int, a []T, lda int, b []T, ldb int, beta T, c []T, ldc int) {
	tA, tB := blas.NoTrans, blas.NoTrans
	if ta {
		tA = blas.Trans
	}
	if tb {
		tB = blas.Trans
	}
	switch a := any(a).(type) {
	case []float64:
		blas64.Implementation().Dgemm(tA, tB, m, n, k, 1, a, lda, any(b).([]float64), ldb, float64(beta), any(c).([]float64), ldc)
	case []float32:
		sgemm(ta, tb, m, n, k, 1, a, lda, any(b).([]float32), ldb, float32(beta), any(c).([]float32), ldc)
	}
}

// The im2col scratch buffers are pooled per element type: a machine running
// a graph reuses the same few buffers from pass to pass, and concurrent
// machines never share one.
var (
	convPool32 sync.Pool
	convPool64 sync.Pool
)

// convGetBuf returns a scratch slice of n elements (contents undefined).
func convGetBuf[T float](n int) *[]T {
	var p *sync.Pool
	var zero T
	if _, ok := any(zero).(float32); ok {
		p = &convPool32
	} else {
		p = &convPool64
	}
	if v, ok := p.Get().(*[]T); ok && cap(*v) >= n {
		*v = (*v)[:n]
		return v
	}
	s := make([]T, n)
	return &s
}

// convPutBuf returns a buffer obtained from convGetBuf to its pool.
func convPutBuf[T float](b *[]T) {
	var zero T
	if _, ok := any(zero).(float32); ok {
		convPool32.Put(b)
	} else {
		convPool64.Put(b)
	}
}

// convDense returns v as a contiguous *tensor.Dense of float32 or float64,
// materialising views.
func convDense(v G.Value, what string) (*tensor.Dense, error) {
	d, ok := v.(*tensor.Dense)
	if !ok {
		return nil, fmt.Errorf("%w: %s: expected a dense tensor, got %T", ErrShape, what, v)
	}
	if dt := d.Dtype(); dt != tensor.Float32 && dt != tensor.Float64 {
		return nil, fmt.Errorf("%w: %s: expected float32 or float64, got %v", ErrShape, what, dt)
	}
	if d.RequiresIterator() {
		m, ok := d.Materialize().(*tensor.Dense)
		if !ok {
			return nil, fmt.Errorf("%w: %s: cannot materialise view", ErrShape, what)
		}
		d = m
	}
	return d, nil
}

// newDense allocates a zeroed tensor of dt with shape shp.
func newDense(dt tensor.Dtype, shp []int) (*tensor.Dense, error) {
	n := 1
	for _, s := range shp {
		if s <= 0 {
			return nil, fmt.Errorf("%w: result shape %v has a non-positive axis", ErrShape, shp)
		}
		if n > maxElems/s {
			return nil, fmt.Errorf("%w: result shape %v exceeds %d elements", errTooLarge, shp, maxElems)
		}
		n *= s
	}
	return tensor.New(tensor.Of(dt), tensor.WithShape(shp...)), nil
}
