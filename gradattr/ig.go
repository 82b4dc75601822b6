package gradattr

import (
	"context"
	"fmt"
	"math"
)

// Integrated-gradients defaults.
const (
	// DefaultTolerance is the relative completeness gap automatic
	// integrated gradients refines to (0.5%).
	DefaultTolerance = 0.005
	// DefaultMaxPoints caps the points of automatic integrated gradients:
	// 2^12 + 1 admits the trapezoid rule's 4097-point pass and 4096-point
	// left and right sums. Paths that cross many ReLU kinks have an
	// integrand with jumps, where every rule converges only as O(1/m).
	DefaultMaxPoints = 4097
)

// autoStart is the point count of the first pass of automatic refinement.
const autoStart = 4

// IGOptions configures IntegratedGradients. The zero value means: one zero
// baseline; the exact integral when the model provides it (ExactAuto),
// otherwise the trapezoid rule refined adaptively until the relative
// completeness gap and the estimated relative error of the attributions
// are at most 0.005, or DefaultMaxPoints points; batches of 64.
type IGOptions struct {
	// Rule is the quadrature rule; the zero value is RuleTrapezoid.
	Rule Rule
	// Points fixes the number of integration points per baseline (≥ 2 for
	// the trapezoid rule, ≥ 1 otherwise); 0 chooses it automatically.
	Points int
	// MaxPoints caps automatic refinement; 0 means DefaultMaxPoints.
	MaxPoints int
	// Tolerance is the relative completeness gap to meet (and to judge a
	// fixed point count by); 0 means DefaultTolerance.
	Tolerance float64
	// Baselines are the reference points x′; nil means one zero baseline.
	// With several, the attributions against each are averaged.
	Baselines []Baseline
	// BatchSize is the number of points per model call; 0 means
	// DefaultBatchSize.
	BatchSize int
	// Exact says when to integrate exactly (see ExactMode); the zero
	// value is ExactAuto.
	Exact ExactMode
	// MaxPieces caps the pieces of one exact path integral; 0 means
	// DefaultMaxPieces with ExactAuto and MaxPiecesLimit with ExactAlways.
	MaxPieces int
}

