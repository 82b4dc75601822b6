package gradattr

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"math/big"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// bigSum is the exact sum of xs, rounded once to the nearest float64, by
// math/big (the outside reference for the expansions).
func bigSum(xs []float64) float64 {
	s := new(big.Float).SetPrec(4096)
	for _, x := range xs {
		s.Add(s, new(big.Float).SetFloat64(x))
	}
	v, _ := s.Float64()
	return v
}

// wildFloats draws values of mixed signs over 600 binary orders of
// magnitude, where naive summation loses most of the low bits.
func wildFloats(rng *rand.Rand, n int) []float64 {
	xs := make([]float64, n)
	for i := range xs {
		xs[i] = math.Ldexp(rng.Float64()+0.5, rng.IntN(600)-300)
		if rng.IntN(2) == 0 {
			xs[i] = -xs[i]
		}
	}
	return xs
}

func TestExpansionIsExact(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 3))
	for trial := 0; trial < 200; trial++ {
		xs := wildFloats(rng, 1+rng.IntN(300))
		var e expansion
		for _, x := range xs {
			e.add(x)
		}
		// math/big with 4096 bits sums these exactly; Float64 rounds to
		// nearest even (package math/big documentation).
		want := bigSum(xs)
		require.Equal(t, math.Float64bits(want), math.Float64bits(e.value()), "trial %d", trial)

		// The canonical list sums exactly to the same value and does not
		// depend on the order of the additions.
		var r expansion
		for _, i := range rng.Perm(len(xs)) {
			r.add(xs[i])
		}
		assert.Equal(t, e.canonical(), r.canonical(), "trial %d", trial)
		c := e.canonical()
		require.NotEmpty(t, c)
		assert.Equal(t, math.Float64bits(want), math.Float64bits(c[0]), "first canonical term is the rounded sum")
	}
	// Ties across partials round to even, and a partial below the tie
	// breaks it (IEEE 754 round-to-nearest-even; math/big agrees).
	u := math.Ldexp(1, -53) // half an ulp of 1
	for _, xs := range [][]float64{
		{1, u},                             // tie: stays 1 (even)
		{1 + 2*u, u},                       // tie: 1+2u is odd, rounds up to 1+4u
		{1, u, math.Ldexp(1, -120)},        // just above the tie: up
		{1, u, -math.Ldexp(1, -120)},       // just below the tie: down
		{-1, -u, -math.Ldexp(1, -200)},     // negative, above the tie in magnitude
		{1e100, 1e100, -1e100, -1e100, 1},  // cancellation
		{3, math.Ldexp(1, -52), -u, u / 4}, // mixed signs under the ulp
	} {
		var e expansion
		for _, x := range xs {
			e.add(x)
		}
		assert.Equal(t, math.Float64bits(bigSum(xs)), math.Float64bits(e.value()), "%v", xs)
	}

	// A sum that cancels exactly is the empty list, value 0
	// (IEEE 754: x + (−x) = +0 in round-to-nearest).
	var z expansion
	for _, x := range []float64{1e300, 1, -1e300, -1} {
		z.add(x)
	}
	assert.Empty(t, z.canonical())
	assert.Equal(t, uint64(0), math.Float64bits(z.value()))
}

func TestAddProductIsExact(t *testing.T) {
	rng := rand.New(rand.NewPCG(4, 4))
	for trial := 0; trial < 100; trial++ {
		var e expansion
		s := new(big.Float).SetPrec(4096)
		for k := 0; k < 50; k++ {
			w := float64(rng.IntN(8))
			a := math.Ldexp(rng.Float64()-0.5, rng.IntN(80)-40)
			e.addProduct(w, a)
			// Exact product by math/big (4096 bits hold it).
			p := new(big.Float).SetPrec(4096).Mul(new(big.Float).SetFloat64(w), new(big.Float).SetFloat64(a))
			s.Add(s, p)
		}
		want, _ := s.Float64()
		require.Equal(t, math.Float64bits(want), math.Float64bits(e.value()), "trial %d", trial)
	}
}

