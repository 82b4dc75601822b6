package gradattr

import (
	"math"
	"slices"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestGaussLegendreTable(t *testing.T) {
	// Positive nodes and weights, Abramowitz & Stegun 1964, Table 25.4
	// (15 digits; the values are from memory), cross-checked against the
	// closed forms of the roots of P_2..P_5 (A&S ch. 22 polynomials solved
	// by hand): n=2 ±1/√3, w=1; n=3 ±√(3/5), w=5/9, 0, w=8/9; n=4
	// ±√(3/7 ∓ (2/7)√(6/5)), w=(18 ± √30)/36; n=5 ±(1/3)√(5 ∓ 2√(10/7)),
	// w=(322 ± 13√70)/900, 0, w=128/225.
	type pair struct{ x, w float64 }
	table := map[int][]pair{
		2: {{0.577350269189626, 1.0}},
		3: {{0.0, 0.888888888888889}, {0.774596669241483, 0.555555555555556}},
		4: {{0.339981043584856, 0.652145154862546}, {0.861136311594053, 0.347854845137454}},
		5: {{0.0, 0.568888888888889}, {0.538469310105683, 0.478628670499366}, {0.906179845938664, 0.236926885056189}},
	}
	closed := map[int][]pair{
		2: {{1 / math.Sqrt(3), 1}},
		3: {{0, 8.0 / 9}, {math.Sqrt(3.0 / 5), 5.0 / 9}},
		4: {{math.Sqrt(3.0/7 - 2.0/7*math.Sqrt(6.0/5)), (18 + math.Sqrt(30)) / 36},
			{math.Sqrt(3.0/7 + 2.0/7*math.Sqrt(6.0/5)), (18 - math.Sqrt(30)) / 36}},
		5: {{0, 128.0 / 225}, {math.Sqrt(5-2*math.Sqrt(10.0/7)) / 3, (322 + 13*math.Sqrt(70)) / 900},
			{math.Sqrt(5+2*math.Sqrt(10.0/7)) / 3, (322 - 13*math.Sqrt(70)) / 900}},
	}
	for n, rows := range table {
		x, w := GaussLegendre(n)
		require.Len(t, x, n)
		assert.True(t, slices.IsSorted(x))
		for k, row := range rows {
			i := n/2 + k                                                         // nodes ≥ 0, increasing
			assert.InDelta(t, row.x, x[i], 1e-15, "n=%d node %d", n, k)          // A&S Table 25.4
			assert.InDelta(t, row.w, w[i], 1e-15, "n=%d weight %d", n, k)        // A&S Table 25.4
			assert.InDelta(t, closed[n][k].x, x[i], 2e-16, "n=%d node %d", n, k) // closed form
			assert.InDelta(t, closed[n][k].w, w[i], 4e-16, "n=%d weight %d", n, k)
			assert.Equal(t, -x[i], x[n-1-i]) // symmetry of P_n
			assert.Equal(t, w[i], w[n-1-i])
		}
	}
	// Large n: the weights sum to 2 = ∫₋₁¹ 1 (A&S 25.4.29); that each node
	// is a root of P_n is checked in internal/gausslegendre.
	for _, n := range []int{64, 513, 1024} {
		_, w := GaussLegendre(n)
		s := 0.0
		for j := range w {
			s += w[j]
		}
		assert.InDelta(t, 2, s, 1e-12, "n=%d", n)
	}
}

func TestRulesPolynomialDegree(t *testing.T) {
	// ∫₀¹ α^d dα = 1/(d+1). Left and right Riemann sums are exact for
	// degree 0, trapezoid and midpoint for degree ≤ 1, m-point Gauss–
	// Legendre for degree ≤ 2m−1 (A&S 1964, 25.4.29). For the next degree
	// the error Q − I is the rule's error term, exact for that monomial:
	//   left α: −1/(2m), right α: +1/(2m)      (Σ j/m² in closed form)
	//   trapezoid α²: +h²/6, h = 1/(m−1)        (Euler–Maclaurin, f″ = 2)
	//   midpoint α²: −h²/12, h = 1/m            (Euler–Maclaurin, f″ = 2)
	//   Gauss–Legendre α^{2m}: −(m!)⁴ / ((2m+1) ((2m)!)²)
	//                                          (A&S 25.4.29 remainder on [0,1], f^{(2m)} = (2m)!)
	exact := func(r Rule, m int) int {
		switch r {
		case RuleLeft, RuleRight:
			return 0
		case RuleTrapezoid, RuleMidpoint:
			return 1
		}
		return 2*m - 1
	}
	for _, r := range allRules {
		for _, m := range []int{2, 3, 5, 8} {
			alpha, w, err := r.Nodes(m)
			require.NoError(t, err)
			require.Len(t, alpha, m)
			for d := 0; d <= exact(r, m)+1; d++ {
				q := 0.0
				for j := range alpha {
					q += w[j] * math.Pow(alpha[j], float64(d))
				}
				want := 1 / float64(d+1) // closed form
				if d <= exact(r, m) {
					assert.InDelta(t, want, q, 1e-14, "%v m=%d degree %d", r, m, d)
				} else {
					assert.InDelta(t, errorTerm(r, m), q-want, 1e-14, "%v m=%d degree %d", r, m, d)
					assert.NotZero(t, errorTerm(r, m))
				}
			}
		}
	}
}

func TestRefinementNodes(t *testing.T) {
	// Reuse: the nodes of the first pass plus those each refinement adds
	// are exactly the nodes of the refined rule (definition of the rules
	// in Rule), and the running-sum coefficients reproduce its weights.
	for _, r := range allRules[:4] {
		start := 4
		if r == RuleTrapezoid {
			start = 5
		}
		s := startSchedule(r, start)
		var have []float64
		for _, n := range s.initial() {
			have = append(have, n.alpha)
		}
		for level := 0; level < 4; level++ {
			nodes, fresh := s.refineNodes()
			assert.False(t, fresh)
			for _, n := range nodes {
				have = append(have, n.alpha)
			}
			want, w, err := r.Nodes(s.points())
			require.NoError(t, err)
			got := slices.Clone(have)
			slices.Sort(got)
			require.Len(t, got, len(want), "%v level %d", r, level)
			for j := range want {
				assert.InDelta(t, want[j], got[j], 1e-15, "%v level %d node %d", r, level, j)
			}
			cEnd, cIn := s.coefficients()
			for j := range w {
				c := cIn
				if r == RuleTrapezoid && (j == 0 || j == len(w)-1) {
					c = cEnd
				}
				assert.InDelta(t, w[j], c, 1e-16, "%v weight %d", r, j)
			}
		}
	}
	s := startSchedule(RuleGaussLegendre, 4)
	nodes, fresh := s.refineNodes()
	assert.True(t, fresh)
	assert.Len(t, nodes, 8)
}

func TestParseRule(t *testing.T) {
	for _, r := range allRules {
		got, err := ParseRule(r.String())
		require.NoError(t, err)
		assert.Equal(t, r, got)
	}
	_, err := ParseRule("simpson")
	assert.ErrorIs(t, err, ErrOptions)
	assert.ErrorContains(t, err, `"simpson"`)
	_, _, err = Rule(42).Nodes(4)
	assert.ErrorIs(t, err, ErrOptions)
	_, _, err = RuleTrapezoid.Nodes(1)
	assert.ErrorIs(t, err, ErrOptions)
	x, w := GaussLegendre(0)
	assert.Nil(t, x)
	assert.Nil(t, w)
}

// errorTerm is Q − I for the lowest monomial a rule does not integrate
// exactly (see TestRulesPolynomialDegree).
func errorTerm(r Rule, m int) float64 {
	switch r {
	case RuleLeft:
		return -1 / float64(2*m)
	case RuleRight:
		return 1 / float64(2*m)
	case RuleTrapezoid:
		h := 1 / float64(m-1)
		return h * h / 6
	case RuleMidpoint:
		h := 1 / float64(m)
		return -h * h / 12
	}
	f := func(n int) float64 { return math.Gamma(float64(n + 1)) }
	return -math.Pow(f(m), 4) / (float64(2*m+1) * f(2*m) * f(2*m))
}
