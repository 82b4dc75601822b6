package fidelity

import (
	"context"
	"encoding/json"
	"errors"
	"math"
	"slices"
	"testing"

	"github.com/apportion/apportion/gradattr"
)

// Section and equation numbers of the papers cited in these tests are from
// memory; the formulas written beside them are what is checked.

// linear is f(x) = w·x + b with two outputs, the second −f, so that a
// target other than 0 is exercised too.
func linear(w []float64, b float64) *gradattr.Func {
	return &gradattr.Func{
		Shape: []int{len(w)}, Outputs: 2,
		F: func(out, x []float64) {
			s := b
			for i := range w {
				s += w[i] * x[i]
			}
			out[0], out[1] = s, -s
		},
		Grad: func(g, _ []float64, k int) {
			for i := range w {
				g[i] = w[i]
				if k == 1 {
					g[i] = -w[i]
				}
			}
		},
	}
}

// bumpy is f(x) = tanh(Σ_i c_i x_i² + x₀x₁) with one output: nonlinear, so
// that random draws matter.
func bumpy(n int) *gradattr.Func {
	return &gradattr.Func{
		Shape: []int{n}, Outputs: 1,
		F: func(out, x []float64) {
			s := x[0] * x[1]
			for i, v := range x {
				s += float64(i+1) * 0.1 * v * v
			}
			out[0] = math.Tanh(s)
		},
		Grad: func(g, x []float64, _ int) {
			s := x[0] * x[1]
			for i, v := range x {
				s += float64(i+1) * 0.1 * v * v
			}
			d := 1 - math.Tanh(s)*math.Tanh(s)
			for i, v := range x {
				g[i] = d * 2 * float64(i+1) * 0.1 * v
			}
			g[0] += d * x[1]
			g[1] += d * x[0]
		},
	}
}

var (
	linW = []float64{0.5, -2, 1.5, 0.25, -0.75, 3}
	linB = 0.3
	linX = []float64{1, 0.5, -1, 2, 1.5, 0.4}
)

func ig(t *testing.T, m gradattr.Model, x []float64, target int) *gradattr.Result {
	t.Helper()
	r, err := gradattr.Attribute(context.Background(), m, x, target, gradattr.Options{Method: gradattr.MethodIntegratedGradients, Points: 8})
	if err != nil {
		t.Fatal(err)
	}
	return r
}

// The deletion curve of integrated gradients on f(x) = w·x + b with the
// zero baseline, where IG = w ⊙ x (Sundararajan et al. 2017, linear case),
// equals the curve computed in closed form: removing features in order of
// decreasing w_i·x_i leaves b + Σ_{i kept} w_i·x_i; the insertion curve
// is b + Σ_{i put back} w_i·x_i.
func TestDeletionLinearMatchesClosedForm(t *testing.T) {
	ctx := context.Background()
	m := linear(linW, linB)
	attr := ig(t, m, linX, 0).Attributions
	contrib := make([]float64, len(linW))
	order := make([]int, len(linW))
	for i := range linW {
		contrib[i], order[i] = linW[i]*linX[i], i
	}
	slices.SortFunc(order, func(a, b int) int {
		if contrib[a] > contrib[b] {
			return -1
		}
		return 1
	})
	del, err := Deletion(ctx, m, linX, 0, attr, CurveOptions{})
	if err != nil {
		t.Fatal(err)
	}
	ins, err := Insertion(ctx, m, linX, 0, attr, CurveOptions{})
	if err != nil {
		t.Fatal(err)
	}
	for k := 0; k <= len(order); k++ {
		kept, put := linB, linB
		for j, i := range order {
			if j >= k {
				kept += contrib[i]
			} else {
				put += contrib[i]
			}
		}
		if math.Abs(del.Outputs[k]-kept) > 1e-12 || math.Abs(ins.Outputs[k]-put) > 1e-12 {
			t.Errorf("step %d: deletion %v, insertion %v; closed form %v, %v", k, del.Outputs[k], ins.Outputs[k], kept, put)
		}
		if want := float64(k) / float64(len(order)); del.Fractions[k] != want {
			t.Errorf("step %d: fraction %v, want %v", k, del.Fractions[k], want)
		}
	}
	// Area by the trapezoid rule over the fractions (closed form of the
	// rule).
	want := 0.0
	for k := 1; k < len(del.Outputs); k++ {
		want += (del.Outputs[k] + del.Outputs[k-1]) / 2 / float64(len(order))
	}
	if math.Abs(del.Area-want) > 1e-15 {
		t.Errorf("area %v, trapezoid rule %v", del.Area, want)
	}
}