// TestPoissonWeights checks the replicate weights against the Poisson(1)
// distribution: mean 1, variance 1, P(0) = e^−1 (closed form).
func TestPoissonWeights(t *testing.T) {
	const rows, nb = 2000, 100
	var n, zeros float64
	var sum, sq float64
	for r := uint64(0); r < rows; r++ {
		for _, w := range poissonWeights(9, r, nb) {
			n++
			sum += w
			sq += w * w
			if w == 0 {
				zeros++
			}
		}
	}
	mean := sum / n
	variance := sq/n - mean*mean
	// n = 200000 draws: the standard error of the mean is 1/√n ≈ 0.0022,
	// of P(0) √(e⁻¹(1−e⁻¹)/n) ≈ 0.0011; 5 standard errors allowed.
	assert.InDelta(t, 1, mean, 0.011)
	assert.InDelta(t, 1, variance, 0.03) // Var of the sample variance: (μ₄−σ⁴)/n = (3+1−1)/n for Poisson(1)
	assert.InDelta(t, math.Exp(-1), zeros/n, 0.0055)
	// The weights depend on (seed, key) only.
	assert.Equal(t, poissonWeights(9, 17, nb), poissonWeights(9, 17, nb))
	assert.NotEqual(t, poissonWeights(9, 17, nb), poissonWeights(9, 18, nb))
}

// summaryRows makes n rows of attributions from the closed form
// f(x) = Σ c_i x_i³ explained by gradient×input (a_i = 3 c_i x_i³), with
// group keys "a", "b", "c".
func summaryRows(t *testing.T, n int, seed uint64) (attrs [][]float64, groups []string) {
	t.Helper()
	c := []float64{1, -2, 0.5, 3}
	f := &Func{
		Shape: []int{4}, Outputs: 1,
		F: func(out, x []float64) {
			out[0] = 0
			for i := range x {
				out[0] += c[i] * x[i] * x[i] * x[i]
			}
		},
		Grad: func(g, x []float64, _ int) {
			for i := range x {
				g[i] = 3 * c[i] * x[i] * x[i]
			}
		},
	}
	rng := rand.New(rand.NewPCG(seed, 11))
	for r := 0; r < n; r++ {
		x := make([]float64, 4)
		for i := range x {
			x[i] = rng.NormFloat64()*1.3 + 0.2*float64(i)
		}
		res, err := GradientTimesInput(context.Background(), f, x, 0)
		require.NoError(t, err)
		for i := range x {
			// closed form: x_i · ∂f/∂x_i = 3 c_i x_i³
			require.InDelta(t, 3*c[i]*x[i]*x[i]*x[i], res.Attributions[i], 1e-12*(1+math.Abs(res.Attributions[i])))
		}
		attrs = append(attrs, res.Attributions)
		groups = append(groups, string(rune('a'+rng.IntN(3))))
	}
	return attrs, groups
}

func newTestSummary(t *testing.T, b int) *Summary {
	t.Helper()
	s, err := NewSummary(SummaryOptions{
		Features: []string{"x0", "x1", "x2", "x3"}, Model: "f3", Method: MethodGradientTimesInput,
		Settings: map[string]any{"target": 0, "seed": uint64(1) << 60}, GroupBy: "g", Bootstrap: b, Seed: 5,
	})
	require.NoError(t, err)
	return s
}

func marshal(t *testing.T, s *Summary) string {
	t.Helper()
	raw, err := json.Marshal(s)
	require.NoError(t, err)
	return string(raw)
}

