package ops

import (
	"github.com/apportion/apportion/nn/internal/asm/f32"

	"sync/atomic"
	"unsafe"

	"gorgonia.org/tensor"
)

// convSlot holds the scratch of one op instance between runs. Each machine
// builds its own graph, so an op instance normally runs on one goroutine at
// a time and always finds its scratch here; a second concurrent Do on the
// same instance finds the slot empty and works on fresh scratch instead, so
// concurrent use stays correct, only slower.
type convSlot struct{ p atomic.Pointer[convScratch] }

// convScratch is the state an op keeps between runs: the geometry of the
// last input shapes, the packed (and for the input gradient, flipped)
// weights, and the buffers of the float32 driver.
type convScratch struct {
	// Geometry cache: the shapes of the last call and what they gave.
	xs, ws, bs tensor.Shape
	hasB       bool
	oshp       tensor.Shape
	g          convGeom

	// Packed weights of every group, derived from the weights at wsrc
	// (wlen elements); reused across runs only for constant weights.
	wsrc   *float32
	wlen   int
	wflip  bool // packed holds the flipped weights of the input gradient
	packed []float32
	flip   []float32

	plan           sconvPlan
	pad, strip, cs []float32
	mask           []float32  // one sample's masked dy (convBackOp.masked)
	bias           []float32  // bias of every group, each padded to a multiple of sgemmMR
	padKey         convPadKey // what the zero borders of pad were laid out for
	tile           sconvTile
}

// scratch takes the op's scratch out of its slot (or makes a new one when
// the slot is empty or the op was built without one).
func (op *convOp) scratch() *convScratch {
	if op.slot != nil {
		if s := op.slot.p.Swap(nil); s != nil {
			return s
		}
	}
	return new(convScratch)
}

// release puts s back into the op's slot for the next run.
func (op *convOp) release(s *convScratch) {
	if op.slot != nil {
		op.slot.p.Store(s)
	}
}

// cachedGeometry is geometry for shapes, returning the cached result when
// the shapes equal those of the last call (so a warm call allocates
// nothing). The returned shape is shared with the cache: callers must not
// modify it.
func (op *convOp) cachedGeometry(s *convScratch, shapes ...tensor.Shape) (tensor.Shape, convGeom, error) {
	var bs tensor.Shape
	if len(shapes) > 2 {
		bs = shapes[2]
	}
	if s.oshp != nil && s.xs.Eq(shapes[0]) && s.ws.Eq(shapes[1]) && s.hasB == (len(shapes) > 2) && (bs == nil || s.bs.Eq(bs)) {
		return s.oshp, s.g, nil
	}
	oshp, g, err := op.geometry(shapes...)
	if err != nil {
		return nil, convGeom{}, err
	}
	s.xs, s.ws, s.hasB, s.oshp, s.g = shapes[0].Clone(), shapes[1].Clone(), len(shapes) > 2, oshp, g
	s.bs = nil
	if bs != nil {
		s.bs = bs.Clone()
	}
	return oshp, g, nil
}

// convGrow returns buf resized to n elements, reallocating only when its
// capacity is too small (contents undefined).
func convGrow(buf []float32, n int) []float32 {
	if cap(buf) < n {
		return make([]float32, n)
	}
	return buf[:n]
}

// convFast reports whether float32 convolutions run on the packed driver of
// conv_strips.go: where its kernels run in assembly (f32.Asm), and when the
// product has a non-empty inner dimension.
func convFast(k int) bool { return f32.Asm() && k > 0 }

// weightsFresh reports whether s.packed was built from the weights w and
// may be reused: only for constant weights, which never change between
// runs of a program.
func (op *convOp) weightsFresh(s *convScratch, w []float32, flip bool) bool {
	return op.constW && s.packed != nil && s.wsrc == unsafe.SliceData(w) && s.wlen == len(w) && s.wflip == flip
}