// Groups are removed whole, in order of their summed attributions, and
// Steps cuts the curve into that many steps (closed form of the linear
// model, as above).
func TestDeletionGroupsAndSteps(t *testing.T) {
	m := linear(linW, linB)
	attr := make([]float64, len(linW))
	for i := range attr {
		attr[i] = linW[i] * linX[i]
	}
	groups := []gradattr.Group{{Name: "a", Indices: []int{0, 1}}, {Name: "b", Indices: []int{2, 3}}, {Name: "c", Indices: []int{4, 5}}}
	c, err := Deletion(context.Background(), m, linX, 0, attr, CurveOptions{Groups: groups, Steps: 3})
	if err != nil {
		t.Fatal(err)
	}
	// Group sums: a = 0.5 − 1 = −0.5, b = −1.5 + 0.5 = −1, c = −1.125 +
	// 1.2 = 0.075: the order is c, a, b.
	sum := func(gs ...int) float64 {
		s := linB
		for _, g := range gs {
			for _, i := range groups[g].Indices {
				s += attr[i]
			}
		}
		return s
	}
	want := []float64{sum(0, 1, 2), sum(0, 1), sum(1), sum()}
	for k := range want {
		if math.Abs(c.Outputs[k]-want[k]) > 1e-12 {
			t.Errorf("step %d: %v, want %v", k, c.Outputs[k], want[k])
		}
	}
}

// On a linear model the first-order account is exact: infidelity is 0 for
// integrated gradients (a share of f(x) − f(x′)) under the baseline
// perturbation, the completeness case of Yeh et al. 2019, and for the
// gradient under both perturbations (Iᵀ∇f = f(x) − f(x − I) for linear f).
// A wrong attribution is not 0.
func TestInfidelityLinearIsZero(t *testing.T) {
	ctx := context.Background()
	m := linear(linW, linB)
	base := []float64{0.25, 0.25, 0.25, 0.25, 0.25, 0.25} // no feature at its baseline
	r, err := gradattr.Attribute(ctx, m, linX, 1, gradattr.Options{Method: gradattr.MethodIntegratedGradients, Points: 4,
		Baselines: []gradattr.Baseline{{Kind: gradattr.BaselineValues, Values: base}}})
	if err != nil {
		t.Fatal(err)
	}
	sigma := []float64{1, 1, 1, 1, 1, 1}
	for _, tc := range []struct {
		name   string
		attr   []float64
		shares bool
		p      Perturbation
	}{
		{"ig, baseline", r.Attributions, true, PerturbBaseline},
		{"ig, gaussian", r.Attributions, true, PerturbGaussian},
		{"gradient, baseline", []float64{-0.5, 2, -1.5, -0.25, 0.75, -3}, false, PerturbBaseline},
		{"gradient, gaussian", []float64{-0.5, 2, -1.5, -0.25, 0.75, -3}, false, PerturbGaussian},
	} {
		v, err := Infidelity(ctx, m, linX, 1, tc.attr, InfidelityOptions{Perturbation: tc.p, Sigma: sigma, Baseline: base, Shares: tc.shares, Draws: 64, Seed: 3})
		if err != nil {
			t.Fatal(tc.name, err)
		}
		if v > 1e-12 { // 1 − a ratio of sums: rounding leaves about 1e-16
			t.Errorf("%s: infidelity %v, want 0", tc.name, v)
		}
	}
	wrong := make([]float64, len(linW))
	v, err := Infidelity(ctx, m, linX, 1, wrong, InfidelityOptions{Perturbation: PerturbBaseline, Baseline: base, Shares: true, Draws: 64, Seed: 3})
	if err != nil {
		t.Fatal(err)
	}
	if v != 1 {
		t.Errorf("an all-zero attribution has infidelity %v, want 1", v)
	}
}

