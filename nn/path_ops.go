package nn

import (
	"math"
	"sync"

	"github.com/apportion/apportion/nn/internal/asm/f32"
	"github.com/apportion/apportion/nn/internal/asm/f64"
	"github.com/apportion/apportion/nn/internal/ops"
)

// pathOp is one operation of a path plan, on many points (rows) at once.
type pathOp[T pathFloat] interface {
	// inputs are the slots the operation reads; output the slot it writes.
	inputs() []int
	output() int
	// forward writes the outputs of n points into y from their inputs.
	forward(n int, in [][]T, y []T)
	// backward adds to dx[i] the gradient with respect to input i of n
	// segments, Σ dy·(∂y/∂x_i) on each, given their output gradients dy.
	// A pathKink reads its inputs at the n+1 ends of the segments in ends
	// (its piece on a segment is the one at the segment's midpoint);
	// affine operations are passed nil.
	backward(n int, ends [][]T, dy []T, dx [][]T)
}

// pathKink is a piecewise-affine operation: on a segment where its inputs
// are affine it is affine except at the points breaks appends, those
// strictly inside (a, b) where it passes from one piece to the next, given
// its inputs at a and at b.
type pathKink[T pathFloat] interface {
	pathOp[T]
	breaks(at, bt [][]T, a, b float64, dst []float64) []float64
}

// pathDense is Y = op(A)·B + C on every point: a Gemm or a MatMul with
// constant weights B (alpha folded in) and bias C (beta folded in; nil
// for none). A sample's A is m×k (k×m with transA).
type pathDense[T pathFloat] struct {
	in, out int
	m, k, n int
	transA  bool
	b       []T
	bias    []T
	bT      []float64    // float64 plans: op(B)ᵀ, n×k, for the input gradient by rows
	w32     *ops.Weights // float32 plans, A not transposed: B laid out once
}

// rowsF64 reports whether d's products run row by row on f64.AccumRows
// (float64 plans, A not transposed): a row's result then does not depend
// on the rows around it, and a few rows (the ends of a path, one sum
// pulled back) cost no GEMM's blocking.
func (d *pathDense[T]) rowsF64() bool { return d.bT != nil && !d.transA }

// setRows builds op(B)ᵀ for rowsF64 in float64 plans, and B's layout for
// the forward products of float32 plans.
func (d *pathDense[T]) setRows() {
	b, ok := any(d.b).([]float64)
	if !ok {
		if b32, ok := any(d.b).([]float32); ok && !d.transA {
			d.w32 = ops.NewWeights(false, d.n, d.k, b32)
		}
		return
	}
	d.bT = make([]float64, len(b))
	for l := 0; l < d.k; l++ {
		for j := 0; j < d.n; j++ {
			d.bT[j*d.k+l] = b[l*d.n+j]
		}
	}
}

func (d *pathDense[T]) inputs() []int { return []int{d.in} }
func (d *pathDense[T]) output() int   { return d.out }

func (d *pathDense[T]) forward(n int, in [][]T, y []T) {
	a, mk, mn := in[0], d.m*d.k, d.m*d.n
	if d.rowsF64() {
		a64, y64, b64 := any(a).([]float64), any(y).([]float64), any(d.b).([]float64)
		for r := 0; r < n*d.m; r++ {
			yr := y64[r*d.n : (r+1)*d.n]
			clear(yr)
			f64.AccumRows(yr, a64[r*d.k:(r+1)*d.k], b64, d.n)
		}
	} else if d.w32 != nil {
		// One bias row for every row of the batch: added as the tiles are
		// stored, with the bits of the network's Gemm op.
		var bias []float32
		if d.m == 1 && d.bias != nil {
			bias = any(d.bias).([]float32)
		}
		d.w32.Product(n*d.m, 1, any(a).([]float32), d.k, bias, false, any(y).([]float32))
		if bias != nil {
			return
		}
	} else if !d.transA {
		ops.Product(false, false, n*d.m, d.n, d.k, a, d.k, d.b, d.n, 0, y, d.n)
	} else {
		for p := 0; p < n; p++ {
			ops.Product(true, false, d.m, d.n, d.k, a[p*mk:(p+1)*mk], d.m, d.b, d.n, 0, y[p*mn:(p+1)*mn], d.n)
		}
	}
	if d.bias == nil {
		return
	}
	for p := 0; p < n; p++ {
		yp := y[p*mn : (p+1)*mn]
		for j, c := range d.bias {
			yp[j] += c
		}
	}
}