// forward32 computes y = Conv(x, w) + b for float32 on the packed driver,
// sample by sample and group by group (so a sample's result does not depend
// on the rest of the batch), and the fused Relu of each while it is in
// cache.
func (op *convOp) forward32(s *convScratch, g *convGeom, n, c, m int, x, w, b, y []float32) {
	group := op.group
	cg, mg := c/group, m/group
	k := cg * g.kh * g.kw
	plen := sconvPackedLen(mg, k)
	if !op.weightsFresh(s, w, false) {
		s.packed = convGrow(s.packed, group*plen)
		for gi := 0; gi < group; gi++ {
			sconvPackWeights(w[gi*mg*k:(gi+1)*mg*k], mg, k, s.packed[gi*plen:(gi+1)*plen])
		}
		s.wsrc, s.wlen, s.wflip = unsafe.SliceData(w), len(w), false
	}
	sg := sconvGeom{c: cg, hp: g.h + g.pt + g.pb, wp: g.w + g.pl + g.pr, kh: g.kh, kw: g.kw,
		dh: g.dh, dw: g.dw, sh: g.sh, sw: g.sw, oh: g.oh, ow: g.ow}
	s.preparePlan(sg, mg)
	m6 := (mg + sgemmMR - 1) / sgemmMR * sgemmMR
	if b != nil {
		s.bias = convGrow(s.bias, group*m6)
		clear(s.bias)
		for gi := 0; gi < group; gi++ {
			copy(s.bias[gi*m6:], b[gi*mg:(gi+1)*mg])
		}
	}
	padded := g.pt != 0 || g.pb != 0 || g.pl != 0 || g.pr != 0 || s.plan.needsPad()
	hw, p := g.h*g.w, g.oh*g.ow
	for ni := 0; ni < n; ni++ {
		for gi := 0; gi < group; gi++ {
			src := x[(ni*c+gi*cg)*hw : (ni*c+(gi+1)*cg)*hw]
			if padded {
				src = s.padInput(src, nil, cg, g.h, g.w, g.pt, g.pb, g.pl, g.pr)
			}
			var bg []float32
			if b != nil {
				bg = s.bias[gi*m6 : (gi+1)*m6]
			}
			yg := y[(ni*m+gi*mg)*p : (ni*m+(gi+1)*mg)*p]
			sconvSample(&s.plan, src, s.packed[gi*plen:(gi+1)*plen], mg, bg, yg, s.strip, s.cs, &s.tile)
			if op.relu {
				f32.Relu(yg, yg)
			}
		}
	}
}

// preparePlan sets up the driver plan and buffers for geometry g and m
// output rows per group.
func (s *convScratch) preparePlan(g sconvGeom, m int) {
	if s.plan.g != g || s.plan.off == nil {
		s.plan.init(g)
	}
	s.strip = convGrow(s.strip, g.k()*sgemmNR)
	s.cs = convGrow(s.cs, s.plan.scratchLen(m))
}

// convPadKey identifies the layout of a padded buffer: which of its
// elements are padding (zeros) and which are copied from the input.
type convPadKey struct{ c, h, w, pt, pb, pl, pr int }

// padInput returns the c channels of src (h×w) padded by pt, pb, pl, pr
// (negative pads crop) in s.pad, laid out for s.plan (padLen elements,
// including the sconvGrid slack), masked by the Relu of ym (src where ym >
// 0, +0 elsewhere; laid out like src) when ym is not nil. The padding and
// slack are zeroed only when the layout changes: copies of the input never
// write there, so from sample to sample only the interior is copied.
func (s *convScratch) padInput(src, ym []float32, c, h, w, pt, pb, pl, pr int) []float32 {
	key := convPadKey{c, h, w, pt, pb, pl, pr}
	n := s.plan.padLen()
	if cap(s.pad) < n {
		s.pad = make([]float32, n)
		s.padKey = key
	} else {
		s.pad = s.pad[:n]
		if s.padKey != key {
			clear(s.pad)
			s.padKey = key
		}
	}
	if pt < 0 || pb < 0 || pl < 0 || pr < 0 {
		if ym != nil {
			src = s.maskSample(src, ym)
		}
		sconvPad(src, c, h, w, pt, pb, pl, pr, s.pad)
		return s.pad
	}
	hp, wp := h+pt+pb, w+pl+pr
	for ci := 0; ci < c; ci++ {
		// The slicing checks the bounds f32.CopyRows and f32.ReluGradRows
		// rely on.
		d := s.pad[ci*hp*wp+pt*wp+pl : ci*hp*wp+pt*wp+pl+(h-1)*wp+w]
		sc := src[ci*h*w : (ci+1)*h*w]
		if ym != nil {
			yc := ym[ci*h*w : (ci+1)*h*w]
			f32.ReluGradRows(&d[0], wp, &yc[0], &sc[0], w, h, w)
			continue
		}
		f32.CopyRows(&d[0], wp, &sc[0], w, h, w)
	}
	return s.pad
}

