package fidelity_test

import (
	"context"
	"fmt"

	"github.com/apportion/apportion/fidelity"
	"github.com/apportion/apportion/gradattr"
)

// Deletion and infidelity of integrated gradients on f(x) = 2x₀ − x₁ + 0.5x₂:
// removing x₀ first (the largest attribution) drops the output fastest, and
// the attributions account for every subset removed exactly.
func ExampleDeletion() {
	w := []float64{2, -1, 0.5}
	f := &gradattr.Func{
		Shape: []int{3}, Outputs: 1,
		F:    func(out, x []float64) { out[0] = w[0]*x[0] + w[1]*x[1] + w[2]*x[2] },
		Grad: func(g, _ []float64, _ int) { copy(g, w) },
	}
	ctx := context.Background()
	x := []float64{1, 1, 1}
	r, err := gradattr.Attribute(ctx, f, x, 0, gradattr.Options{Method: gradattr.MethodIntegratedGradients, Points: 4})
	if err != nil {
		fmt.Println(err)
		return
	}
	d, err := fidelity.Deletion(ctx, f, x, 0, r.Attributions, fidelity.CurveOptions{})
	if err != nil {
		fmt.Println(err)
		return
	}
	infd, err := fidelity.Infidelity(ctx, f, x, 0, r.Attributions, fidelity.InfidelityOptions{
		Perturbation: fidelity.PerturbBaseline, Shares: true, Draws: 16, Seed: 1})
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Println("attributions:", r.Attributions)
	fmt.Println("deletion curve:", d.Outputs)
	fmt.Printf("deletion area: %.4f\n", d.Area)
	fmt.Println("infidelity:", infd)
	// Output:
	// attributions: [2 -1 0.5]
	// deletion curve: [1.5 -0.5 -1 0]
	// deletion area: -0.2500
	// infidelity: 0
}