func (d *pathDense[T]) backward(n int, _ [][]T, dy []T, dx [][]T) {
	mk, mn := d.m*d.k, d.m*d.n
	if d.rowsF64() {
		dy64, dx64 := any(dy).([]float64), any(dx[0]).([]float64)
		for r := 0; r < n*d.m; r++ {
			f64.AccumRows(dx64[r*d.k:(r+1)*d.k], dy64[r*d.n:(r+1)*d.n], d.bT, d.k)
		}
		return
	}
	if !d.transA {
		ops.Product(false, true, n*d.m, d.k, d.n, dy, d.n, d.b, d.n, 1, dx[0], d.k)
		return
	}
	for p := 0; p < n; p++ {
		ops.Product(false, true, d.k, d.m, d.n, d.b, d.n, dy[p*mn:(p+1)*mn], d.n, 1, dx[0][p*mk:(p+1)*mk], d.m)
	}
}

// pathConv is a Conv with constant weights and bias.
type pathConv[T pathFloat] struct {
	in, out int
	plan    *ops.ConvPlan
	w, b    []T
	inSize  int
	tmp     sync.Pool // *[]T: the input gradient before it is added
}

func (c *pathConv[T]) inputs() []int { return []int{c.in} }
func (c *pathConv[T]) output() int   { return c.out }

func (c *pathConv[T]) forward(n int, in [][]T, y []T) {
	ops.ConvForward(c.plan, n, in[0], c.w, c.b, y)
}

func (c *pathConv[T]) backward(n int, _ [][]T, dy []T, dx [][]T) {
	bp, _ := c.tmp.Get().(*[]T)
	if bp == nil {
		bp = new([]T)
	}
	g := grow(*bp, n*c.inSize)
	ops.ConvInputGrad(c.plan, n, c.w, dy, g)
	addRow(dx[0][:n*c.inSize], g)
	*bp = g
	c.tmp.Put(bp)
}

// pathSparse is an affine map with few terms per output element:
//
//	y[i] = c[i] + Σ_{t in row i} w[t]·x_{src[t]}[col[t]]
//
// Transpose, Concat, Pad, the average pools, the reductions, BatchNorm and
// the elementwise arithmetic with constants are all such maps.
type pathSparse[T pathFloat] struct {
	in, inSize []int
	out, size  int
	start      []int32 // row i holds terms start[i]..start[i+1]
	src        []uint8
	col        []int32
	w, c       []T
}

func newSparse[T pathFloat](size int) *pathSparse[T] {
	return &pathSparse[T]{size: size, start: make([]int32, 1, size+1), c: make([]T, 0, size)}
}

// term adds w·x_src[col] to the row being built.
func (s *pathSparse[T]) term(src uint8, col int32, w T) {
	s.src = append(s.src, src)
	s.col = append(s.col, col)
	s.w = append(s.w, w)
}

// endRow closes the row being built with constant c.
func (s *pathSparse[T]) endRow(c T) {
	s.start = append(s.start, int32(len(s.col)))
	s.c = append(s.c, c)
}

func (s *pathSparse[T]) inputs() []int { return s.in }
func (s *pathSparse[T]) output() int   { return s.out }

func (s *pathSparse[T]) forward(n int, in [][]T, y []T) {
	for p := 0; p < n; p++ {
		yp := y[p*s.size : (p+1)*s.size]
		for i := range yp {
			v := s.c[i]
			for t := s.start[i]; t < s.start[i+1]; t++ {
				src := s.src[t]
				v += s.w[t] * in[src][p*s.inSize[src]+int(s.col[t])]
			}
			yp[i] = v
		}
	}
}

func (s *pathSparse[T]) backward(n int, _ [][]T, dy []T, dx [][]T) {
	for p := 0; p < n; p++ {
		gp := dy[p*s.size : (p+1)*s.size]
		for i, g := range gp {
			if g == 0 {
				continue
			}
			for t := s.start[i]; t < s.start[i+1]; t++ {
				src := s.src[t]
				dx[src][p*s.inSize[src]+int(s.col[t])] += s.w[t] * g
			}
		}
	}
}