// maskSample returns dy masked by the Relu of ym (dy where ym > 0, +0
// elsewhere) in s.mask.
func (s *convScratch) maskSample(dy, ym []float32) []float32 {
	s.mask = convGrow(s.mask, len(dy))
	f32.ReluGrad(s.mask, ym, dy)
	return s.mask
}

// convFlipWeights writes the weights of the input-gradient correlation of
// group gi: for w of shape (m, c/group, kh, kw), dst (cg rows of mg·kh·kw)
// holds W'[ci][(mi·kh + i)·kw + j] = w[gi·mg + mi][ci][kh−1−i][kw−1−j].
func convFlipWeights(w []float32, gi, mg, cg, kh, kw int, dst []float32) {
	kk := kh * kw
	for ci := 0; ci < cg; ci++ {
		for mi := 0; mi < mg; mi++ {
			src := w[((gi*mg+mi)*cg+ci)*kk : ((gi*mg+mi)*cg+ci+1)*kk]
			d := dst[(ci*mg+mi)*kk : (ci*mg+mi+1)*kk]
			for t, v := range src {
				d[kk-1-t] = v
			}
		}
	}
}

// convBackwardDirect reports whether the input gradient of g can run as a
// forward correlation: unit strides (any pads, dilations and groups).
func convBackwardDirect(g *convGeom) bool { return g.sh == 1 && g.sw == 1 }

// inputGrad32 writes dx, the gradient of Σ dy·Conv(x, w) with respect to x,
// for unit strides as the correlation of dy with the flipped,
// channel-transposed weights (the adjoint of a stride-1 convolution), with
// dy masked by the Relu of the output ym (dy where ym > 0, +0 elsewhere)
// when ym is not nil:
//
//	dx[n, g·Cg + c, y, x] = Σ_{m, i, j} w[g·Mg + m, c, kh−1−i, kw−1−j] · dy'[n, g·Mg + m, y + i·dh, x + j·dw]
//
// where dy' is dy padded by (kh−1)·dh − p_begin before and (kh−1)·dh − p_end
// after each axis (cropped where that is negative): the transposed
// convolution of Dumoulin & Visin (2016), "A guide to convolution arithmetic
// for deep learning", §4.1 (relationship 8 for stride 1).
func (op *convBackOp) inputGrad32(s *convScratch, g *convGeom, n, c, m int, w, dy, ym, dx []float32) {
	group := op.group
	cg, mg := c/group, m/group
	k := mg * g.kh * g.kw
	plen := sconvPackedLen(cg, k)
	if !op.weightsFresh(s, w, true) {
		s.flip = convGrow(s.flip, cg*k)
		s.packed = convGrow(s.packed, group*plen)
		for gi := 0; gi < group; gi++ {
			convFlipWeights(w, gi, mg, cg, g.kh, g.kw, s.flip)
			sconvPackWeights(s.flip, cg, k, s.packed[gi*plen:(gi+1)*plen])
		}
		s.wsrc, s.wlen, s.wflip = unsafe.SliceData(w), len(w), true
	}
	spanH, spanW := (g.kh-1)*g.dh, (g.kw-1)*g.dw
	pt, pb, pl, pr := spanH-g.pt, spanH-g.pb, spanW-g.pl, spanW-g.pr
	sg := sconvGeom{c: mg, hp: g.oh + pt + pb, wp: g.ow + pl + pr, kh: g.kh, kw: g.kw,
		dh: g.dh, dw: g.dw, sh: 1, sw: 1, oh: g.h, ow: g.w}
	s.preparePlan(sg, cg)
	padded := pt != 0 || pb != 0 || pl != 0 || pr != 0 || s.plan.needsPad()
	hw, p := g.h*g.w, g.oh*g.ow
	for ni := 0; ni < n; ni++ {
		for gi := 0; gi < group; gi++ {
			src := dy[(ni*m+gi*mg)*p : (ni*m+(gi+1)*mg)*p]
			var ys []float32
			if ym != nil {
				ys = ym[(ni*m+gi*mg)*p : (ni*m+(gi+1)*mg)*p]
			}
			switch {
			case padded:
				// The fused Relu's mask, if any, applied as the sample is copied.
				src = s.padInput(src, ys, mg, g.oh, g.ow, pt, pb, pl, pr)
			case ys != nil:
				src = s.maskSample(src, ys)
			}
			sconvSample(&s.plan, src, s.packed[gi*plen:(gi+1)*plen], cg, nil, dx[(ni*c+gi*cg)*hw:(ni*c+(gi+1)*cg)*hw], s.strip, s.cs, &s.tile)
		}
	}
}