// On f(x) = x² at x = 1 with Gaussian I of σ = 0.5, the gradient 2 predicts
// Iᵀa = 2I while Δ = f(x) − f(x − I) = 2I − I². With the Gaussian moments
// E[I] = E[I³] = 0, E[I²] = σ², E[I⁴] = 3σ⁴ the best factor is 1 and the
// scaled infidelity is E[I⁴] / E[(2I − I²)²] = 3σ⁴/(4σ² + 3σ⁴) = 0.15789
// (closed form), which the mean of 20000 draws meets within 10%. The zero
// attribution scores 1.
func TestInfidelityGaussianClosedForm(t *testing.T) {
	sq := &gradattr.Func{Shape: []int{1}, Outputs: 1,
		F: func(out, x []float64) { out[0] = x[0] * x[0] }, Grad: func(g, x []float64, _ int) { g[0] = 2 * x[0] }}
	ctx := context.Background()
	opt := InfidelityOptions{Sigma: []float64{0.5}, Draws: 20000, Seed: 9}
	v, err := Infidelity(ctx, sq, []float64{1}, 0, []float64{2}, opt)
	if err != nil {
		t.Fatal(err)
	}
	s2 := 0.25
	want := 3 * s2 * s2 / (4*s2 + 3*s2*s2)
	if math.Abs(v-want) > 0.1*want {
		t.Errorf("infidelity %v, closed form %v", v, want)
	}
	v, err = Infidelity(ctx, sq, []float64{1}, 0, []float64{0}, opt)
	if err != nil || v != 1 {
		t.Errorf("zero attribution: infidelity %v, %v; want 1", v, err)
	}
}