// The elementwise kinks.
const (
	kinkRelu  = iota // max(x, 0)
	kinkLeaky        // x for x > 0, slope·x otherwise (LeakyRelu, PRelu)
	kinkClip         // min(max(x, lo), hi)
	kinkAbs          // |x|
)

// pathKinkOp is an elementwise piecewise-linear operation. Its pieces meet
// where the input crosses 0 (Relu, LeakyRelu, PRelu, Abs) or a bound
// (Clip); its derivative on a piece is read at the piece's midpoint.
type pathKinkOp[T pathFloat] struct {
	in, out, size int
	kind          int
	slope         []T // LeakyRelu: one value; PRelu: one per element
	lo, hi        float64
}

func (k *pathKinkOp[T]) inputs() []int { return []int{k.in} }
func (k *pathKinkOp[T]) output() int   { return k.out }

func (k *pathKinkOp[T]) slopeAt(j int) T {
	if len(k.slope) == 1 {
		return k.slope[0]
	}
	return k.slope[j]
}

func (k *pathKinkOp[T]) forward(n int, in [][]T, y []T) {
	x := in[0][:n*k.size]
	y = y[:len(x)]
	switch k.kind {
	case kinkRelu:
		if x32, ok := any(x).([]float32); ok {
			f32.Relu(any(y).([]float32), x32) // max(v, 0), as below
			return
		}
		for i, v := range x {
			y[i] = max(v, 0)
		}
	case kinkLeaky:
		for i, v := range x {
			if v <= 0 {
				v *= k.slopeAt(i % k.size)
			}
			y[i] = v
		}
	case kinkClip:
		lo, hi := T(k.lo), T(k.hi)
		for i, v := range x {
			y[i] = min(max(v, lo), hi)
		}
	case kinkAbs:
		for i, v := range x {
			if v < 0 {
				v = -v
			}
			y[i] = v
		}
	}
}

// backward uses the derivative at each segment's midpoint, whose sign is
// that of the sum of the ends, with the engine's conventions at the kinks
// themselves (Relu and Clip 0, LeakyRelu the slope, Abs 0).
func (k *pathKinkOp[T]) backward(n int, ends [][]T, dy []T, dx [][]T) {
	x, d, size := ends[0], dx[0], k.size
	for j := 0; j < n; j++ {
		a, b := x[j*size:(j+1)*size], x[(j+1)*size:(j+2)*size]
		g, out := dy[j*size:(j+1)*size], d[j*size:(j+1)*size]
		switch k.kind {
		case kinkRelu:
			if out32, ok := any(out).([]float32); ok {
				f32.ReluGradMidAdd(out32, any(a).([]float32), any(b).([]float32), any(g).([]float32))
				continue
			}
			for i, v := range g {
				if a[i]+b[i] > 0 {
					out[i] += v
				}
			}
		case kinkLeaky:
			for i, v := range g {
				if a[i]+b[i] > 0 {
					out[i] += v
				} else {
					out[i] += v * k.slopeAt(i)
				}
			}
		case kinkClip:
			for i, v := range g {
				if m := (float64(a[i]) + float64(b[i])) / 2; m > k.lo && m < k.hi {
					out[i] += v
				}
			}
		case kinkAbs:
			for i, v := range g {
				switch s := a[i] + b[i]; {
				case s > 0:
					out[i] += v
				case s < 0:
					out[i] -= v
				}
			}
		}
	}
}

func (k *pathKinkOp[T]) breaks(at, bt [][]T, a, b float64, dst []float64) []float64 {
	thresholds := [2]float64{0, math.NaN()}
	if k.kind == kinkClip {
		thresholds = [2]float64{k.lo, k.hi}
	}
	xa, xb := at[0][:k.size], bt[0][:k.size]
	for _, th := range thresholds {
		if math.IsNaN(th) || math.IsInf(th, 0) {
			continue
		}
		if x32, ok := any(xa).([]float32); ok && th == 0 {
			// Strictly on both sides of 0 exactly when the product is
			// negative: two float32 values multiply exactly in float64
			// (48 significant bits, exponents within its range), and a
			// NaN compares false. One well-predicted branch per element.
			y32 := any(xb).([]float32)[:len(x32)]
			for j, va := range x32 {
				if vb := y32[j]; float64(va)*float64(vb) < 0 {
					ua, ub := float64(va), float64(vb)
					dst = append(dst, a+(b-a)*(ua/(ua-ub)))
				}
			}
			continue
		}
		t := T(th)
		for j, va := range xa {
			if vb := xb[j]; (va < t && vb > t) || (va > t && vb < t) {
				ua, ub := float64(va)-th, float64(vb)-th
				dst = append(dst, a+(b-a)*(ua/(ua-ub)))
			}
		}
	}
	return dst
}