// TestSummaryMergeEqualsWhole splits the rows at random into shards (in
// random order, some through a JSON round trip) and checks that merging them
// gives the summary of all rows, bit for bit: every exact sum, count,
// interval and the whole JSON document. The reference is the unsplit
// summary; its means are checked against math/big exact sums.
func TestSummaryMergeEqualsWhole(t *testing.T) {
	const n = 120
	attrs, groups := summaryRows(t, n, 1)
	whole := newTestSummary(t, 64)
	for r := range attrs {
		require.NoError(t, whole.Add(uint64(r), groups[r], attrs[r]))
	}
	require.NoError(t, whole.Skip(n, "a", errors.New("explanation failed")))
	wantJSON := marshal(t, whole)

	// The means are the exact sums over n, rounded (math/big reference).
	ov := whole.Overall()
	for i := 0; i < 4; i++ {
		col := make([]float64, n)
		abs := make([]float64, n)
		for r := range attrs {
			col[r], abs[r] = attrs[r][i], math.Abs(attrs[r][i])
		}
		assert.Equal(t, bigSum(col)/n, ov.Features[i].Mean)
		assert.Equal(t, bigSum(abs)/n, ov.Features[i].MeanAbs)
		assert.LessOrEqual(t, ov.Features[i].MeanLo, ov.Features[i].Mean)
		assert.GreaterOrEqual(t, ov.Features[i].MeanHi, ov.Features[i].Mean)
	}

	rng := rand.New(rand.NewPCG(21, 21))
	for trial := 0; trial < 30; trial++ {
		k := 2 + rng.IntN(4)
		shards := make([]*Summary, k)
		for j := range shards {
			shards[j] = newTestSummary(t, 64)
		}
		for _, r := range rng.Perm(n) {
			require.NoError(t, shards[rng.IntN(k)].Add(uint64(r), groups[r], attrs[r]))
		}
		require.NoError(t, shards[rng.IntN(k)].Skip(n, "a", errors.New("explanation failed")))
		merged := newTestSummary(t, 64)
		for _, j := range rng.Perm(k) {
			sh := shards[j]
			if rng.IntN(2) == 0 {
				var back Summary
				require.NoError(t, json.Unmarshal([]byte(marshal(t, sh)), &back))
				sh = &back
			}
			require.NoError(t, merged.Merge(sh))
		}
		require.Equal(t, wantJSON, marshal(t, merged), "trial %d (%d shards)", trial, k)
		assert.Equal(t, whole.Overall(), merged.Overall())
		assert.Equal(t, whole.Groups(), merged.Groups())
	}

	// A contiguous split 0..k, k..n, as shards of a file are made.
	a, b := newTestSummary(t, 64), newTestSummary(t, 64)
	for r := range attrs {
		s := a
		if r >= 47 {
			s = b
		}
		require.NoError(t, s.Add(uint64(r), groups[r], attrs[r]))
	}
	require.NoError(t, b.Skip(n, "a", errors.New("explanation failed")))
	require.NoError(t, a.Merge(b))
	assert.Equal(t, wantJSON, marshal(t, a))
}