// Max-sensitivity of the gradient of f(x) = Σ c_i x_i² is
// max ‖2c ⊙ (y − x)‖ / ‖2c ⊙ x‖ over the draws; the draws lie in the box,
// so it is at most ‖2c ⊙ r‖ / ‖2c ⊙ x‖ (closed form) and, for a linear
// model, whose gradient does not move, exactly 0.
func TestMaxSensitivityBounds(t *testing.T) {
	ctx := context.Background()
	grad := Method(gradattr.Options{Method: gradattr.MethodGradient})
	m := linear(linW, linB)
	r := []float64{0.1, 0.1, 0.1, 0.1, 0.1, 0.1}
	v, err := MaxSensitivity(ctx, grad, m, linX, 0, linW, SensitivityOptions{Radius: r, Draws: 5, Seed: 1})
	if err != nil || v != 0 {
		t.Errorf("linear model: max-sensitivity %v, %v; want 0", v, err)
	}
	sq := &gradattr.Func{Shape: []int{3}, Outputs: 1,
		F:    func(out, x []float64) { out[0] = x[0]*x[0] + 2*x[1]*x[1] + 3*x[2]*x[2] },
		Grad: func(g, x []float64, _ int) { g[0], g[1], g[2] = 2*x[0], 4*x[1], 6*x[2] }}
	x := []float64{1, -1, 0.5}
	attr := []float64{2, -4, 3}
	v, err = MaxSensitivity(ctx, grad, sq, x, 0, attr, SensitivityOptions{Radius: []float64{0.1, 0.1, 0.1}, Draws: 50, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	bound := math.Sqrt(0.2*0.2+0.4*0.4+0.6*0.6) / math.Sqrt(4+16+9)
	if !(v > 0 && v <= bound) {
		t.Errorf("max-sensitivity %v, want in (0, %v]", v, bound)
	}
}

// Spearman's ρ without ties is 1 − 6Σd²/(n(n² − 1)) (Spearman 1904);
// constant input has no order: 0.
func TestSpearmanClosedForm(t *testing.T) {
	a := []float64{0.3, -1, 2.5, 0.7, 4, -0.2, 1.1}
	b := []float64{1, 2, 3, 4, 5, 6, 0}
	ra, rb := ranks(a), ranks(b)
	d2 := 0.0
	for i := range ra {
		d2 += (ra[i] - rb[i]) * (ra[i] - rb[i])
	}
	n := float64(len(a))
	want := 1 - 6*d2/(n*(n*n-1))
	// ranks by hand: a → 3 1 6 4 7 2 5; b → 2 3 4 5 6 7 1.
	if !slices.Equal(ra, []float64{3, 1, 6, 4, 7, 2, 5}) || !slices.Equal(rb, []float64{2, 3, 4, 5, 6, 7, 1}) {
		t.Fatalf("ranks %v %v", ra, rb)
	}
	if got := Spearman(a, b); math.Abs(got-want) > 1e-15 {
		t.Errorf("ρ = %v, closed form %v", got, want)
	}
	if got := Spearman(a, []float64{1, 1, 1, 1, 1, 1, 1}); got != 0 {
		t.Errorf("ρ with a constant = %v, want 0", got)
	}
	// Ties take their mean rank: [1, 2, 2, 3] ranks 1, 2.5, 2.5, 4.
	if r := ranks([]float64{1, 2, 2, 3}); !slices.Equal(r, []float64{1, 2.5, 2.5, 4}) {
		t.Errorf("ranks with ties %v", r)
	}
}

// SSIM (Wang et al. 2004, eq. 13) of two constant images μa, μb is, with no
// variance, (2μaμb + C1)/(μa² + μb² + C1), C1 = (0.01L)²; of an image with
// itself it is 1.
func TestSSIMClosedForm(t *testing.T) {
	const h, w = 9, 10
	a, b := make([]float64, h*w), make([]float64, h*w)
	for i := range a {
		a[i], b[i] = 0.2, 0.6
	}
	c1 := 0.01 * 0.01
	want := (2*0.2*0.6 + c1) / (0.2*0.2 + 0.6*0.6 + c1)
	if got := SSIM(a, b, h, w, 1); math.Abs(got-want) > 1e-12 {
		t.Errorf("constant images: SSIM %v, closed form %v", got, want)
	}
	for i := range a {
		a[i] = math.Sin(float64(i)) * math.Sin(float64(i)*0.3)
	}
	if got := SSIM(a, a, h, w, 2); math.Abs(got-1) > 1e-12 {
		t.Errorf("SSIM of an image with itself %v, want 1", got)
	}
	scaled := make([]float64, len(a))
	for i, v := range a {
		scaled[i] = -3 * v
	}
	if got := MapSSIM(a, scaled, h, w); math.Abs(got-1) > 1e-12 {
		t.Errorf("MapSSIM of maps equal up to a factor −3: %v, want 1 (absolute values, divided by the largest)", got)
	}
}

// Every draw is seeded: the same seed gives the same bits, another seed
// other random orders and perturbations.
func TestAssessSameSeedSameBits(t *testing.T) {
	run := func(seed uint64) []byte {
		t.Helper()
		cfg := Config{Model: bumpy(4), Samples: [][]float64{{1, -0.5, 0.3, 2}, {0.2, 0.4, -1, 0.5}, {-0.7, 1.2, 0.1, -0.4}}, Seed: seed,
			RandomOrders: 5, Draws: 8, SensitivityDraws: 3, Scale: []float64{1, 1, 1, 1},
			Methods: []gradattr.Method{gradattr.MethodGradient, gradattr.MethodSmoothGrad, gradattr.MethodIntegratedGradients}}
		rep, err := Assess(context.Background(), cfg)
		if err != nil {
			t.Fatal(err)
		}
		b, err := json.Marshal(rep)
		if err != nil {
			t.Fatal(err)
		}
		return b
	}
	a, b, c := run(7), run(7), run(8)
	if string(a) != string(b) {
		t.Error("two runs with seed 7 differ")
	}
	if string(a) == string(c) {
		t.Error("seeds 7 and 8 give the same report")
	}
}

// A sample that could not be read, has a NaN or the wrong size is reported
// and skipped; the others are scored. A model that panics is an error, not
// a panic.
func TestAssessSkipsBadSamples(t *testing.T) {
	cfg := Config{Model: bumpy(3), Seed: 1, RandomOrders: 3, Draws: 4, SensitivityDraws: 2,
		Samples: [][]float64{{1, 0.5, -0.5}, {math.NaN(), 1, 1}, {1, 2}, {0.3, -0.2, 0.9}, {1, 1, 1}},
		Bad:     []error{nil, nil, nil, nil, errors.New("line 6: not a number")},
		Methods: []gradattr.Method{gradattr.MethodGradient, gradattr.MethodExpectedGradients}}
	rep, err := Assess(context.Background(), cfg)
	if err != nil {
		t.Fatal(err)
	}
	var skipped []int
	for _, s := range rep.Skipped {
		skipped = append(skipped, s.Index)
	}
	if rep.Samples != 2 || !slices.Equal(skipped, []int{1, 2, 4}) {
		t.Errorf("scored %d, skipped %v; want 2 scored, 1, 2 and 4 skipped", rep.Samples, skipped)
	}
	if d := rep.Methods[0].Deletion; d == nil || d.N != 2 {
		t.Errorf("deletion interval %+v, want 2 samples", d)
	}
	if eg := rep.Methods[1]; eg.NotScored == "" || eg.Deletion != nil {
		t.Errorf("expected gradients without a reference set: %+v, want not scored", eg)
	}

	bad := cfg
	bad.Reference = [][]float64{{1, 2, 3}, {1, 2}}
	if _, err := Assess(context.Background(), bad); !errors.Is(err, ErrInput) {
		t.Errorf("a reference sample of the wrong size: %v, want ErrInput", err)
	}

	panicky := bumpy(3)
	panicky.F = func(out, x []float64) { panic("broken") }
	cfg.Model = panicky
	rep, err = Assess(context.Background(), cfg)
	if err != nil {
		t.Fatal(err)
	}
	if rep.Samples != 0 || len(rep.Skipped) != len(cfg.Samples) {
		t.Errorf("a panicking model: %d scored, %d skipped", rep.Samples, len(rep.Skipped))
	}
}

// The interval is mean ± t₀.₉₇₅(n − 1)·s/√n: for 1, 2, 3, 4, 5, s = √2.5
// and t₀.₉₇₅(4) = 2.776 (Student's t table, to four digits), so the
// half-width is 2.776·√2.5/√5 = 1.963. NaN and infinite values are left
// out; one value has no width.
func TestIntervalStudentT(t *testing.T) {
	iv := interval([]float64{1, 2, math.NaN(), 3, 4, math.Inf(1), 5})
	if iv.N != 5 || iv.Mean != 3 || math.Abs(iv.Hi-3-1.963) > 5e-4 || math.Abs(3-iv.Lo-1.963) > 5e-4 {
		t.Errorf("interval %+v, want 3 ± 1.963 over 5 values", iv)
	}
	if one := interval([]float64{2}); one.Lo != 2 || one.Hi != 2 {
		t.Errorf("one value: %+v", one)
	}
	if interval([]float64{math.NaN()}) != nil {
		t.Error("no finite value: want no interval")
	}
}

// Budget bounds the metrics that repeat an attribution: with a budget
// below the cost of one gradient (one pass of the sample's values, by
// gradattr.Options.Estimate), max-sensitivity and randomization are left
// out and the report says why; without a bound they are computed.
func TestAssessBudget(t *testing.T) {
	cfg := Config{Model: bumpy(3), Seed: 1, RandomOrders: 3, Draws: 4, SensitivityDraws: 2,
		Samples: [][]float64{{1, 0.5, -0.5}, {0.3, -0.2, 0.9}},
		Metrics: []Metric{MetricSensitivity}, Methods: []gradattr.Method{gradattr.MethodGradient}, Budget: 1}
	rep, err := Assess(context.Background(), cfg)
	if err != nil {
		t.Fatal(err)
	}
	if s := rep.Methods[0]; s.Unrepeated == "" || s.Sensitivity != nil {
		t.Errorf("budget 1: %+v, want max-sensitivity left out", s)
	}
	cfg.Budget = -1
	if rep, err = Assess(context.Background(), cfg); err != nil {
		t.Fatal(err)
	}
	if s := rep.Methods[0]; s.Unrepeated != "" || s.Sensitivity == nil || s.Sensitivity.N != 2 {
		t.Errorf("no bound: %+v, want max-sensitivity of 2 samples", s)
	}
}