// pathMaxPool is MaxPool or GlobalMaxPool: the first maximum of each
// window, the windows listed by input element (padding never takes part).
type pathMaxPool[T pathFloat] struct {
	in, out, inSize int
	start, col      []int32
}

func (m *pathMaxPool[T]) inputs() []int { return []int{m.in} }
func (m *pathMaxPool[T]) output() int   { return m.out }

// argmax returns the input element of the first maximum of window o of x
// (the engines' tie rule).
func (m *pathMaxPool[T]) argmax(o int, x []T) int32 {
	taps := m.col[m.start[o]:m.start[o+1]]
	best := taps[0]
	for _, c := range taps[1:] {
		if x[c] > x[best] {
			best = c
		}
	}
	return best
}

func (m *pathMaxPool[T]) forward(n int, in [][]T, y []T) {
	outs := len(m.start) - 1
	for p := 0; p < n; p++ {
		x := in[0][p*m.inSize : (p+1)*m.inSize]
		for o := 0; o < outs; o++ {
			y[p*outs+o] = x[m.argmax(o, x)]
		}
	}
}

// backward routes each window's gradient to its first maximum at the
// segment's midpoint, the largest sum of the element's values at the ends.
func (m *pathMaxPool[T]) backward(n int, ends [][]T, dy []T, dx [][]T) {
	outs := len(m.start) - 1
	for p := 0; p < n; p++ {
		a := ends[0][p*m.inSize : (p+1)*m.inSize]
		b := ends[0][(p+1)*m.inSize : (p+2)*m.inSize]
		d := dx[0][p*m.inSize : (p+1)*m.inSize]
		for o := 0; o < outs; o++ {
			taps := m.col[m.start[o]:m.start[o+1]]
			best := taps[0]
			bv := a[best] + b[best]
			for _, c := range taps[1:] {
				if v := a[c] + b[c]; v > bv {
					best, bv = c, v
				}
			}
			d[best] += dy[p*outs+o]
		}
	}
}

// breaks follows the upper envelope of each window's elements, affine on
// [a, b]: from the element on top just after a (the largest at a, ties to
// the larger slope), the next break is the first crossing by an element of
// larger slope, which then is on top.
func (m *pathMaxPool[T]) breaks(at, bt [][]T, a, b float64, dst []float64) []float64 {
	xa, xb := at[0], bt[0]
	for o := 0; o+1 < len(m.start); o++ {
		taps := m.col[m.start[o]:m.start[o+1]]
		if len(taps) < 2 {
			continue
		}
		cur := taps[0]
		for _, c := range taps[1:] {
			if xa[c] > xa[cur] || (xa[c] == xa[cur] && xb[c] > xb[cur]) {
				cur = c
			}
		}
		// Lines that cross the one on top stay above it: when it is on
		// top at b too, nothing crossed it.
		crossed := false
		for _, c := range taps {
			crossed = crossed || xb[c] > xb[cur]
		}
		if !crossed {
			continue
		}
		r := 0.0
		for range taps {
			ca, cs := float64(xa[cur]), float64(xb[cur])-float64(xa[cur])
			next, rn, sn := int32(-1), 1.0, 0.0
			for _, c := range taps {
				ka, ks := float64(xa[c]), float64(xb[c])-float64(xa[c])
				den := ks - cs
				if c == cur || den <= 0 {
					continue
				}
				rc := (ca - ka) / den
				if rc > r && (rc < rn || (rc == rn && ks > sn)) {
					next, rn, sn = c, rc, ks
				}
			}
			if next < 0 {
				break
			}
			dst = append(dst, a+(b-a)*rn)
			cur, r = next, rn
		}
	}
	return dst
}