// IntegratedGradients attributes output target of m at x along the straight
// path from each baseline x′ to x (Sundararajan, Taly & Yan 2017, eq. 1):
//
//	IG_i(x) = (x_i − x′_i) · ∫₀¹ ∂F(x′ + α(x − x′))/∂x_i dα
//	        ≈ (x_i − x′_i) · Σ_j w_j ∂F(x′ + α_j(x − x′))/∂x_i
//
// with the nodes α_j and weights w_j of opt.Rule (see Rule.Nodes). By the
// fundamental theorem of calculus for path integrals the exact attributions
// sum to F(x) − F(x′) (completeness, §3), so the quadrature error shows in
// Result.Completeness.
//
// With Points = 0 the point count is chosen per baseline. The trapezoid
// rule (the default) refines adaptively (see adaptive.go): from 17 evenly
// spaced nodes it bisects, pass after pass, the intervals whose gradient
// changes most, until
//
//	|Σ_i IG_i − (F(x) − F(x′))| ≤ tolerance · max(|F(x) − F(x′)|, ε)
//
// (ε = CompletenessFloor) and the estimated relative L1 error of the
// attributions, Settings.ErrorEstimate, is at most tolerance too, or until
// MaxPoints points; its end nodes are evaluated at α = 2⁻¹⁶ and 1 − 2⁻¹⁶,
// and it takes every point's gradient, not sums. The other rules start
// from 4 points and refine uniformly (see Rule for how and what is reused)
// until the gap above is met and the last refinement moved the
// attributions by at most tolerance in relative L1 norm,
// ‖IG − IG_prev‖₁ ≤ tolerance·‖IG‖₁, or until the next refinement would
// exceed MaxPoints. The second condition is there because the gap checks
// only the sum: per-feature quadrature errors of opposite sign cancel in
// it, and on ReLU networks a coarse rule can meet the gap while single
// attributions are off by several percent. Every pass of a uniform rule
// sends its points to the model in batches of BatchSize, in node order; a
// model that is a GradientSummer gets them instead as weighted sums, one
// for the end nodes and one for the others (at most 4096 points a call),
// and adds them up as it forms them. Completeness.OK reports whether the
// gap was met.
//
// With several baselines the attributions are the mean of those against
// each baseline, and completeness is checked against the mean baseline
// output (1/B) Σ_b F(x′_b), for which the mean attributions are complete.
// Settings.Points is then the largest per-baseline count.
//
// Exact integrated gradients (opt.Exact; by default whenever the point
// count is automatic and the model allows it) take the integral from a
// PathIntegrator instead: for a network that is piecewise-linear up to a
// smooth head, the integral over the pieces of the path on which it is
// affine (Sotoudeh & Thakur 2019), exact up to rounding. The result then
// has Settings.Exact set and Settings.Pieces (the largest per-baseline
// count) and spends no gradient evaluations; when ExactAuto falls back to
// quadrature, Settings.ExactSkipped says why.
func IntegratedGradients(ctx context.Context, m Model, x []float64, target int, opt IGOptions) (*Result, error) {
	if !opt.Rule.valid() {
		return nil, fmt.Errorf("%w: unknown quadrature rule %d", ErrOptions, int(opt.Rule))
	}
	if opt.Points < 0 || opt.Points > MaxPointsLimit || (opt.Points > 0 && opt.Points < opt.Rule.MinPoints()) {
		return nil, fmt.Errorf("%w: %v rule with %d points, want %d..%d, or 0 to refine the count automatically", ErrOptions, opt.Rule, opt.Points, opt.Rule.MinPoints(), MaxPointsLimit)
	}
	maxPoints := opt.MaxPoints
	switch {
	case maxPoints == 0:
		maxPoints = DefaultMaxPoints
	case maxPoints < opt.Rule.MinPoints() || maxPoints > MaxPointsLimit:
		return nil, fmt.Errorf("%w: max points %d, want 0 (default %d) or %d..%d", ErrOptions, maxPoints, DefaultMaxPoints, opt.Rule.MinPoints(), MaxPointsLimit)
	}
	tol, err := tolerance(opt.Tolerance)
	if err != nil {
		return nil, err
	}
	e, err := newEngine(ctx, m, x, target, opt.BatchSize)
	if err != nil {
		return nil, err
	}
	specs := opt.Baselines
	if len(specs) == 0 {
		specs = []Baseline{{}}
	}
	if opt.Points > 0 && len(specs) > MaxEvaluations/(opt.Points*e.size) {
		return nil, fmt.Errorf("%w: %d baselines × %d points × %d features exceeds %d gradient values", ErrOptions, len(specs), opt.Points, e.size, MaxEvaluations)
	}
	bases := make([][]float64, len(specs))
	for b, spec := range specs {
		if bases[b], err = spec.Build(x, e.shape); err != nil {
			return nil, fmt.Errorf("baseline %d: %w", b, err)
		}
	}

	s := Settings{Method: MethodIntegratedGradients, Rule: opt.Rule.String(), Tolerance: tol,
		BatchSize: e.batch, Baselines: describe(specs)}
	if opt.Points == 0 {
		s.Auto, s.MaxPoints = true, maxPoints
	}
	plan, err := planExact(m, opt)
	if err != nil {
		return nil, err
	}
	if plan.pi != nil {
		es := s
		if opt.Exact == ExactAlways {
			es.Auto, es.MaxPoints = false, 0
		}
		r, why, err := exactIG(e, plan, bases, opt, es)
		if err != nil || r != nil {
			return r, err
		}
		plan.skipped = why
	}
	s.ExactSkipped = plan.skipped
	total := make([]float64, e.size)
	meanBase := 0.0
	ig := newIntegrator(e, x)
	for b, xb := range bases {
		out, err := e.forwardOne(xb)
		if err != nil {
			return nil, err
		}
		fb := out[e.target]
		meanBase += fb
		if opt.Points == 0 && opt.Rule == RuleTrapezoid {
			attr, points, est, err := newAdaptivePath(e, xb).integrate(fb, tol, maxPoints)
			if err != nil {
				return nil, fmt.Errorf("baseline %d: %w", b, err)
			}
			s.Points, s.ErrorEstimate = max(s.Points, points), max(s.ErrorEstimate, est)
			for i, a := range attr {
				total[i] += a
			}
			continue
		}
		var sched *schedule
		if opt.Points > 0 {
			sched = startSchedule(opt.Rule, opt.Points)
		} else {
			sched = startSchedule(opt.Rule, min(maxPoints, max(autoStart+boolInt(opt.Rule == RuleTrapezoid), opt.Rule.MinPoints())))
		}
		prev, refined := make([]float64, e.size), false
		attr, err := ig.run(xb, sched, func(attr []float64) bool {
			if opt.Points > 0 || sched.nextPoints() > maxPoints {
				return true
			}
			complete := completeness(attr, e.outputs[e.target], fb, tol, true).OK
			settled := refined && relativeL1(attr, prev) <= tol
			copy(prev, attr)
			refined = true
			return complete && settled
		})
		if err != nil {
			return nil, fmt.Errorf("baseline %d: %w", b, err)
		}
		s.Points = max(s.Points, sched.points())
		for i, a := range attr {
			total[i] += a
		}
	}
	nb := float64(len(bases))
	for i := range total {
		total[i] /= nb
	}
	meanBase /= nb
	r := e.result(total, s)
	r.BaselineOutput = meanBase
	r.Completeness = completeness(total, r.Output, meanBase, tol, true)
	return r, nil
}

