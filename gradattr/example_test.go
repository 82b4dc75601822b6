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
