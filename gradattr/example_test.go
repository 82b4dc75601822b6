package gradattr_test

import (
	"context"
	"fmt"

	"github.com/apportion/apportion/gradattr"
)

// Integrated gradients of f(x) = x₀·x₁ at (2, 3) from the zero baseline:
// each feature gets x₀x₁/2 = 3 (Sundararajan et al. 2017, eq. 1), and the
// attributions sum to f(x) − f(0) = 6.
func ExampleIntegratedGradients() {
	f := &gradattr.Func{
		Shape:   []int{2},
		Outputs: 1,
		F:       func(out, x []float64) { out[0] = x[0] * x[1] },
		Grad:    func(g, x []float64, _ int) { g[0], g[1] = x[1], x[0] },
	}
	r, err := gradattr.IntegratedGradients(context.Background(), f, []float64{2, 3}, 0,
		gradattr.IGOptions{Rule: gradattr.RuleGaussLegendre, Points: 2})
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Printf("attributions %.4f\n", r.Attributions)
	fmt.Printf("sum %.4f, f(x) − f(x′) %.4f, complete %v\n",
		r.Completeness.Sum, r.Completeness.Expected, r.Completeness.OK)
	// Output:
	// attributions [3.0000 3.0000]
	// sum 6.0000, f(x) − f(x′) 6.0000, complete true
}

// SmoothGrad with a caller-supplied ε for each of two noisy copies of the
// sample, on f(x) = x₀² + x₁: the mean gradient is (2x₀ + mean ε₀·2, 1).
func ExampleSmoothGrad() {
	f := &gradattr.Func{
		Shape:   []int{2},
		Outputs: 1,
		F:       func(out, x []float64) { out[0] = x[0]*x[0] + x[1] },
		Grad:    func(g, x []float64, _ int) { g[0], g[1] = 2*x[0], 1 },
	}
	r, err := gradattr.SmoothGrad(context.Background(), f, []float64{1, 5}, 0, gradattr.SmoothGradOptions{
		Perturbations: [][]float64{{0.1, 0}, {0.3, 0}},
	})
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Printf("%.2f\n", r.Attributions)
	// Output:
	// [2.40 1.00]
}

// Summing pixel attributions over 2×2 patches of a 4×4 image.
func ExampleGridGroups() {
	attr := make([]float64, 16)
	for i := range attr {
		attr[i] = float64(i)
	}
	groups, _ := gradattr.GridGroups([]int{4, 4}, 2, 2)
	sums, _ := gradattr.GroupSum(attr, groups)
	for g, s := range sums {
		fmt.Println(groups[g].Name, s)
	}
	// Output:
	// patch 0,0 10
	// patch 0,1 18
	// patch 1,0 42
	// patch 1,1 50
}

// ExampleSummary summarises gradient×input of f(x) = 2x₀ − x₁ (a = (2x₀,
// −x₁), by hand) over four rows in two groups. Overall, mean |a₀| =
// (2+4+6+4)/4 = 4 and mean a₀ = (2+4+6−4)/4 = 2; mean |a₁| = (1+1+2+4)/4 = 2
// and mean a₁ = (−1+1−2−4)/4 = −1.5.
func ExampleSummary() {
	f := &gradattr.Func{
		Shape:   []int{2},
		Outputs: 1,
		F:       func(out, x []float64) { out[0] = 2*x[0] - x[1] },
		Grad:    func(g, _ []float64, _ int) { g[0], g[1] = 2, -1 },
	}
	s, err := gradattr.NewSummary(gradattr.SummaryOptions{Features: []string{"x0", "x1"}, Method: gradattr.MethodGradientTimesInput, GroupBy: "size"})
	if err != nil {
		fmt.Println(err)
		return
	}
	for i, x := range [][]float64{{1, 1}, {2, -1}, {3, 2}, {-2, 4}} {
		r, err := gradattr.GradientTimesInput(context.Background(), f, x, 0)
		if err != nil {
			fmt.Println(err)
			return
		}
		group := "small"
		if x[0] > 1 {
			group = "large"
		}
		if err := s.Add(uint64(i), group, r.Attributions); err != nil {
			fmt.Println(err)
			return
		}
	}
	for _, g := range append([]gradattr.GroupStats{s.Overall()}, s.Groups()...) {
		fmt.Printf("%q (%d rows):", g.Name, g.Rows)
		for _, fs := range g.Ranked() {
			fmt.Printf("  %s mean |a| %.2f, mean a %+.2f", fs.Feature, fs.MeanAbs, fs.Mean)
		}
		fmt.Println()
	}
	// Output:
	// "" (4 rows):  x0 mean |a| 4.00, mean a +2.00  x1 mean |a| 2.00, mean a -1.50
	// "large" (2 rows):  x0 mean |a| 5.00, mean a +5.00  x1 mean |a| 1.50, mean a -0.50
	// "small" (2 rows):  x0 mean |a| 3.00, mean a -1.00  x1 mean |a| 2.50, mean a -2.50
}

// Shapley values of f(x) = x₀·x₁ at (2, 3) over two reference rows, (0, 0)
// and (1, 1): by Shapley's two-player formula φ₀ = ½(v({0}) − v(∅)) +
// ½(v(N) − v({1})) with v({0}) = 2·½, v({1}) = ½·3, v(∅) = ½ and v(N) = 6,
// φ = (2.5, 3), which sum to f(x) − mean f(r) = 5.5.
func ExampleShapley() {
	f := &gradattr.Func{
		Shape:   []int{2},
		Outputs: 1,
		F:       func(out, x []float64) { out[0] = x[0] * x[1] },
	}
	r, err := gradattr.Shapley(context.Background(), f, []float64{2, 3}, 0, gradattr.ShapleyOptions{
		Reference: [][]float64{{0, 0}, {1, 1}},
	})
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Printf("%s estimator: φ %.4f\n", r.Settings.Estimator, r.Attributions)
	fmt.Printf("sum %.4f, f(x) − mean f(r) %.4f, efficient %v\n",
		r.Completeness.Sum, r.Completeness.Expected, r.Completeness.OK)
	// Output:
	// exact estimator: φ [2.5000 3.0000]
	// sum 5.5000, f(x) − mean f(r) 5.5000, efficient true
}