func TestSummaryRefusals(t *testing.T) {
	s := newTestSummary(t, 8)
	require.NoError(t, s.Add(3, "a", []float64{1, 2, 3, 4}))

	err := s.Add(3, "b", []float64{1, 2, 3, 4})
	assert.ErrorIs(t, err, ErrInput)
	assert.ErrorContains(t, err, "row key 3 is already in the summary")
	assert.ErrorContains(t, s.Add(4, "a", []float64{1, 2}), "has 2 attributions, summary has 4 features")
	assert.ErrorContains(t, s.Add(5, "a", []float64{1, math.NaN(), 3, 4}), "feature 1 (x1): attribution NaN")
	assert.ErrorIs(t, s.Add(6, "a", []float64{1, math.Inf(1), 3, 4}), ErrInput)
	assert.ErrorIs(t, s.Skip(3, "a", errors.New("x")), ErrInput)
	assert.Equal(t, 1, s.Rows(), "refused rows change nothing")
	// Check refuses what Add refuses for the values, with the same error,
	// and takes no key: row 5 can still be added once fixed.
	bad := []float64{1, math.NaN(), 3, 4}
	assert.Equal(t, s.Add(5, "a", bad).Error(), s.Check(5, bad).Error())
	assert.ErrorContains(t, s.Check(5, []float64{1, 2, 3, -2 * MaxSummaryValue}), "attribution -2e+100")
	assert.NoError(t, s.Check(3, []float64{1, 2, 3, 4}), "the key is Add's to judge")
	require.NoError(t, s.Add(5, "a", []float64{1, 2, 3, 4}))
	assert.Equal(t, 2, s.Rows())

	for _, opt := range []SummaryOptions{
		{},
		{Features: []string{"a"}, Bootstrap: -1},
		{Features: []string{"a"}, Bootstrap: MaxBootstrap + 1},
		{Features: make([]string, 50000), Bootstrap: 200},
		{Features: []string{"a"}, Settings: map[string]any{"f": func() {}}},
	} {
		_, err := NewSummary(opt)
		assert.ErrorIs(t, err, ErrOptions, "%+v", opt.Bootstrap)
	}

	// Mismatched options are refused with the difference named.
	for what, opt := range map[string]SummaryOptions{
		"model":                {Model: "other"},
		"method":               {Method: MethodIntegratedGradients},
		"settings":             {Settings: map[string]any{"target": 1, "seed": uint64(1) << 60}},
		"features":             {Features: []string{"x0", "x1", "x2", "y3"}},
		"grouped by":           {GroupBy: "h"},
		"bootstrap replicates": {Bootstrap: 9},
		"bootstrap seed":       {Seed: 6},
	} {
		base := newTestSummary(t, 8).Options()
		if opt.Model != "" {
			base.Model = opt.Model
		}
		if opt.Method != "" {
			base.Method = opt.Method
		}
		if opt.Settings != nil {
			base.Settings = opt.Settings
		}
		if opt.Features != nil {
			base.Features = opt.Features
		}
		if opt.GroupBy != "" {
			base.GroupBy = opt.GroupBy
		}
		if opt.Bootstrap != 0 {
			base.Bootstrap = opt.Bootstrap
		}
		if opt.Seed != 0 {
			base.Seed = opt.Seed
		}
		o, err := NewSummary(base)
		require.NoError(t, err)
		err = s.Merge(o)
		assert.ErrorIs(t, err, ErrMismatch, what)
		assert.ErrorIs(t, err, ErrInput, what)
		assert.ErrorContains(t, err, what)
	}

	// Overlapping keys are refused and leave the summary unchanged.
	o := newTestSummary(t, 8)
	require.NoError(t, o.Add(2, "a", []float64{1, 1, 1, 1}))
	require.NoError(t, o.Add(3, "a", []float64{1, 1, 1, 1}))
	before := marshal(t, s)
	err = s.Merge(o)
	assert.ErrorIs(t, err, ErrMismatch)
	assert.ErrorContains(t, err, "both summaries hold row key")
	assert.Equal(t, before, marshal(t, s))
	assert.ErrorIs(t, s.Merge(s), ErrMismatch, "merging a summary into itself double-counts")

	// Too many groups.
	g := newTestSummary(t, 1)
	for k := 0; k < MaxSummaryGroups; k++ {
		require.NoError(t, g.Add(uint64(k), fmt.Sprint(k), []float64{1, 1, 1, 1}))
	}
	err = g.Add(MaxSummaryGroups, "one more", []float64{1, 1, 1, 1})
	assert.ErrorIs(t, err, ErrInput)
	assert.ErrorContains(t, err, "more than the 1024")

	// Many groups of many cells: refused by the total, 1024 × 1024 cells
	// per group, (7 + 1) groups fit in 2^23 cells and (8 + 1) do not.
	wide, err := NewSummary(SummaryOptions{Features: make([]string, 1024), Bootstrap: 1024})
	require.NoError(t, err)
	assert.NoError(t, wide.checkGroups(7))
	err = wide.checkGroups(8)
	assert.ErrorContains(t, err, "9437184 cells with the whole, more than the 8388608")
}

