package gausslegendre

import (
	"math"
	"testing"
)

// TestRootsAndWeights checks that every node is a root of P_n, to one
// Newton step of 1e-15, and that the weights integrate 1 and x² exactly:
// Σ w_j = 2 and Σ w_j x_j² = 2/3 (A&S 1964, 25.4.29: exact for degree
// ≤ 2n−1).
func TestRootsAndWeights(t *testing.T) {
	for _, n := range []int{1, 2, 7, 64, 513, 1024} {
		x, w := Rule(n)
		var s0, s2 float64
		for j := range x {
			s0 += w[j]
			s2 += w[j] * x[j] * x[j]
			p, q := legendre(n, x[j])
			dp := float64(n) * (x[j]*p - q) / (x[j]*x[j] - 1)
			if step := math.Abs(p / dp); step > 1e-15 {
				t.Errorf("n=%d root %d: Newton step %g", n, j, step)
			}
			if j > 0 && x[j] <= x[j-1] {
				t.Errorf("n=%d: nodes %d and %d out of order", n, j-1, j)
			}
		}
		if math.Abs(s0-2) > 1e-12 {
			t.Errorf("n=%d: Σ w = %v, want 2", n, s0)
		}
		if n > 1 && math.Abs(s2-2.0/3) > 1e-12 {
			t.Errorf("n=%d: Σ w x² = %v, want 2/3", n, s2)
		}
	}
}
