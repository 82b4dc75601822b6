package gradattr

import (
	"context"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestClosedFormGradients(t *testing.T) {
	// Every analytic Grad used in the tests against central finite
	// differences, h = 1e-5, error O(h²) ≈ 1e-10 (common practice).
	net := newTanhNet(4, 6, 3, 1)
	cases := []struct {
		name string
		f    *Func
		x    []float64
	}{
		{"linear", linear([]float64{0.5, -2, 3}, 0.25), []float64{1, 2, -0.5}},
		{"product", product(), []float64{1.5, -0.7}},
		{"cubic", cubic(3), []float64{0.4, -1.2, 2}},
		{"tanh net", net.model(), []float64{0.3, -0.8, 1.1, 0.2}},
	}
	for _, c := range cases {
		for k := 0; k < c.f.Outputs; k++ {
			g := make([]float64, len(c.x))
			c.f.Grad(g, c.x, k)
			fd := centralDiff(c.f, c.x, k, 1e-5)
			for i := range g {
				assert.InDelta(t, fd[i], g[i], 1e-8, "%s output %d feature %d", c.name, k, i) // central difference
			}
		}
	}
}

func TestIGLinearExact(t *testing.T) {
	// For f = w·x + b the integrand is the constant w, which every rule
	// integrates exactly: IG_i = w_i(x_i − x′_i) (Sundararajan et al. 2017,
	// IG on a linear model). The same values are the Shapley values of
	// the game v(S) = f(x_S, x′_rest) (Lundberg & Lee 2017, "A unified
	// approach to interpreting model predictions": for a linear model
	// φ_i = w_i(x_i − x′_i) with a single baseline), checked here by
	// enumerating coalitions (Shapley 1953).
	w := []float64{0.5, -2, 3, 1.25}
	f := linear(w, 0.75)
	x := []float64{1, 2, -0.5, 4}
	base := []float64{0.25, -1, 0.5, 2}
	phi := shapley(f, x, base, 0)
	for _, rule := range allRules {
		for _, points := range []int{0, 2, 7, 64} {
			r, err := IntegratedGradients(context.Background(), f, x, 0, IGOptions{
				Rule: rule, Points: points, Baselines: []Baseline{{Kind: BaselineValues, Values: base}}})
			require.NoError(t, err)
			for i := range w {
				want := w[i] * (x[i] - base[i])
				assert.InDelta(t, want, r.Attributions[i], 1e-12, "%v points %d feature %d", rule, points, i) // closed form w_i(x_i − x′_i)
				assert.InDelta(t, phi[i], r.Attributions[i], 1e-12, "%v: Shapley value", rule)                // Shapley 1953 by enumeration
			}
			assert.True(t, r.Completeness.OK, "%v", rule)
			assert.InDelta(t, eval(f, x, 0)-eval(f, base, 0), r.Completeness.Expected, 1e-12)
		}
	}
	// Automatic refinement stops after the first pass: the gap is rounding
	// only, and the gradient is the same at every node, so no interval has
	// an error to estimate (the integrand is constant).
	r, err := IntegratedGradients(context.Background(), f, x, 0, IGOptions{})
	require.NoError(t, err)
	assert.Equal(t, adaptiveStart+1, r.Settings.Points) // the adaptive trapezoid rule's first pass
	assert.Zero(t, r.Settings.ErrorEstimate)
}

func TestGradientTimesInputLinear(t *testing.T) {
	// For a linear model gradient×input is w ⊙ x (Shrikumar et al. 2016),
	// equal to IG from the zero baseline and to the zero-baseline
	// Shapley values (Lundberg & Lee 2017); completeness against f(0) = b
	// holds but is reported, not judged.
	w := []float64{0.5, -2, 3}
	f := linear(w, -1.5)
	x := []float64{2, 0.5, -1}
	r, err := GradientTimesInput(context.Background(), f, x, 0)
	require.NoError(t, err)
	phi := shapley(f, x, make([]float64, 3), 0)
	for i := range w {
		assert.InDelta(t, w[i]*x[i], r.Attributions[i], 1e-15) // closed form w_i x_i
		assert.InDelta(t, phi[i], r.Attributions[i], 1e-12)    // Shapley 1953 by enumeration
	}
	require.NotNil(t, r.Completeness)
	assert.False(t, r.Completeness.Judged)
	assert.False(t, r.Completeness.OK)
	assert.InDelta(t, -1.5, r.BaselineOutput, 1e-15) // closed form f(0) = b
	assert.InDelta(t, 0, r.Completeness.Gap, 1e-12)  // linear: Σ w_i x_i = f(x) − b
	assert.Equal(t, 1, r.Cost.GradientEvals)         // one gradient
	assert.Equal(t, 2, r.Cost.ForwardPasses)         // f(x) and f(0)
	assert.Equal(t, MethodGradientTimesInput, r.Settings.Method)

	// Non-linear: x₀x₁ at (2,3): gradient×input = (6, 6), sum 12 ≠ f(x) − f(0) = 6.
	r, err = GradientTimesInput(context.Background(), product(), []float64{2, 3}, 0)
	require.NoError(t, err)
	assert.Equal(t, []float64{6, 6}, r.Attributions)    // closed form (x₁x₀, x₀x₁)
	assert.InDelta(t, 6, r.Completeness.Gap, 1e-15)     // closed form 12 − 6
	assert.InDelta(t, 1, r.Completeness.RelativeGap, 0) // closed form 6/6
	assert.False(t, r.Completeness.OK)
}

func TestIGProduct(t *testing.T) {
	// f = x₀x₁ from the zero baseline: IG_0 = x₀∫₀¹ αx₁ dα = x₀x₁/2, and
	// IG_1 likewise (Sundararajan et al. 2017, eq. 1 evaluated in closed
	// form); also the Shapley values of the two-player game (Shapley 1953).
	// The integrand αx₀x₁ is linear in α, so trapezoid, midpoint and
	// Gauss–Legendre are exact; the left and right Riemann sums with m
	// points give x₀x₁(m∓1)/(2m) (closed form of Σ_j j/m² ).
	x := []float64{1.5, -2.5}
	p := x[0] * x[1]
	phi := shapley(product(), x, []float64{0, 0}, 0)
	for _, rule := range allRules {
		for _, m := range []int{2, 3, 10} {
			r, err := IntegratedGradients(context.Background(), product(), x, 0, IGOptions{Rule: rule, Points: m})
			require.NoError(t, err)
			want := p / 2
			switch rule {
			case RuleLeft:
				want = p * float64(m-1) / float64(2*m)
			case RuleRight:
				want = p * float64(m+1) / float64(2*m)
			}
			assert.InDelta(t, want, r.Attributions[0], 1e-14, "%v m=%d", rule, m)
			assert.InDelta(t, want, r.Attributions[1], 1e-14, "%v m=%d", rule, m)
			if rule != RuleLeft && rule != RuleRight {
				assert.InDelta(t, phi[0], r.Attributions[0], 1e-14) // Shapley value x₀x₁/2
			}
		}
	}
}

func TestIGAxioms(t *testing.T) {
	ctx := context.Background()
	net := newTanhNet(4, 6, 3, 2)
	x := []float64{0.9, -0.4, 0.3, 1.2}

	t.Run("completeness", func(t *testing.T) {
		// Σ IG_i = F(x) − F(x′) (Sundararajan et al. 2017, §3, Proposition 1),
		// with F evaluated independently of the method.
		base := []float64{-0.2, 0.1, 0.5, -1}
		for k := 0; k < 3; k++ {
			r, err := IntegratedGradients(ctx, net.model(), x, k, IGOptions{Rule: RuleGaussLegendre, Points: 32,
				Baselines: []Baseline{{Kind: BaselineValues, Values: base}}})
			require.NoError(t, err)
			sum := 0.0
			for _, a := range r.Attributions {
				sum += a
			}
			want := eval(net.model(), x, k) - eval(net.model(), base, k)
			assert.InDelta(t, want, sum, 1e-10, "output %d", k) // Proposition 1
		}
	})

	t.Run("sensitivity", func(t *testing.T) {
		// Sensitivity(a), §2.1: f(x) = 1 − ReLU(1 − x) at x = 2 from 0 has a
		// zero gradient at x, yet differs from the baseline, so IG must be
		// non-zero; it is 1 = f(2) − f(0). The integrand is a step at α = ½,
		// so a midpoint sum of m points is within 1/m of it (one interval
		// holds the step).
		f := &Func{Shape: []int{1}, Outputs: 1,
			F: func(out, x []float64) { out[0] = 1 - math.Max(0, 1-x[0]) },
			Grad: func(g, x []float64, _ int) {
				g[0] = 0
				if 1-x[0] > 0 {
					g[0] = 1
				}
			}}
		gr, err := Gradient(ctx, f, []float64{2}, 0, GradientOptions{})
		require.NoError(t, err)
		assert.Equal(t, 0.0, gr.Attributions[0]) // §2.1: the gradient misses the feature
		r, err := IntegratedGradients(ctx, f, []float64{2}, 0, IGOptions{Rule: RuleMidpoint, Points: 201})
		require.NoError(t, err)
		assert.InDelta(t, 1, r.Attributions[0], 1.0/201) // f(2) − f(0) = 1
	})

	t.Run("implementation invariance", func(t *testing.T) {
		// §2.2: functionally equivalent networks get identical attributions.
		// (x₀ + x₁)² built as a square and as an expanded polynomial.
		square := &Func{Shape: []int{2}, Outputs: 1,
			F: func(out, x []float64) { s := x[0] + x[1]; out[0] = s * s },
			Grad: func(g, x []float64, _ int) {
				s := 2 * (x[0] + x[1])
				g[0], g[1] = s, s
			}}
		expanded := &Func{Shape: []int{2}, Outputs: 1,
			F: func(out, x []float64) { out[0] = x[0]*x[0] + 2*x[0]*x[1] + x[1]*x[1] },
			Grad: func(g, x []float64, _ int) {
				g[0] = 2*x[0] + 2*x[1]
				g[1] = 2*x[1] + 2*x[0]
			}}
		xi := []float64{1.3, -0.4}
		for _, rule := range allRules {
			a, err := IntegratedGradients(ctx, square, xi, 0, IGOptions{Rule: rule, Points: 16})
			require.NoError(t, err)
			b, err := IntegratedGradients(ctx, expanded, xi, 0, IGOptions{Rule: rule, Points: 16})
			require.NoError(t, err)
			assert.InDeltaSlice(t, a.Attributions, b.Attributions, 1e-14, "%v", rule)
		}
	})

	t.Run("linearity", func(t *testing.T) {
		// Linearity (§4): IG(a·f + b·g) = a·IG(f) + b·IG(g), same path
		// and nodes.
		f, g := net.model(), cubic(4)
		const a, b = 2.5, -0.75
		comb := &Func{Shape: []int{4}, Outputs: 1,
			F: func(out, x []float64) { out[0] = a*eval(f, x, 1) + b*eval(g, x, 0) },
			Grad: func(dst, x []float64, _ int) {
				gf, gg := make([]float64, 4), make([]float64, 4)
				f.Grad(gf, x, 1)
				g.Grad(gg, x, 0)
				for i := range dst {
					dst[i] = a*gf[i] + b*gg[i]
				}
			}}
		opt := IGOptions{Rule: RuleMidpoint, Points: 24}
		rf, err := IntegratedGradients(ctx, f, x, 1, opt)
		require.NoError(t, err)
		rg, err := IntegratedGradients(ctx, g, x, 0, opt)
		require.NoError(t, err)
		rc, err := IntegratedGradients(ctx, comb, x, 0, opt)
		require.NoError(t, err)
		for i := range x {
			assert.InDelta(t, a*rf.Attributions[i]+b*rg.Attributions[i], rc.Attributions[i], 1e-12)
		}
	})

	t.Run("symmetry preservation", func(t *testing.T) {
		// Symmetry preservation (§4): f symmetric in x₀, x₁, with x₀ = x₁
		// and x′₀ = x′₁, gives IG_0 = IG_1. f = sin(x₀ + x₁)·x₂.
		f := &Func{Shape: []int{3}, Outputs: 1,
			F: func(out, x []float64) { out[0] = math.Sin(x[0]+x[1]) * x[2] },
			Grad: func(g, x []float64, _ int) {
				c := math.Cos(x[0]+x[1]) * x[2]
				g[0], g[1], g[2] = c, c, math.Sin(x[0]+x[1])
			}}
		for _, rule := range allRules {
			r, err := IntegratedGradients(ctx, f, []float64{0.7, 0.7, 1.5}, 0, IGOptions{Rule: rule,
				Baselines: []Baseline{{Kind: BaselineValues, Values: []float64{-0.2, -0.2, 0.1}}}})
			require.NoError(t, err)
			assert.Equal(t, r.Attributions[0], r.Attributions[1], "%v", rule)
			assert.NotZero(t, r.Attributions[0])
		}
	})
}

func TestIGAutoConverges(t *testing.T) {
	// A smooth non-linear closed form (softmax of a tanh network): for each
	// rule, automatic refinement meets a relative completeness gap of 0.001
	// (Proposition 1 of Sundararajan et al. 2017 makes the gap the
	// quadrature error). Gauss–Legendre, exact for degree 2m−1 (A&S 1964,
	// 25.4.29), needs the fewest gradients. The first-order left and right
	// sums need more than the default 1024 points here, hence MaxPoints.
	net := newTanhNet(5, 8, 3, 3)
	m := net.model()
	x := []float64{1.2, -0.7, 0.4, 1.5, -1.1}
	target := Top(outputsOf(m, x))
	evals := map[Rule]int{}
	for _, rule := range allRules {
		r, err := IntegratedGradients(context.Background(), m, x, target, IGOptions{Rule: rule, Tolerance: 0.001, MaxPoints: 8192})
		require.NoError(t, err)
		assert.True(t, r.Completeness.OK, "%v: relative gap %g", rule, r.Completeness.RelativeGap)
		assert.LessOrEqual(t, r.Completeness.RelativeGap, 0.001, "%v", rule)
		assert.True(t, r.Settings.Auto)
		evals[rule] = r.Cost.GradientEvals
		t.Logf("%-15v points %4d gradient evals %4d relative gap %.2e", rule, r.Settings.Points, r.Cost.GradientEvals, r.Completeness.RelativeGap)
	}
	for _, rule := range allRules[:4] {
		assert.Less(t, evals[RuleGaussLegendre], evals[rule], "Gauss–Legendre vs %v", rule)
	}
}

func TestIGConvergenceRates(t *testing.T) {
	// The completeness gap is the quadrature error of ∫₀¹ φ′(α) dα with
	// φ(α) = F(x′ + α(x − x′)). By the Euler–Maclaurin formula (e.g.
	// Abramowitz & Stegun 1964, 23.1.30, from memory) with h = 1/m:
	//   left:      gap ≈ −(h/2)(φ′(1) − φ′(0))
	//   right:     gap ≈ +(h/2)(φ′(1) − φ′(0))
	//   trapezoid: gap ≈ +(h²/12)(φ″(1) − φ″(0))
	//   midpoint:  gap ≈ −(h²/24)(φ″(1) − φ″(0))
	// so doubling m halves the first two and quarters the others; Gauss–
	// Legendre's error falls faster than any power (A&S 1964, 25.4.29 remainder).
	// φ′ = Σ_i d_i ∂F/∂x_i is evaluated with the analytic gradient and φ″ by
	// a central difference of φ′ (common practice).
	net := newTanhNet(5, 8, 3, 3)
	m := net.model()
	x := []float64{1.2, -0.7, 0.4, 1.5, -1.1}
	base := make([]float64, 5)
	phi1 := func(a float64) float64 {
		p, g := make([]float64, 5), make([]float64, 5)
		for i := range p {
			p[i] = base[i] + a*(x[i]-base[i])
		}
		m.Grad(g, p, 0)
		s := 0.0
		for i := range g {
			s += (x[i] - base[i]) * g[i]
		}
		return s
	}
	phi2 := func(a float64) float64 { return (phi1(a+1e-5) - phi1(a-1e-5)) / 2e-5 }
	gapAt := func(rule Rule, points int) float64 {
		r, err := IntegratedGradients(context.Background(), m, x, 0, IGOptions{Rule: rule, Points: points})
		require.NoError(t, err)
		return r.Completeness.Gap
	}
	d1 := phi1(1) - phi1(0)
	d2 := phi2(1-1e-5) - phi2(1e-5)
	for _, mm := range []int{256, 512} {
		h := 1 / float64(mm)
		assert.InDelta(t, -h/2*d1, gapAt(RuleLeft, mm), 0.02*math.Abs(h/2*d1), "left m=%d", mm)
		assert.InDelta(t, h/2*d1, gapAt(RuleRight, mm), 0.02*math.Abs(h/2*d1), "right m=%d", mm)
		assert.InDelta(t, h*h/12*d2, gapAt(RuleTrapezoid, mm+1), 0.02*math.Abs(h*h/12*d2), "trapezoid m=%d", mm)
		assert.InDelta(t, -h*h/24*d2, gapAt(RuleMidpoint, mm), 0.02*math.Abs(h*h/24*d2), "midpoint m=%d", mm)
	}
	prev := math.Inf(1)
	for _, p := range []int{4, 8, 16} {
		g := math.Abs(gapAt(RuleGaussLegendre, p))
		if prev > 1e-13 {
			assert.Less(t, g, prev/10, "gauss-legendre %d points", p)
		}
		prev = g
	}
}

func outputsOf(f *Func, x []float64) []float64 {
	out := make([]float64, f.Outputs)
	f.F(out, x)
	return out
}

func TestIGAutoReuse(t *testing.T) {
	// Reuse of earlier gradients: the refined node sets of trapezoid, left,
	// right (doubling) and midpoint (tripling) contain the earlier ones, so
	// the total gradient count equals the final rule's point count; Gauss–
	// Legendre evaluates every pass afresh (definition of the rules, see
	// Rule).
	net := newTanhNet(3, 5, 2, 4)
	x := []float64{1.5, -2, 0.8}
	for _, rule := range allRules {
		r, err := IntegratedGradients(context.Background(), net.model(), x, 0, IGOptions{Rule: rule, Tolerance: 1e-9, MaxPoints: 300})
		require.NoError(t, err)
		if rule == RuleGaussLegendre {
			assert.Greater(t, r.Cost.GradientEvals, r.Settings.Points)
			// 4 + 8 + … + points
			assert.Equal(t, 2*r.Settings.Points-autoStart, r.Cost.GradientEvals)
		} else {
			assert.Equal(t, r.Settings.Points, r.Cost.GradientEvals, "%v", rule)
		}
		assert.LessOrEqual(t, r.Settings.Points, 300)
		if rule == RuleTrapezoid {
			// Automatic refinement of the trapezoid rule is adaptive, on
			// nodes of its own choosing: see TestIGAdaptive.
			continue
		}
		// The automatic result equals the fixed-point one with the same
		// count, up to summation order.
		f, err := IntegratedGradients(context.Background(), net.model(), x, 0, IGOptions{Rule: rule, Points: r.Settings.Points})
		require.NoError(t, err)
		assert.InDeltaSlice(t, f.Attributions, r.Attributions, 1e-13, "%v", rule)
	}
}

func TestIGToleranceNotMet(t *testing.T) {
	// The step of the sensitivity example (Sundararajan et al. 2017, §2.1)
	// defeats refinement: with MaxPoints 16 the left Riemann sum cannot reach
	// 1e-6 and the result says so.
	f := &Func{Shape: []int{1}, Outputs: 1,
		F: func(out, x []float64) { out[0] = 1 - math.Max(0, 1-x[0]) },
		Grad: func(g, x []float64, _ int) {
			g[0] = 0
			if 1-x[0] > 0 {
				g[0] = 1
			}
		}}
	r, err := IntegratedGradients(context.Background(), f, []float64{2.2}, 0, IGOptions{Rule: RuleLeft, Tolerance: 1e-6, MaxPoints: 16})
	require.NoError(t, err)
	assert.False(t, r.Completeness.OK)
	assert.Equal(t, 16, r.Settings.Points)
	assert.Greater(t, r.Completeness.RelativeGap, 1e-6)
}

func TestIGSeveralBaselines(t *testing.T) {
	// Averaging over baselines: the mean of the per-baseline IG, complete
	// against the mean baseline output (linearity of Σ, Sundararajan et al.
	// 2017 Proposition 1 for each baseline).
	net := newTanhNet(4, 6, 2, 5)
	x := []float64{0.5, 1, -1.5, 0.2}
	specs := []Baseline{{}, {Kind: BaselineConstant, Value: 0.3}, {Kind: BaselineUniform, Lo: -1, Hi: 1, Seed: 9}}
	opt := IGOptions{Rule: RuleGaussLegendre, Points: 64}
	want := make([]float64, 4)
	meanBase := 0.0
	for _, b := range specs {
		o := opt
		o.Baselines = []Baseline{b}
		r, err := IntegratedGradients(context.Background(), net.model(), x, 1, o)
		require.NoError(t, err)
		for i, a := range r.Attributions {
			want[i] += a / 3
		}
		xb, err := b.Build(x, []int{4})
		require.NoError(t, err)
		meanBase += eval(net.model(), xb, 1) / 3
	}
	opt.Baselines = specs
	r, err := IntegratedGradients(context.Background(), net.model(), x, 1, opt)
	require.NoError(t, err)
	assert.InDeltaSlice(t, want, r.Attributions, 1e-14)
	assert.InDelta(t, meanBase, r.BaselineOutput, 1e-14)
	assert.InDelta(t, 0, r.Completeness.Gap, 1e-10)
	assert.Len(t, r.Settings.Baselines, 3)
	assert.Equal(t, BaselineZero, r.Settings.Baselines[0].Kind)
}

func TestIGAutoDoesNotStopOnCancellingErrors(t *testing.T) {
	// f(x) = x₀³ − x₁³ at x = (1, 1) from the zero baseline: the exact
	// attributions are (∫₀¹ 3α² dα, −∫₀¹ 3α² dα) = (1, −1) (closed form,
	// Sundararajan et al. 2017 eq. 1), summing to f(x) − f(0) = 0. The
	// quadrature errors of the two features are equal and opposite, so the
	// completeness gap is zero at every point count: the gap alone would
	// stop at the first pass, where the trapezoid rule with 4 intervals is
	// off by h²/12·(f′(1) − f′(0)) = 1/32 per feature (Euler–Maclaurin).
	f := &Func{
		Shape: []int{2}, Outputs: 1,
		F:    func(out, x []float64) { out[0] = x[0]*x[0]*x[0] - x[1]*x[1]*x[1] },
		Grad: func(g, x []float64, _ int) { g[0], g[1] = 3*x[0]*x[0], -3*x[1]*x[1] },
	}
	x := []float64{1, 1}
	coarse, err := IntegratedGradients(context.Background(), f, x, 0, IGOptions{Points: 5})
	require.NoError(t, err)
	assert.InDelta(t, 1+1.0/32, coarse.Attributions[0], 1e-12) // trapezoid error, closed form above
	assert.True(t, coarse.Completeness.OK)                     // the gap cannot see it

	r, err := IntegratedGradients(context.Background(), f, x, 0, IGOptions{})
	require.NoError(t, err)
	relL1 := (math.Abs(r.Attributions[0]-1) + math.Abs(r.Attributions[1]+1)) / 2
	assert.LessOrEqual(t, relL1, DefaultTolerance, "points %d", r.Settings.Points)
	assert.Greater(t, r.Settings.Points, 5)
}

// summingFunc is a Func that also returns gradient sums, formed from its
// own gradients in float64 in point order, counting its calls.
type summingFunc struct {
	*Func
	calls, points int
}

func (s *summingFunc) GradientSum(ctx context.Context, x []float64, n int, weight []float64, target int) ([]float64, []float64, error) {
	s.calls++
	s.points += n
	tgt := make([]int, n)
	for i := range tgt {
		tgt[i] = target
	}
	out, g, err := s.Gradient(ctx, x, n, tgt)
	if err != nil {
		return nil, nil, err
	}
	size := len(g) / n
	sum := make([]float64, size)
	for i, w := range weight {
		for j, v := range g[i*size : (i+1)*size] {
			sum[j] += w * v
		}
	}
	return out, sum, nil
}

func (s *summingFunc) PathGradientSum(ctx context.Context, from, to, alpha, weight []float64, target int) ([]float64, []float64, error) {
	x := make([]float64, 0, len(alpha)*len(from))
	for _, a := range alpha {
		for j := range from {
			x = append(x, from[j]+a*(to[j]-from[j]))
		}
	}
	return s.GradientSum(ctx, x, len(alpha), weight, target)
}

func TestIGAndSmoothGradTakeSums(t *testing.T) {
	// A model that returns gradient sums gets the points of a pass as sums
	// (one for the trapezoid's end nodes, one for the others), the same
	// points and weights as point by point: on the closed form f = x₁x₂
	// (∂f/∂x₁ = x₂, ∂f/∂x₂ = x₁) the two agree to rounding, and IG from
	// the zero baseline, (x₁x₂/2, x₁x₂/2) (Sundararajan et al. 2017, eq. 1:
	// x₁ ∫₀¹ αx₂ dα), is exact for the rules exact on degree 1.
	ctx := context.Background()
	x := []float64{1.5, -0.7}
	for _, rule := range allRules {
		plain, err := IntegratedGradients(ctx, product(), x, 0, IGOptions{Rule: rule})
		require.NoError(t, err)
		s := &summingFunc{Func: product()}
		summed, err := IntegratedGradients(ctx, s, x, 0, IGOptions{Rule: rule})
		require.NoError(t, err)
		assert.InDeltaSlice(t, plain.Attributions, summed.Attributions, 1e-15, "%v", rule)
		assert.Equal(t, plain.Settings.Points, summed.Settings.Points, "%v", rule)
		assert.Equal(t, plain.Cost.GradientEvals, summed.Cost.GradientEvals, "%v", rule)
		if rule == RuleTrapezoid {
			// Automatic refinement of the trapezoid rule is adaptive: it
			// needs every point's gradient to choose where to refine.
			assert.Zero(t, s.points, "%v: no point went through the sums", rule)
		} else {
			assert.Equal(t, summed.Cost.GradientEvals, s.points, "%v: every point went through the sums", rule)
		}
		if rule != RuleLeft && rule != RuleRight {
			assert.InDeltaSlice(t, []float64{x[0] * x[1] / 2, x[0] * x[1] / 2}, summed.Attributions, 1e-12, "%v: closed form", rule)
		}
	}
	plain, err := SmoothGrad(ctx, product(), x, 0, SmoothGradOptions{Samples: 20, Seed: 3})
	require.NoError(t, err)
	s := &summingFunc{Func: product()}
	summed, err := SmoothGrad(ctx, s, x, 0, SmoothGradOptions{Samples: 20, Seed: 3})
	require.NoError(t, err)
	assert.InDeltaSlice(t, plain.Attributions, summed.Attributions, 1e-15)
	assert.Equal(t, 1, s.calls, "one sum for the 20 copies")
	squared, err := SmoothGrad(ctx, s, x, 0, SmoothGradOptions{Samples: 20, Seed: 3, Variant: VariantSquared})
	require.NoError(t, err)
	assert.Equal(t, 1, s.calls, "the squared variant needs the gradients themselves")
	assert.Positive(t, squared.Attributions[0])
}

// groupingFunc is a summingFunc that also forms grouped path sums, each
// group by PathGradientSum on its points alone (the definition), counting
// its grouped calls.
type groupingFunc struct {
	*summingFunc
	grouped int
}

func (s *groupingFunc) PathGradientSums(ctx context.Context, from, to, alpha, weight []float64, group []int, groups, target int) ([]float64, [][]float64, error) {
	s.grouped++
	sums := make([][]float64, groups)
	for g := range sums {
		var a, w []float64
		for i, gi := range group {
			if gi == g {
				a, w = append(a, alpha[i]), append(w, weight[i])
			}
		}
		sums[g] = make([]float64, len(from))
		if len(a) == 0 {
			continue
		}
		_, sum, err := s.PathGradientSum(ctx, from, to, a, w, target)
		if err != nil {
			return nil, nil, err
		}
		sums[g] = sum
	}
	out, _, err := s.PathGradientSum(ctx, from, to, alpha, weight, target)
	return out, sums, err
}

func TestIGTakesGroupedSumsInOneCall(t *testing.T) {
	// A model that forms grouped path sums gets the trapezoid's end nodes
	// and its other nodes in one call, and the attributions are those of
	// the two separate sums bit for bit; refining rules still refine. On
	// f = x₁x₂ from the zero baseline IG is (x₁x₂/2, x₁x₂/2) (Sundararajan
	// et al. 2017, eq. 1), exact for the trapezoid rule.
	ctx := context.Background()
	x := []float64{1.5, -0.7}
	for _, rule := range []Rule{RuleTrapezoid, RuleMidpoint, RuleGaussLegendre} {
		for _, points := range []int{17, 0} {
			if rule == RuleTrapezoid && points == 0 {
				continue // adaptive: point by point
			}
			opts := IGOptions{Rule: rule, Points: points}
			two, err := IntegratedGradients(ctx, &summingFunc{Func: product()}, x, 0, opts)
			require.NoError(t, err)
			g := &groupingFunc{summingFunc: &summingFunc{Func: product()}}
			one, err := IntegratedGradients(ctx, g, x, 0, opts)
			require.NoError(t, err)
			assert.Equal(t, two.Attributions, one.Attributions, "%v points %d: bit for bit", rule, points)
			assert.Equal(t, two.Cost.GradientEvals, one.Cost.GradientEvals, "%v points %d", rule, points)
			assert.Equal(t, two.Settings.Points, one.Settings.Points, "%v points %d", rule, points)
			assert.Positive(t, g.grouped, "%v points %d: grouped calls", rule, points)
			if points > 0 {
				assert.Equal(t, 1, g.grouped, "%v: one call for a fixed rule", rule)
			}
			if rule == RuleTrapezoid {
				assert.InDeltaSlice(t, []float64{x[0] * x[1] / 2, x[0] * x[1] / 2}, one.Attributions, 1e-12, "closed form")
			}
		}
	}
}