func TestSummaryJSONRefusesBadDocuments(t *testing.T) {
	s := newTestSummary(t, 4)
	require.NoError(t, s.Add(0, "a", []float64{1, 2, 3, 4}))
	require.NoError(t, s.Add(1, "b", []float64{-1, 2, 3, 4}))
	good := marshal(t, s)
	var back Summary
	require.NoError(t, json.Unmarshal([]byte(good), &back))
	assert.Equal(t, good, marshal(t, &back))

	var doc map[string]any
	require.NoError(t, json.Unmarshal([]byte(good), &doc))
	edit := func(f func(d map[string]any)) string {
		var d map[string]any
		require.NoError(t, json.Unmarshal([]byte(good), &d))
		f(d)
		raw, err := json.Marshal(d)
		require.NoError(t, err)
		return string(raw)
	}
	cases := map[string]string{
		"truncated":      good[:len(good)/2],
		"format":         edit(func(d map[string]any) { d["format"] = "other" }),
		"version":        edit(func(d map[string]any) { d["version"] = 2 }),
		"rows":           edit(func(d map[string]any) { d["rows"] = 5 }),
		"keys":           edit(func(d map[string]any) { d["keys"] = []any{[]any{0, 7}} }),
		"empty range":    edit(func(d map[string]any) { d["keys"] = []any{[]any{2, 2}} }),
		"bootstrap":      edit(func(d map[string]any) { d["bootstrap"] = 0 }),
		"state features": edit(func(d map[string]any) { d["overall"].(map[string]any)["state"].(map[string]any)["sum"] = []any{} }),
		"weights": edit(func(d map[string]any) {
			d["overall"].(map[string]any)["state"].(map[string]any)["bootstrap_weights"] = []any{1}
		}),
		"settings": edit(func(d map[string]any) { d["settings"] = []any{1} }),
	}
	for name, doc := range cases {
		_, err := DecodeSummary(strings.NewReader(doc))
		assert.ErrorIs(t, err, ErrInput, name)
	}
}

// TestSummaryBootstrapCoverage checks the 95% percentile intervals of the
// Poisson bootstrap against their nominal coverage on a closed form with a
// known attribution distribution.
//
// Model: f(x) = ½ Σ c_i x_i², explained by the gradient, a_i = c_i x_i
// (closed form). With x_i ~ N(μ_i, σ_i²), a_i ~ N(c_i μ_i, c_i² σ_i²): its
// mean is c_i μ_i and the mean of |a_i| is the folded-normal mean
//
//	E|a| = s √(2/π) exp(−m²/(2s²)) + m (1 − 2Φ(−m/s))   (m = c μ, s = |c| σ)
//
// (Leone, Nelson & Nottingham 1961, "The folded normal distribution",
// from memory). Over 200 seeded repetitions of 80 rows, each interval should
// cover its true mean about 95% of the time (the percentile interval is
// first-order accurate for a mean: Efron & Tibshirani 1993, ch. 13, from
// memory).
func TestSummaryBootstrapCoverage(t *testing.T) {
	const reps, n = 200, 80
	mu := []float64{1, -0.5}
	sigma := []float64{1, 2}
	c := []float64{1, 3}
	f := &Func{
		Shape: []int{2}, Outputs: 1,
		F: func(out, x []float64) { out[0] = 0.5 * (c[0]*x[0]*x[0] + c[1]*x[1]*x[1]) },
		Grad: func(g, x []float64, _ int) {
			g[0], g[1] = c[0]*x[0], c[1]*x[1]
		},
	}
	trueMean := make([]float64, 2)
	trueAbs := make([]float64, 2)
	for i := range c {
		m, s := c[i]*mu[i], math.Abs(c[i])*sigma[i]
		trueMean[i] = m
		trueAbs[i] = s*math.Sqrt(2/math.Pi)*math.Exp(-m*m/(2*s*s)) + m*(1-math.Erfc(m/s/math.Sqrt2))
	}
	covered := map[string]int{}
	for rep := 0; rep < reps; rep++ {
		s, err := NewSummary(SummaryOptions{Features: []string{"x0", "x1"}, Seed: uint64(rep)})
		require.NoError(t, err)
		rng := rand.New(rand.NewPCG(uint64(rep), 99))
		for r := 0; r < n; r++ {
			x := []float64{mu[0] + sigma[0]*rng.NormFloat64(), mu[1] + sigma[1]*rng.NormFloat64()}
			res, err := Gradient(context.Background(), f, x, 0, GradientOptions{})
			require.NoError(t, err)
			require.NoError(t, s.Add(uint64(r), "", res.Attributions))
		}
		for i, fs := range s.Overall().Features {
			if fs.MeanLo <= trueMean[i] && trueMean[i] <= fs.MeanHi {
				covered[fmt.Sprintf("mean x%d", i)]++
			}
			if fs.MeanAbsLo <= trueAbs[i] && trueAbs[i] <= fs.MeanAbsHi {
				covered[fmt.Sprintf("mean_abs x%d", i)]++
			}
		}
	}
	// Binomial closed form: with true coverage 0.95, P(X < 180) + P(X > 198)
	// for X ~ Bin(200, 0.95) is below 1%, so the band [0.90, 0.99] fails a
	// correct implementation rarely, and a wrong interval width (say a
	// 68% or a 99.9% interval) almost surely.
	tail := 0.0
	for k := 0; k <= reps; k++ {
		if k < 180 || k > 198 {
			tail += binomialPMF(reps, k, 0.95)
		}
	}
	require.Less(t, tail, 0.01)
	require.Len(t, covered, 4)
	for what, k := range covered {
		rate := float64(k) / reps
		t.Logf("%s: coverage %.3f", what, rate)
		assert.GreaterOrEqual(t, rate, 0.90, what)
		assert.LessOrEqual(t, rate, 0.99, what)
	}
}

