package gradattr

import (
	"fmt"
	"slices"

	"github.com/apportion/apportion/internal/gausslegendre"
)

// Rule is a quadrature rule for the path integral of integrated gradients,
// over α ∈ [0, 1] with m points.
type Rule int

// The rules. The zero value is the trapezoid rule.
const (
	// RuleTrapezoid: nodes j/(m−1), j = 0..m−1, end weights halved; exact
	// for polynomials of degree 1. Automatic refinement is adaptive: it
	// bisects the intervals whose estimated error is largest and reuses
	// every earlier gradient (see IntegratedGradients).
	RuleTrapezoid Rule = iota
	// RuleLeft: left Riemann sum, nodes j/m, j = 0..m−1, weights 1/m;
	// exact for constants. Refinement doubles m and reuses every earlier
	// gradient.
	RuleLeft
	// RuleRight: right Riemann sum, nodes j/m, j = 1..m, weights 1/m;
	// exact for constants. Refinement doubles m and reuses every earlier
	// gradient.
	RuleRight
	// RuleMidpoint: midpoint Riemann sum, nodes (j+½)/m, weights 1/m;
	// exact for polynomials of degree 1. Refinement triples m (halving
	// would move the midpoints) and reuses every earlier gradient.
	RuleMidpoint
	// RuleGaussLegendre: m-point Gauss–Legendre rule mapped to [0, 1];
	// exact for polynomials of degree 2m−1. Its nodes for 2m points share
	// none with those for m (except α = ½ for odd m), so refinement
	// doubles m and reuses no earlier gradient.
	RuleGaussLegendre
)

var ruleNames = [...]string{"trapezoid", "left", "right", "midpoint", "gauss-legendre"}

// String returns the rule's name: "trapezoid", "left", "right",
// "midpoint" or "gauss-legendre".
func (r Rule) String() string {
	if r >= 0 && int(r) < len(ruleNames) {
		return ruleNames[r]
	}
	return fmt.Sprintf("Rule(%d)", int(r))
}

// ParseRule is the inverse of Rule.String.
func ParseRule(s string) (Rule, error) {
	for i, n := range ruleNames {
		if n == s {
			return Rule(i), nil
		}
	}
	return 0, fmt.Errorf("%w: quadrature rule %q, want one of trapezoid, left, right, midpoint, gauss-legendre", ErrOptions, s)
}

func (r Rule) valid() bool { return r >= 0 && int(r) < len(ruleNames) }

// MinPoints is the smallest point count the rule is defined for: 2 for the
// trapezoid rule (its two end points), 1 for the others.
func (r Rule) MinPoints() int {
	if r == RuleTrapezoid {
		return 2
	}
	return 1
}

// Nodes returns the m nodes α_j ∈ [0, 1] and weights w_j of the rule, so
// that ∫₀¹ g(α) dα ≈ Σ_j w_j g(α_j).
func (r Rule) Nodes(m int) (alpha, weight []float64, err error) {
	if !r.valid() {
		return nil, nil, fmt.Errorf("%w: unknown quadrature rule %d", ErrOptions, int(r))
	}
	if m < r.MinPoints() || m > MaxPointsLimit {
		return nil, nil, fmt.Errorf("%w: %v rule with %d points, want %d..%d", ErrOptions, r, m, r.MinPoints(), MaxPointsLimit)
	}
	s := startSchedule(r, m)
	cEnd, cIn := s.coefficients()
	nodes := s.initial()
	alpha, weight = make([]float64, m), make([]float64, m)
	for j, n := range nodes {
		alpha[j], weight[j] = n.alpha, n.weight*cIn
		if n.end {
			weight[j] = n.weight * cEnd
		}
	}
	return alpha, weight, nil
}

// GaussLegendre returns the n nodes x_j ∈ (−1, 1), in increasing order, and
// weights w_j of the Gauss–Legendre rule ∫₋₁¹ g ≈ Σ w_j g(x_j) (Abramowitz &
// Stegun 1964, 25.4.29): x_j are the roots of the Legendre polynomial P_n,
// found by Newton's method from x ≈ cos(π(j − ¼)/(n + ½)) with P_n and P′_n
// from the three-term recurrence (A&S 1964, ch. 22)
//
//	(k+1) P_{k+1}(x) = (2k+1) x P_k(x) − k P_{k−1}(x)
//	P′_n(x) = n (x P_n(x) − P_{n−1}(x)) / (x² − 1)
//
// and w_j = 2 / ((1 − x_j²) P′_n(x_j)²). It returns nil for n < 1 or
// n > MaxPointsLimit.
func GaussLegendre(n int) (x, w []float64) {
	if n < 1 || n > MaxPointsLimit {
		return nil, nil
	}
	x, w = gausslegendre.Rule(n)
	return slices.Clone(x), slices.Clone(w)
}

