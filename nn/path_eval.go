package nn

import (
	"context"
	"errors"
	"math"
	"slices"

	"github.com/apportion/apportion/internal/gausslegendre"
	"github.com/apportion/apportion/nn/internal/asm/f32"
)

// errTooManyPieces stops a path integral that passes its piece limit.
var errTooManyPieces = errors.New("more pieces than the limit")

// pathRunElements bounds the values one level of the evaluator holds for a
// run of points (about 16 MiB in float64, 8 in float32): runs are cut to
// at most that many elements of live values, and to at most pathRunMax
// points.
const (
	pathRunElements = 1 << 21
	pathRunMax      = 1024
)

// pathRun integrates the gradient of one head output along one straight
// path, following Sotoudeh & Thakur (2019), "Computing Linear Restrictions
// of Neural Networks" (ExactLine): operation by operation, the path is a
// list of points such that every value computed so far is affine in α
// between consecutive points, so its value anywhere on a segment is the
// linear interpolation of its values at the segment's ends. A piecewise-
// affine operation adds the points where its input crosses a kink (a Relu
// input crossing 0, a max-pool window changing its maximum), with every
// live value interpolated there, before it runs; after the last operation
// the segments are the path's pieces, on each of which the network is
// affine and its input gradient constant.
//
// The gradient is integrated on the way back. A piece's contribution,
// Jᵀ·s with J the network's Jacobian on the piece and s the head's
// gradient integrated along the piece, is pulled back operation by
// operation, and where a segment of an earlier operation holds several
// later pieces their pulled-back gradients are summed before going
// further: an operation's input-gradient product runs once per segment of
// the points that operation saw, not once per piece, and the first
// operation's once for the whole path. The points are processed depth
// first in runs of at most runLen, so memory is bounded whatever the number
// of pieces.
type pathRun[T pathFloat] struct {
	plan      *pathPlan[T]
	ctx       context.Context
	target    int
	maxPieces int // 0: no limit
	runLen    int
	pieces    int
	breaks    []float64 // every piece end, when keep is set
	keep      bool
	levels    []*pathLevel[T]
	head      headScratch
}

// pathLevel holds the buffers of one level (one operation) of the depth-
// first walk, reused from run to run: a level runs one run at a time.
type pathLevel[T pathFloat] struct {
	y          []T   // the operation's output at the run's points
	cg, dx     [][]T // per slot: segment gradients from below, and through the operation
	rows       [][]T // per slot: the values at the run's points
	child, cgh [][]T // slot tables handed down
	alpha      []float64
	seg        []int // the segment of this level each run segment lies in
	cuts       [][]float64
}

// newPathRun returns a run of plan p, with the buffers of an earlier run
// when one is free; release gives it back.
func newPathRun[T pathFloat](ctx context.Context, p *pathPlan[T], target, maxPieces int) *pathRun[T] {
	if r, ok := p.runs.Get().(*pathRun[T]); ok {
		r.ctx, r.target, r.maxPieces, r.pieces, r.breaks, r.keep = ctx, target, maxPieces, 0, nil, false
		return r
	}
	live := 0
	for k := range p.ops {
		sum := p.sizes[p.ops[k].output()]
		for s, last := range p.last {
			if last > k && s != p.ops[k].output() {
				sum += p.sizes[s]
			}
		}
		live = max(live, sum)
	}
	r := &pathRun[T]{plan: p, ctx: ctx, target: target, maxPieces: maxPieces,
		runLen: min(pathRunMax, max(8, pathRunElements/max(live, 1)))}
	for range p.ops {
		n := len(p.sizes)
		r.levels = append(r.levels, &pathLevel[T]{cg: make([][]T, n), dx: make([][]T, n), rows: make([][]T, n),
			child: make([][]T, n), cgh: make([][]T, n)})
	}
	return r
}

// release returns r to its plan's pool; r must not be used after.
func (r *pathRun[T]) release() {
	r.ctx, r.breaks = nil, nil
	r.plan.runs.Put(r)
}

// integrate returns ∫₀¹ ∇_x F_target(from + α(to − from)) dα.
func (r *pathRun[T]) integrate(from, to []float64) ([]float64, error) {
	p := r.plan
	n := p.sizes[0]
	x := make([]T, 2*n)
	for i := range n {
		x[i], x[n+i] = T(from[i]), T(to[i])
	}
	vals := make([][]T, len(p.sizes))
	grads := make([][]T, len(p.sizes))
	vals[0], grads[0] = x, make([]T, n)
	if err := r.descend(0, []float64{0, 1}, vals, grads); err != nil {
		return nil, err
	}
	if r.keep && len(r.breaks) > 0 {
		r.breaks = r.breaks[:len(r.breaks)-1] // the path's end, α = 1
	}
	out := make([]float64, n)
	for i, g := range grads[0] {
		out[i] = float64(g)
	}
	return out, nil
}