// binomialPMF is C(n,k) p^k (1−p)^(n−k), through log-gamma.
func binomialPMF(n, k int, p float64) float64 {
	ln, _ := math.Lgamma(float64(n + 1))
	lk, _ := math.Lgamma(float64(k + 1))
	lnk, _ := math.Lgamma(float64(n - k + 1))
	return math.Exp(ln - lk - lnk + float64(k)*math.Log(p) + float64(n-k)*math.Log1p(-p))
}

// TestPercentileInterval checks the quantile rule on 0..100: definition 7
// of Hyndman & Fan 1996 puts the p-quantile of 0, 1, …, m−1 at (m−1)p.
func TestPercentileInterval(t *testing.T) {
	v := make([]float64, 101)
	for i := range v {
		v[len(v)-1-i] = float64(i) // reversed: the function sorts
	}
	lo, hi := percentileInterval(v, 50)
	assert.InDelta(t, 2.5, lo, 1e-12)
	assert.InDelta(t, 97.5, hi, 1e-12)
	lo, hi = percentileInterval(nil, 7)
	assert.Equal(t, 7.0, lo)
	assert.Equal(t, 7.0, hi)
}

func TestSummarySkippedRows(t *testing.T) {
	s := newTestSummary(t, 4)
	for k := MaxSkippedKept + 5; k >= 0; k-- {
		require.NoError(t, s.Skip(uint64(k), "a", fmt.Errorf("row %d failed", k)))
	}
	assert.Equal(t, MaxSkippedKept+6, s.SkippedRows())
	kept := s.Skipped()
	require.Len(t, kept, MaxSkippedKept)
	assert.Equal(t, uint64(0), kept[0].Key)
	assert.Equal(t, "row 0 failed", kept[0].Error)
	assert.Equal(t, 0, s.Rows())
	assert.Empty(t, s.Overall().Features)
}

func BenchmarkSummaryAdd(b *testing.B) {
	s, err := NewSummary(SummaryOptions{Features: make([]string, 8)})
	require.NoError(b, err)
	rng := rand.New(rand.NewPCG(1, 1))
	row := make([]float64, 8)
	for i := 0; b.Loop(); i++ {
		for j := range row {
			row[j] = rng.NormFloat64()
		}
		if err := s.Add(uint64(i), "g", row); err != nil {
			b.Fatal(err)
		}
	}
}

