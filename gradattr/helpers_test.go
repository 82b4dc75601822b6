package gradattr

import (
	"math"
	"math/rand/v2"
)

// Section, equation and table numbers of the papers cited in these tests
// are from memory; the formulas written beside them are what is checked.

// Closed-form models used across the tests. Each Grad is the analytic
// derivative of its F; TestClosedFormGradients checks every one against
// central finite differences.

// linear is f(x) = w·x + b with one output; ∂f/∂x = w.
func linear(w []float64, b float64) *Func {
	return &Func{
		Shape: []int{len(w)}, Outputs: 1,
		F: func(out, x []float64) {
			s := b
			for i := range w {
				s += w[i] * x[i]
			}
			out[0] = s
		},
		Grad: func(g, _ []float64, _ int) { copy(g, w) },
	}
}

// product is f(x) = x₀x₁; ∂f/∂x = (x₁, x₀).
func product() *Func {
	return &Func{
		Shape: []int{2}, Outputs: 1,
		F:    func(out, x []float64) { out[0] = x[0] * x[1] },
		Grad: func(g, x []float64, _ int) { g[0], g[1] = x[1], x[0] },
	}
}

// cubic is f(x) = Σ x_i³; ∂f/∂x_i = 3x_i².
func cubic(n int) *Func {
	return &Func{
		Shape: []int{n}, Outputs: 1,
		F: func(out, x []float64) {
			s := 0.0
			for _, v := range x {
				s += v * v * v
			}
			out[0] = s
		},
		Grad: func(g, x []float64, _ int) {
			for i, v := range x {
				g[i] = 3 * v * v
			}
		},
	}
}

// tanhNet is softmax(W₂ tanh(W₁x + b₁) + b₂): in inputs, hid hidden units,
// out classes, weights drawn from a seeded PCG (they are parameters of the
// closed form, not check values). With p = softmax(z), h = tanh(a):
//
//	∂p_k/∂x = Σ_j p_k(δ_kj − p_j) Σ_u W₂[j,u] (1 − h_u²) W₁[u,·]
type tanhNet struct {
	in, hid, out   int
	w1, b1, w2, b2 []float64
}

func newTanhNet(in, hid, out int, seed uint64) *tanhNet {
	rng := rand.New(rand.NewPCG(seed, 7))
	n := &tanhNet{in: in, hid: hid, out: out,
		w1: make([]float64, hid*in), b1: make([]float64, hid),
		w2: make([]float64, out*hid), b2: make([]float64, out)}
	for _, s := range [][]float64{n.w1, n.b1, n.w2, n.b2} {
		for i := range s {
			s[i] = 1.5 * rng.NormFloat64()
		}
	}
	return n
}

func (n *tanhNet) forward(x, h, p []float64) {
	for u := 0; u < n.hid; u++ {
		a := n.b1[u]
		for i := 0; i < n.in; i++ {
			a += n.w1[u*n.in+i] * x[i]
		}
		h[u] = math.Tanh(a)
	}
	zmax := math.Inf(-1)
	for k := 0; k < n.out; k++ {
		z := n.b2[k]
		for u := 0; u < n.hid; u++ {
			z += n.w2[k*n.hid+u] * h[u]
		}
		p[k] = z
		zmax = math.Max(zmax, z)
	}
	sum := 0.0
	for k := range p {
		p[k] = math.Exp(p[k] - zmax)
		sum += p[k]
	}
	for k := range p {
		p[k] /= sum
	}
}

func (n *tanhNet) model() *Func {
	return &Func{
		Shape: []int{n.in}, Outputs: n.out,
		F: func(out, x []float64) {
			n.forward(x, make([]float64, n.hid), out)
		},
		Grad: func(g, x []float64, k int) {
			h, p := make([]float64, n.hid), make([]float64, n.out)
			n.forward(x, h, p)
			clear(g)
			for j := 0; j < n.out; j++ {
				dz := p[k] * (boolF(j == k) - p[j])
				for u := 0; u < n.hid; u++ {
					c := dz * n.w2[j*n.hid+u] * (1 - h[u]*h[u])
					for i := 0; i < n.in; i++ {
						g[i] += c * n.w1[u*n.in+i]
					}
				}
			}
		},
	}
}

func boolF(b bool) float64 {
	if b {
		return 1
	}
	return 0
}

// centralDiff is the central finite difference (f(x+h e_i) − f(x−h e_i))/2h
// of output k, error O(h²) (common practice).
func centralDiff(f *Func, x []float64, k int, h float64) []float64 {
	g := make([]float64, len(x))
	out := make([]float64, f.Outputs)
	xp := append([]float64(nil), x...)
	for i := range x {
		xp[i] = x[i] + h
		f.F(out, xp)
		hi := out[k]
		xp[i] = x[i] - h
		f.F(out, xp)
		lo := out[k]
		xp[i] = x[i]
		g[i] = (hi - lo) / (2 * h)
	}
	return g
}

// eval returns f(x)[k].
func eval(f *Func, x []float64, k int) float64 {
	out := make([]float64, f.Outputs)
	f.F(out, x)
	return out[k]
}

// shapley returns the exact Shapley values (Shapley 1953) of the game
// v(S) = f(x_S, x′_rest) by enumerating every coalition:
//
//	φ_i = Σ_{S ⊆ N∖{i}} |S|!(n−|S|−1)!/n! · (v(S ∪ {i}) − v(S))
func shapley(f *Func, x, base []float64, k int) []float64 {
	n := len(x)
	v := func(mask int) float64 {
		p := make([]float64, n)
		for i := range p {
			if mask&(1<<i) != 0 {
				p[i] = x[i]
			} else {
				p[i] = base[i]
			}
		}
		return eval(f, p, k)
	}
	fact := func(m int) float64 {
		r := 1.0
		for j := 2; j <= m; j++ {
			r *= float64(j)
		}
		return r
	}
	phi := make([]float64, n)
	for i := 0; i < n; i++ {
		for mask := 0; mask < 1<<n; mask++ {
			if mask&(1<<i) != 0 {
				continue
			}
			s := 0
			for j := 0; j < n; j++ {
				if mask&(1<<j) != 0 {
					s++
				}
			}
			wt := fact(s) * fact(n-s-1) / fact(n)
			phi[i] += wt * (v(mask|1<<i) - v(mask))
		}
	}
	return phi
}

var allRules = []Rule{RuleTrapezoid, RuleLeft, RuleRight, RuleMidpoint, RuleGaussLegendre}