// descend runs operations k… on the points pts (sorted, the ends of the
// segments of this level), whose live values vals holds, one row per
// point; it adds each segment's pulled-back gradient to the rows of grads
// (one per segment) of the slots live here.
func (r *pathRun[T]) descend(k int, pts []float64, vals, grads [][]T) error {
	if err := r.ctx.Err(); err != nil {
		return err
	}
	p := r.plan
	if k == len(p.ops) {
		return r.leaf(pts, vals[p.output], grads[p.output])
	}
	op := p.ops[k]
	lv := r.levels[k]
	kink, isKink := op.(pathKink[T])
	total := 0
	if isKink {
		lv.cuts = grow(lv.cuts, len(pts)-1)
		at, bt := make([][]T, len(op.inputs())), make([][]T, len(op.inputs()))
		for s := range lv.cuts {
			for i, slot := range op.inputs() {
				at[i], bt[i] = row(vals[slot], p.sizes[slot], s), row(vals[slot], p.sizes[slot], s+1)
			}
			lv.cuts[s] = tidyBreaks(kink.breaks(at, bt, pts[s], pts[s+1], lv.cuts[s][:0]), pts[s], pts[s+1])
			total += len(lv.cuts[s])
		}
		// The pieces already integrated, and at least one per segment of
		// this level between pts[0] and pts[end]: a bound that lets a path
		// with too many pieces stop at the first level that shows it (on
		// a CNN, the first ReLU's crossings alone), before any deeper pass.
		if bound := r.pieces + len(pts) - 1 + total; r.maxPieces > 0 && bound > r.maxPieces {
			r.pieces = bound
			return errTooManyPieces
		}
	}
	if total == 0 && len(pts) <= r.runLen {
		return r.through(k, pts, vals, grads, isKink)
	}
	return r.split(k, pts, vals, grads, isKink)
}

// through runs operation k on every point, descends with the same segments
// and pulls the gradient back through the operation.
func (r *pathRun[T]) through(k int, pts []float64, vals, grads [][]T, isKink bool) error {
	p := r.plan
	op := p.ops[k]
	lv := r.levels[k]
	out, np := op.output(), len(pts)
	in := rows(vals, op.inputs())
	lv.y = grow(lv.y, np*p.sizes[out])
	op.forward(np, in, lv.y)
	for s := range lv.child {
		lv.child[s], lv.cgh[s] = nil, grads[s]
		if p.last[s] > k {
			lv.child[s] = vals[s]
		}
	}
	lv.child[out] = lv.y
	lv.cg[out] = zeros(lv.cg[out], (np-1)*p.sizes[out])
	lv.cgh[out] = lv.cg[out]
	if err := r.descend(k+1, pts, lv.child, lv.cgh); err != nil {
		return err
	}
	var ends [][]T
	if isKink {
		ends = in
	}
	op.backward(np-1, ends, lv.cg[out], rows(grads, op.inputs()))
	return nil
}