func TestSummaryCountsIncompleteRows(t *testing.T) {
	// Rows whose completeness check failed are summed like the others and
	// counted; the counts of parts add up under Merge and survive the JSON
	// round trip (common practice: a merge of disjoint parts sums their
	// counts). A document whose count exceeds its rows is refused.
	whole, a, b := newTestSummary(t, 8), newTestSummary(t, 8), newTestSummary(t, 8)
	plain := newTestSummary(t, 8)
	for k := uint64(0); k < 10; k++ {
		attr := []float64{float64(k), 1, -2, 0.5}
		part := a
		if k >= 4 {
			part = b
		}
		add, addPart := whole.Add, part.Add
		if k%3 == 0 {
			add, addPart = whole.AddIncomplete, part.AddIncomplete
		}
		require.NoError(t, add(k, "g1", attr))
		require.NoError(t, addPart(k, "g1", attr))
		require.NoError(t, plain.Add(k, "g1", attr))
	}
	assert.Equal(t, 4, whole.IncompleteRows()) // keys 0, 3, 6, 9
	require.NoError(t, a.Merge(b))
	assert.Equal(t, 4, a.IncompleteRows())
	assert.Equal(t, marshal(t, whole), marshal(t, a))
	// The statistics are those of the same rows added plainly.
	assert.Equal(t, plain.Overall(), whole.Overall())
	back, err := DecodeSummary(strings.NewReader(marshal(t, whole)))
	require.NoError(t, err)
	assert.Equal(t, 4, back.IncompleteRows())
	assert.Contains(t, marshal(t, whole), `"incomplete_rows":4,`)

	bad := strings.Replace(marshal(t, whole), `"incomplete_rows":4,`, `"incomplete_rows":11,`, 1)
	_, err = DecodeSummary(strings.NewReader(bad))
	assert.ErrorIs(t, err, ErrInput)
	assert.ErrorContains(t, err, "11 incomplete rows, expected 0 to the 10 rows summed")
	// A document from before the count had none: read as 0.
	old := strings.Replace(marshal(t, plain), `"incomplete_rows":0,`, ``, 1)
	back, err = DecodeSummary(strings.NewReader(old))
	require.NoError(t, err)
	assert.Zero(t, back.IncompleteRows())
}

func TestSummaryBinaryRoundTrip(t *testing.T) {
	// The binary form keeps every exact sum, count and key: decoded, the
	// summary writes the JSON document of the original byte for byte, and
	// merges as the original does (common practice: a lossless encoding
	// round-trips to equal bytes). Truncated or corrupted forms are refused
	// with ErrInput, never a panic.
	s, a := newTestSummary(t, 16), newTestSummary(t, 16)
	rng := rand.New(rand.NewPCG(3, 4))
	for k := uint64(0); k < 40; k++ {
		attr := []float64{rng.NormFloat64(), 1e-300 * rng.NormFloat64(), 1e12 * rng.NormFloat64(), 0.1}
		group := []string{"", "g1", "g2"}[k%3]
		target := s
		if k >= 25 {
			target = a
		}
		var err error
		switch {
		case k%7 == 0:
			err = target.Skip(k, group, fmt.Errorf("row %d unreadable", k))
		case k%5 == 0:
			err = target.AddIncomplete(k, group, attr)
		default:
			err = target.Add(k, group, attr)
		}
		require.NoError(t, err)
	}
	raw, err := s.MarshalBinary()
	require.NoError(t, err)
	var back Summary
	require.NoError(t, back.UnmarshalBinary(raw))
	assert.Equal(t, marshal(t, s), marshal(t, &back))
	require.NoError(t, s.Merge(a))
	require.NoError(t, back.Merge(a))
	assert.Equal(t, marshal(t, s), marshal(t, &back))
	js := marshal(t, s)
	raw, err = s.MarshalBinary()
	require.NoError(t, err)
	t.Logf("JSON %d bytes, binary %d bytes", len(js), len(raw))
	assert.Less(t, len(raw), len(js))

	for n := 0; n < len(raw); n += 1 + n/8 {
		var x Summary
		err := x.UnmarshalBinary(raw[:n])
		assert.ErrorIs(t, err, ErrInput, "truncated at %d", n)
	}
	corrupt := slices.Clone(raw)
	corrupt[len(corrupt)-9] ^= 0x7f // the last partial's exponent bits
	var x Summary
	assert.NotPanics(t, func() { _ = x.UnmarshalBinary(corrupt) })
	assert.ErrorIs(t, x.UnmarshalBinary(append(slices.Clone(raw), 0)), ErrInput, "a byte past the end")
}