// schedule is one rule's refinement plan: the nodes first evaluated, then
// the nodes each refinement adds, with the running sums that combine them.
//
// Every rule but Gauss–Legendre keeps two running per-feature sums of
// gradients, S_end (α = 0 and 1, trapezoid only) and S_in (all other nodes),
// and estimates the integral as c_end·S_end + c_in·S_in, so refining only
// evaluates the new nodes. Gauss–Legendre keeps Σ w_j g(α_j) and restarts
// it at each refinement.
type schedule struct {
	rule Rule
	m    int // current parameter: intervals (trapezoid) or points
}

// points is the number of nodes of the current rule.
func (s *schedule) points() int {
	if s.rule == RuleTrapezoid {
		return s.m + 1
	}
	return s.m
}

// startSchedule returns the schedule whose first rule has p points.
func startSchedule(r Rule, p int) *schedule {
	if r == RuleTrapezoid {
		return &schedule{rule: r, m: p - 1}
	}
	return &schedule{rule: r, m: p}
}

// nextPoints is the node count after one refinement.
func (s *schedule) nextPoints() int {
	n := *s
	n.refine()
	return n.points()
}

func (s *schedule) refine() {
	if s.rule == RuleMidpoint {
		s.m *= 3
	} else {
		s.m *= 2
	}
}

// node is one quadrature node: α, the weight applied before summing, and
// whether it is an end node of the trapezoid rule.
type node struct {
	alpha, weight float64
	end           bool
}

// initial returns the nodes of the first rule.
func (s *schedule) initial() []node {
	nodes := make([]node, 0, s.points())
	m := float64(s.m)
	switch s.rule {
	case RuleTrapezoid:
		nodes = append(nodes, node{alpha: 0, weight: 1, end: true})
		for j := 1; j < s.m; j++ {
			nodes = append(nodes, node{alpha: float64(j) / m, weight: 1})
		}
		nodes = append(nodes, node{alpha: 1, weight: 1, end: true})
	case RuleLeft:
		for j := 0; j < s.m; j++ {
			nodes = append(nodes, node{alpha: float64(j) / m, weight: 1})
		}
	case RuleRight:
		for j := 1; j <= s.m; j++ {
			nodes = append(nodes, node{alpha: float64(j) / m, weight: 1})
		}
	case RuleMidpoint:
		for j := 0; j < s.m; j++ {
			nodes = append(nodes, node{alpha: (float64(j) + 0.5) / m, weight: 1})
		}
	case RuleGaussLegendre:
		nodes = s.gauss()
	}
	return nodes
}

func (s *schedule) gauss() []node {
	x, w := gausslegendre.Rule(s.m)
	nodes := make([]node, s.m)
	for j := range nodes {
		nodes[j] = node{alpha: (x[j] + 1) / 2, weight: w[j] / 2}
	}
	return nodes
}

// refineNodes refines the rule and returns the nodes to evaluate; fresh
// reports that the running sums must be restarted (Gauss–Legendre).
func (s *schedule) refineNodes() (nodes []node, fresh bool) {
	old := s.m
	s.refine()
	m := float64(s.m)
	switch s.rule {
	case RuleTrapezoid, RuleLeft, RuleRight:
		// The new nodes are the midpoints of the old intervals.
		for j := 0; j < old; j++ {
			nodes = append(nodes, node{alpha: float64(2*j+1) / m, weight: 1})
		}
	case RuleMidpoint:
		// Each old interval splits in three; its midpoint stays a node.
		for j := 0; j < old; j++ {
			nodes = append(nodes,
				node{alpha: (float64(3*j) + 0.5) / m, weight: 1},
				node{alpha: (float64(3*j) + 2.5) / m, weight: 1})
		}
	case RuleGaussLegendre:
		return s.gauss(), true
	}
	return nodes, false
}

// gradientsWorst is the number of gradient evaluations of one path
// integral along the schedule of rule: points fixed, or (points 0) refined
// from the automatic start up to maxPoints without ever stopping early,
// counting the nodes initial and refineNodes return without making them.
func gradientsWorst(rule Rule, points, maxPoints int) int {
	var s *schedule
	if points > 0 {
		return startSchedule(rule, points).points()
	}
	s = startSchedule(rule, min(maxPoints, max(autoStart+boolInt(rule == RuleTrapezoid), rule.MinPoints())))
	n := s.points()
	for s.nextPoints() <= maxPoints {
		old := s.m
		s.refine()
		switch rule {
		case RuleMidpoint:
			n += 2 * old
		case RuleGaussLegendre:
			n += s.m
		default:
			n += old
		}
	}
	return n
}

// coefficients returns c_end and c_in of the current rule.
func (s *schedule) coefficients() (cEnd, cIn float64) {
	switch s.rule {
	case RuleTrapezoid:
		h := 1 / float64(s.m)
		return h / 2, h
	case RuleGaussLegendre:
		return 0, 1
	}
	return 0, 1 / float64(s.m)
}