// split refines the points with the cuts of operation k, interpolating the
// live values there, and runs the rest of the plan on runs of at most
// runLen points (consecutive runs share their end point); each run's
// segment gradients are pulled back through operation k and summed into
// the segments of this level they lie in.
func (r *pathRun[T]) split(k int, pts []float64, vals, grads [][]T, isKink bool) error {
	p := r.plan
	op := p.ops[k]
	lv := r.levels[k]
	out := op.output()
	var carried []int // slots live after k, besides out
	for s, v := range vals {
		if v != nil && p.last[s] > k {
			carried = append(carried, s)
		}
	}
	keep := append(slices.Clone(carried), op.inputs()...)
	slices.Sort(keep)
	keep = slices.Compact(keep)
	lv.alpha, lv.seg = lv.alpha[:0], lv.seg[:0]
	for _, s := range keep {
		lv.rows[s] = lv.rows[s][:0]
	}
	// add appends point a: row j of vals when frac is 0, else the
	// interpolation at frac between rows j and j+1 (exact on a segment).
	add := func(a float64, j int, frac float64) {
		lv.alpha = append(lv.alpha, a)
		f := T(frac)
		for _, s := range keep {
			size := p.sizes[s]
			lo := row(vals[s], size, j)
			if frac == 0 {
				lv.rows[s] = append(lv.rows[s], lo...)
				continue
			}
			hi := row(vals[s], size, j+1)[:size]
			m := len(lv.rows[s])
			lv.rows[s] = slices.Grow(lv.rows[s], size)[:m+size]
			dst := lv.rows[s][m:]
			if d32, ok := any(dst).([]float32); ok {
				f32.Lerp(d32, any(lo).([]float32), any(hi).([]float32), float32(f))
				continue
			}
			for i, v := range lo {
				dst[i] = v + f*(hi[i]-v)
			}
		}
	}
	flush := func() error {
		n := len(lv.alpha)
		for s := range lv.child {
			lv.child[s], lv.cgh[s] = nil, nil
		}
		for _, s := range carried {
			lv.child[s] = lv.rows[s]
			lv.cg[s] = zeros(lv.cg[s], (n-1)*p.sizes[s])
			lv.cgh[s] = lv.cg[s]
		}
		in := rows(lv.rows, op.inputs())
		lv.y = grow(lv.y, n*p.sizes[out])
		op.forward(n, in, lv.y)
		lv.child[out] = lv.y
		lv.cg[out] = zeros(lv.cg[out], (n-1)*p.sizes[out])
		lv.cgh[out] = lv.cg[out]
		if err := r.descend(k+1, lv.alpha, lv.child, lv.cgh); err != nil {
			return err
		}
		for _, s := range op.inputs() {
			lv.dx[s] = zeros(lv.dx[s], (n-1)*p.sizes[s])
		}
		var ends [][]T
		if isKink {
			ends = in
		}
		op.backward(n-1, ends, lv.cg[out], rows(lv.dx, op.inputs()))
		for _, s := range keep {
			size := p.sizes[s]
			isIn, isCarried := slices.Contains(op.inputs(), s), slices.Contains(carried, s)
			for j, o := range lv.seg {
				dst := row(grads[s], size, o)
				if isCarried {
					addRow(dst, row(lv.cg[s], size, j))
				}
				if isIn {
					addRow(dst, row(lv.dx[s], size, j))
				}
			}
		}
		// The last point begins the next run.
		last := n - 1
		lv.alpha = append(lv.alpha[:0], lv.alpha[last])
		lv.seg = lv.seg[:0]
		for _, s := range keep {
			size := p.sizes[s]
			lv.rows[s] = append(lv.rows[s][:0], lv.rows[s][last*size:(last+1)*size]...)
		}
		return nil
	}
	add(pts[0], 0, 0)
	for s := 0; s+1 < len(pts); s++ {
		var c []float64
		if isKink {
			c = lv.cuts[s]
		}
		for _, a := range c {
			add(a, s, (a-pts[s])/(pts[s+1]-pts[s]))
			lv.seg = append(lv.seg, s)
			if len(lv.alpha) == r.runLen {
				if err := flush(); err != nil {
					return err
				}
			}
		}
		add(pts[s+1], s+1, 0)
		lv.seg = append(lv.seg, s)
		if len(lv.alpha) == r.runLen && s+2 < len(pts) {
			if err := flush(); err != nil {
				return err
			}
		}
	}
	return flush()
}

// leaf seeds each piece with the head's gradient integrated along it.
func (r *pathRun[T]) leaf(pts []float64, y, g []T) error {
	kk := r.plan.sizes[r.plan.output]
	hs := &r.head
	hs.grow(kk)
	for j := 0; j+1 < len(pts); j++ {
		for i := range kk {
			hs.ya[i], hs.yb[i] = float64(y[j*kk+i]), float64(y[(j+1)*kk+i])
		}
		headIntegral(r.plan.head, r.target, hs, pts[j+1]-pts[j])
		dst := row(g, kk, j)
		for i, v := range hs.s {
			dst[i] = T(v)
		}
	}
	r.pieces += len(pts) - 1
	if r.keep {
		r.breaks = append(r.breaks, pts[1:]...)
	}
	if r.maxPieces > 0 && r.pieces > r.maxPieces {
		return errTooManyPieces
	}
	return nil
}

func grow[E any](b []E, n int) []E {
	if cap(b) < n {
		return make([]E, n)
	}
	return b[:n]
}

func zeros[T pathFloat](b []T, n int) []T {
	b = grow(b, n)
	clear(b)
	return b
}

