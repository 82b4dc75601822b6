// Package gausslegendre computes the nodes and weights of Gauss–Legendre
// quadrature, for the packages that integrate with it (gradattr's
// quadrature rules, nn's exact path integrals).
package gausslegendre

import (
	"math"
	"sync"
)

var cache sync.Map // int → [2][]float64

// Rule returns the n ≥ 1 nodes x_j ∈ (−1, 1), in increasing order, and
// weights w_j of the Gauss–Legendre rule ∫₋₁¹ g ≈ Σ w_j g(x_j): the roots
// of the Legendre polynomial P_n by Newton's method on the three-term
// recurrence, w_j = 2 / ((1 − x_j²) P′_n(x_j)²) (Abramowitz & Stegun 1964,
// 25.4.29 and ch. 22). Each rule is computed once and kept; callers must
// not modify the slices.
func Rule(n int) (x, w []float64) {
	if v, ok := cache.Load(n); ok {
		p := v.([2][]float64)
		return p[0], p[1]
	}
	x, w = make([]float64, n), make([]float64, n)
	for i := 0; i < (n+1)/2; i++ {
		z := math.Cos(math.Pi * (float64(i) + 0.75) / (float64(n) + 0.5))
		var dp float64
		for iter := 0; iter < 100; iter++ {
			p, q := legendre(n, z)
			dp = float64(n) * (z*p - q) / (z*z - 1)
			dz := p / dp
			z -= dz
			if math.Abs(dz) <= 1e-16*math.Max(1, math.Abs(z)) {
				break
			}
		}
		p, q := legendre(n, z)
		dp = float64(n) * (z*p - q) / (z*z - 1)
		wt := 2 / ((1 - z*z) * dp * dp)
		// The root near cos(π(i+¾)/(n+½)) is the (i+1)-th largest.
		x[n-1-i], w[n-1-i] = z, wt
		x[i], w[i] = -z, wt
	}
	if n%2 == 1 {
		x[n/2] = 0
	}
	cache.Store(n, [2][]float64{x, w})
	return x, w
}

// legendre returns P_n(z) and P_{n−1}(z).
func legendre(n int, z float64) (pn, pn1 float64) {
	p0, p1 := 1.0, z
	if n == 0 {
		return 1, 0
	}
	for k := 1; k < n; k++ {
		p0, p1 = p1, (float64(2*k+1)*z*p1-float64(k)*p0)/float64(k+1)
	}
	return p1, p0
}
