package gradattr

import (
	"cmp"
	"math"
	"slices"
)

// Adaptive refinement of the trapezoid rule: automatic integrated gradients
// with RuleTrapezoid (the default) bisect only the intervals whose
// estimated error is largest, not every interval.
//
// Why: on a ReLU network the integrand ∂F/∂x along the path is piecewise
// constant, with hundreds to tens of thousands of jumps, of very unequal
// size, at unknown places. The trapezoid rule's error on an interval
// [a, b] of length h holding one jump d at an unknown place t is
// d·((a + b)/2 − t), anywhere in ±d·h/2: refining where the gradient
// changes most removes most of the error for few points. Measured on the
// benchmark zoo's CNNs and the welds demo (bench/RESULTS.md): a third to a
// tenth of the points uniform doubling needs for the same error.
//
// Error estimate: take each interval's jump D = Δ ⊙ (g_b − g_a) (Δ = x − x′)
// as one jump at a uniformly distributed place, so that its error on
// feature i has standard deviation |D_i|·h/√12, and the intervals' errors
// as independent. Feature i's error then has standard deviation
// σ_i = √(Σ_k (D_k,i·h_k)²/12), taken as normal: |error_i| has mean
// √(2/π)·σ_i and standard deviation √(1 − 2/π)·σ_i, and the L1 error, a
// sum of independent such terms, mean √(2/π)·Σ_i σ_i and standard
// deviation √(1 − 2/π)·√(Σ_i σ_i²). On the benchmark's CNNs and the welds
// demo the actual error against the exact integral was 0.82 ± 0.01 of
// Σ_i σ_i / ‖IG‖₁ at every pass, where that mean is 0.80: the model fits
// to a few percent. The estimate reported, and refined to the tolerance,
// is the mean plus two standard deviations, with 10% more for the model's
// fit, over ‖IG‖₁:
//
//	1.1·(√(2/π)·Σ_i σ_i + 2√(1 − 2/π)·√(Σ_i σ_i²)) / ‖IG‖₁
//
// With many features the sum concentrates: the estimate is the expected
// error and 15% (784 features of equal σ); with few, the margin grows
// (20 features: 47%). bench/compare's IG rows report the estimate beside
// the actual error.
//
// Both ends are evaluated just inside the path, at α = ε and 1 − ε
// (ε = 2⁻¹⁶): the integral does not see single points, but the gradient at
// a baseline such as all zeros often differs from its limit along the path
// (every max-pooling window and ReLU of the first layer ties there, and the
// network breaks the ties one way while every point past it breaks them
// another), and one such end node weighs h/2 in the rule.

// adaptiveEnd is ε: the ends are evaluated at α = ε and 1 − ε.
const adaptiveEnd = 1.0 / (1 << 16)

// adaptiveStart is the number of intervals of the first, uniform pass.
const adaptiveStart = 16

// adaptiveNode is one evaluated point: α and its gradient (an index into
// the store).
type adaptiveNode struct {
	alpha float64
	grad  int
}

// adaptiveInterval is [nodes[a], nodes[b]] and its indicator
// h·‖Δ ⊙ (g_b − g_a)‖₁.
type adaptiveInterval struct {
	a, b int
	ind  float64
}

// adaptivePath integrates one straight path with the adaptively refined
// trapezoid rule. The trapezoid sums and the squared jumps are kept per
// feature and updated as intervals split, so a refinement costs time in
// proportion to the points it adds.
type adaptivePath struct {
	e          *engine
	xb, diff   []float64
	nodes      []adaptiveNode
	intervals  []adaptiveInterval
	store      gradStore
	sum        []float64 // per feature Σ_k h_k (g_a + g_b)/2
	sq         []float64 // per feature Σ_k (D_k,i·h_k)²
	ga, gm, gb []float64 // scratch rows
}

func newAdaptivePath(e *engine, xb []float64) *adaptivePath {
	p := &adaptivePath{e: e, xb: xb, diff: make([]float64, e.size),
		sum: make([]float64, e.size), sq: make([]float64, e.size),
		ga: make([]float64, e.size), gm: make([]float64, e.size), gb: make([]float64, e.size)}
	for i := range p.diff {
		p.diff[i] = e.x[i] - xb[i]
	}
	return p
}

// integrate returns the attributions from xb to e.x, refined until the
// estimated relative L1 error is at most tol and the completeness gap
// (against fb = F(xb)) is too, or until maxPoints points. It returns the
// attributions, the point count and the final error estimate.
func (p *adaptivePath) integrate(fb, tol float64, maxPoints int) ([]float64, int, float64, error) {
	e := p.e
	start := min(adaptiveStart, maxPoints-1)
	alpha := make([]float64, start+1)
	for j := range alpha {
		alpha[j] = float64(j) / float64(start)
	}
	if err := p.evaluate(alpha); err != nil {
		return nil, 0, 0, err
	}
	for j := 0; j < start; j++ {
		p.add(j, j+1)
	}
	attr := make([]float64, e.size)
	prevN, prevEst := 0, 0.0
	for {
		est := p.estimate(attr)
		gap := completeness(attr, e.outputs[e.target], fb, tol, true)
		n := len(p.nodes)
		room := maxPoints - n
		if room <= 0 || (est <= tol && gap.OK) {
			return attr, n, est, nil
		}
		// Split half the intervals; once two passes show how fast the
		// estimate falls (as n^−rate), only as many as that rate says
		// reach the tolerance (at least an eighth), so that the last pass
		// does not overshoot by half.
		k := len(p.intervals) / 2
		if prevN > 0 && prevEst > est && est > tol {
			rate := min(max(math.Log(prevEst/est)/math.Log(float64(n)/float64(prevN)), 0.5), 2)
			need := float64(n) * math.Pow(est/tol, 1/rate)
			k = min(k, max(int(math.Ceil(need))-n, len(p.intervals)/8))
		}
		prevN, prevEst = n, est
		if err := p.refine(max(1, min(k, room))); err != nil {
			return nil, 0, 0, err
		}
	}
}