// tidyBreaks sorts the breaks of one segment (a, b), drops those not
// strictly inside and merges those closer than 2⁻⁴⁴ (about 6e-14) of
// the path.
func tidyBreaks(c []float64, a, b float64) []float64 {
	const eps = 0x1p-44
	slices.Sort(c)
	out := c[:0]
	last := a
	for _, v := range c {
		if v-last > eps && b-v > eps {
			out = append(out, v)
			last = v
		}
	}
	return out
}

func row[T pathFloat](v []T, size, j int) []T { return v[j*size : (j+1)*size] }

func rows[T pathFloat](vals [][]T, slots []int) [][]T {
	out := make([][]T, len(slots))
	for i, s := range slots {
		out[i] = vals[s]
	}
	return out
}

func addRow[T pathFloat](dst, src []T) {
	if d32, ok := any(dst).([]float32); ok {
		f32.AddTo(d32, any(src).([]float32))
		return
	}
	for i, v := range src {
		dst[i] += v
	}
}

// headTolerance is the accuracy of the head's integral along a piece, per
// unit of α: the head's gradient (bounded by 1 for Softmax, LogSoftmax and
// Sigmoid) is integrated to 1e-12 times the piece's length.
const headTolerance = 1e-12

// headScratch holds the head's inputs at a piece's ends, the integral and
// the buffers of its quadrature.
type headScratch struct {
	ya, yb, s, y, g, coarse, fine []float64
}

func (h *headScratch) grow(k int) {
	if len(h.ya) != k {
		*h = headScratch{ya: make([]float64, k), yb: make([]float64, k), s: make([]float64, k),
			y: make([]float64, k), g: make([]float64, k), coarse: make([]float64, k), fine: make([]float64, k)}
	}
}

// headIntegral writes into h.s the integral over a piece of length width
// of the gradient of head output t with respect to the head's input y,
// which is affine along the piece, from h.ya to h.yb:
//
//	s = width · ∫₀¹ ∇_y h_t(ya + u(yb − ya)) du
//
// For no head, s = width·e_t. Otherwise adaptive Gauss–Legendre: a panel's
// 8- and 16-point rules must agree to headTolerance·(panel length) in
// every component, or the panel is halved.
func headIntegral(head string, t int, h *headScratch, width float64) {
	s := h.s
	clear(s)
	if head == headNone {
		s[t] = width
		return
	}
	rule := func(dst []float64, n int, u0, u1 float64) {
		x, w := gausslegendre.Rule(n)
		clear(dst)
		half := (u1 - u0) / 2
		for j := range x {
			u := u0 + half*(x[j]+1)
			for i := range h.y {
				h.y[i] = h.ya[i] + u*(h.yb[i]-h.ya[i])
			}
			headGradient(head, t, h.y, h.g)
			for i, v := range h.g {
				dst[i] += half * w[j] * v
			}
		}
	}
	var panel func(u0, u1 float64, depth int)
	panel = func(u0, u1 float64, depth int) {
		rule(h.coarse, 8, u0, u1)
		rule(h.fine, 16, u0, u1)
		ok := depth >= 40
		if !ok {
			d := 0.0
			for i := range h.fine {
				d = max(d, math.Abs(h.fine[i]-h.coarse[i]))
			}
			ok = d <= headTolerance*(u1-u0)
		}
		if ok {
			for i, v := range h.fine {
				s[i] += v
			}
			return
		}
		m := (u0 + u1) / 2
		panel(u0, m, depth+1)
		panel(m, u1, depth+1)
	}
	panel(0, 1, 0)
	for i := range s {
		s[i] *= width
	}
}

// headGradient writes into g the gradient of head output t with respect
// to the head's input y:
//
//	Softmax:    ∂p_t/∂y_k = p_t (δ_tk − p_k)
//	LogSoftmax: ∂log p_t/∂y_k = δ_tk − p_k
//	Sigmoid:    ∂σ(y_t)/∂y_k = δ_tk σ(y_t)(1 − σ(y_t))
func headGradient(head string, t int, y, g []float64) {
	clear(g)
	if head == headSigmoid {
		s := 1 / (1 + math.Exp(-y[t]))
		g[t] = s * (1 - s)
		return
	}
	m := slices.Max(y)
	sum := 0.0
	for i, v := range y {
		g[i] = math.Exp(v - m)
		sum += g[i]
	}
	pt := g[t] / sum
	for i := range g {
		g[i] /= -sum
	}
	g[t] += 1
	if head == headSoftmax {
		for i := range g {
			g[i] *= pt
		}
	}
}