// relativeL1 is ‖a − b‖₁ / max(‖a‖₁, CompletenessFloor).
func relativeL1(a, b []float64) float64 {
	var d, n float64
	for i := range a {
		d += math.Abs(a[i] - b[i])
		n += math.Abs(a[i])
	}
	return d / max(n, CompletenessFloor)
}

func boolInt(b bool) int {
	if b {
		return 1
	}
	return 0
}

// tolerance applies the default and checks the range.
func tolerance(t float64) (float64, error) {
	if t == 0 {
		return DefaultTolerance, nil
	}
	if !(t > 0) || math.IsInf(t, 0) {
		return 0, fmt.Errorf("%w: tolerance %v, want a finite value > 0 (0 means %v)", ErrOptions, t, DefaultTolerance)
	}
	return t, nil
}

// integrator holds the per-feature running sums of one path integral.
type integrator struct {
	e             *engine
	x             []float64
	sumEnd, sumIn []float64
	attr, diff    []float64
	nodes         []node
	xb            []float64
}

func newIntegrator(e *engine, x []float64) *integrator {
	return &integrator{e: e, x: x,
		sumEnd: make([]float64, e.size), sumIn: make([]float64, e.size),
		diff: make([]float64, e.size)}
}

func (g *integrator) fill(j int, dst []float64) {
	a := g.nodes[j].alpha
	for i, d := range g.diff {
		dst[i] = g.xb[i] + a*d
	}
}

func (g *integrator) use(j int, _, grad []float64) {
	n := g.nodes[j]
	sum := g.sumIn
	if n.end {
		sum = g.sumEnd
	}
	for i, v := range grad {
		sum[i] += n.weight * v
	}
}

// evaluate adds the gradients at the nodes to the running sums: from a
// GradientSummer, one sum per kind of node (end nodes and the others), or
// point by point.
func (g *integrator) evaluate() error {
	s := g.e.summer()
	if s == nil {
		return g.e.gradients(len(g.nodes), g.fill, g.use)
	}
	if gs, ok := s.(PathGroupSummer); ok && len(g.nodes) <= sumChunk {
		// The end nodes (group 0) and the others (group 1) in one call,
		// each group's points in their order: the sums of the two calls
		// below, bit for bit.
		alpha := make([]float64, 0, len(g.nodes))
		weight := make([]float64, 0, len(g.nodes))
		group := make([]int, 0, len(g.nodes))
		for _, n := range g.nodes {
			alpha, weight = append(alpha, n.alpha), append(weight, n.weight)
			group = append(group, boolInt(!n.end))
		}
		return g.e.pathSums(gs, g.xb, alpha, weight, group, [][]float64{g.sumEnd, g.sumIn})
	}
	for _, end := range []bool{true, false} {
		var alpha, weight []float64
		for _, n := range g.nodes {
			if n.end == end {
				alpha, weight = append(alpha, n.alpha), append(weight, n.weight)
			}
		}
		if len(alpha) == 0 {
			continue
		}
		sum := g.sumIn
		if end {
			sum = g.sumEnd
		}
		if err := g.e.pathSum(s, g.xb, alpha, weight, sum); err != nil {
			return err
		}
	}
	return nil
}

// run integrates from xb to x along sched, refining while done(attr) is
// false, and returns a fresh attribution slice.
func (g *integrator) run(xb []float64, sched *schedule, done func(attr []float64) bool) ([]float64, error) {
	g.xb = xb
	for i := range g.diff {
		g.diff[i] = g.x[i] - xb[i]
	}
	clear(g.sumEnd)
	clear(g.sumIn)
	attr := make([]float64, g.e.size)
	g.nodes = sched.initial()
	for {
		if err := g.evaluate(); err != nil {
			return nil, err
		}
		cEnd, cIn := sched.coefficients()
		for i, d := range g.diff {
			attr[i] = d * (cEnd*g.sumEnd[i] + cIn*g.sumIn[i])
		}
		if done(attr) {
			return attr, nil
		}
		var fresh bool
		g.nodes, fresh = sched.refineNodes()
		if fresh {
			clear(g.sumEnd)
			clear(g.sumIn)
		}
	}
}