// evaluate appends a node for each α, with its gradient.
func (p *adaptivePath) evaluate(alpha []float64) error {
	e := p.e
	return e.gradients(len(alpha), func(j int, dst []float64) {
		a := min(max(alpha[j], adaptiveEnd), 1-adaptiveEnd)
		for i, d := range p.diff {
			dst[i] = p.xb[i] + a*d
		}
	}, func(j int, _, grad []float64) {
		p.nodes = append(p.nodes, adaptiveNode{alpha: alpha[j], grad: p.store.add(grad)})
	})
}

// add adds the interval between nodes a and b to the sums and the
// intervals.
func (p *adaptivePath) add(a, b int) {
	na, nb := p.nodes[a], p.nodes[b]
	h := nb.alpha - na.alpha
	p.store.load(na.grad, p.ga)
	p.store.load(nb.grad, p.gb)
	var l1 float64
	for i, d := range p.diff {
		va, vb := p.ga[i], p.gb[i]
		p.sum[i] += h / 2 * (va + vb)
		jump := d * (vb - va) * h
		p.sq[i] += jump * jump
		l1 += math.Abs(jump)
	}
	p.intervals = append(p.intervals, adaptiveInterval{a: a, b: b, ind: l1})
}

// bisect replaces interval iv by its halves at node m: in the sums,
// h/2·(g_a + g_b) becomes h/4·(g_a + g_m) + h/4·(g_m + g_b), and the
// squared jump (D·h)² becomes (D_am·h/2)² + (D_mb·h/2)².
func (p *adaptivePath) bisect(iv adaptiveInterval, m int) {
	na, nm, nb := p.nodes[iv.a], p.nodes[m], p.nodes[iv.b]
	h := nb.alpha - na.alpha
	p.store.load(na.grad, p.ga)
	p.store.load(nm.grad, p.gm)
	p.store.load(nb.grad, p.gb)
	var l1a, l1b float64
	for i, d := range p.diff {
		va, vm, vb := p.ga[i], p.gm[i], p.gb[i]
		p.sum[i] += h/2*vm - h/4*(va+vb)
		whole := d * (vb - va) * h
		ja, jb := d*(vm-va)*h/2, d*(vb-vm)*h/2
		p.sq[i] += ja*ja + jb*jb - whole*whole
		l1a += math.Abs(ja)
		l1b += math.Abs(jb)
	}
	p.intervals = append(p.intervals, adaptiveInterval{a: iv.a, b: m, ind: l1a}, adaptiveInterval{a: m, b: iv.b, ind: l1b})
}

// estimate writes the attributions into attr and returns the estimated
// relative L1 error.
func (p *adaptivePath) estimate(attr []float64) float64 {
	var norm, sigmas, variance float64
	for i, d := range p.diff {
		attr[i] = d * p.sum[i]
		norm += math.Abs(attr[i])
		v := max(p.sq[i], 0) / 12
		sigmas += math.Sqrt(v)
		variance += v
	}
	mean := math.Sqrt(2/math.Pi) * sigmas
	sd := math.Sqrt(1-2/math.Pi) * math.Sqrt(variance)
	return 1.1 * (mean + 2*sd) / max(norm, CompletenessFloor)
}

// refine bisects the n intervals with the largest indicator: it
// evaluates their midpoints in one pass and replaces each by its halves.
func (p *adaptivePath) refine(n int) error {
	// Largest first; ties by position, so the choice is deterministic.
	slices.SortStableFunc(p.intervals, func(x, y adaptiveInterval) int { return cmp.Compare(y.ind, x.ind) })
	split := slices.Clone(p.intervals[:n])
	p.intervals = slices.Delete(p.intervals, 0, n)
	alpha := make([]float64, n)
	for k, iv := range split {
		alpha[k] = (p.nodes[iv.a].alpha + p.nodes[iv.b].alpha) / 2
	}
	first := len(p.nodes)
	if err := p.evaluate(alpha); err != nil {
		return err
	}
	for k, iv := range split {
		p.bisect(iv, first+k)
	}
	return nil
}

// gradStore keeps every node's gradient, one slice per node (a store that
// grows by copying would move all of them at every growth): as float32
// while every value stored is a float32 value (the float32 engine's
// gradients, kept exactly in half the memory), as float64 from the first
// value that is not.
type gradStore struct {
	f32  [][]float32
	f64  [][]float64
	wide bool
}

// add stores g and returns its index.
func (s *gradStore) add(g []float64) int {
	if !s.wide {
		row := make([]float32, len(g))
		for i, v := range g {
			f := float32(v)
			if float64(f) != v {
				s.widen()
				break
			}
			row[i] = f
		}
		if !s.wide {
			s.f32 = append(s.f32, row)
			return len(s.f32) - 1
		}
	}
	s.f64 = append(s.f64, slices.Clone(g))
	return len(s.f64) - 1
}

func (s *gradStore) widen() {
	s.wide = true
	for _, row := range s.f32 {
		w := make([]float64, len(row))
		for i, v := range row {
			w[i] = float64(v)
		}
		s.f64 = append(s.f64, w)
	}
	s.f32 = nil
}

// load copies gradient k into dst.
func (s *gradStore) load(k int, dst []float64) {
	if s.wide {
		copy(dst, s.f64[k])
		return
	}
	for i, v := range s.f32[k] {
		dst[i] = float64(v)
	}
}
