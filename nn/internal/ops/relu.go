package ops

import (
	"fmt"

	G "gorgonia.org/gorgonia"
)

// The Relu kernels: y = max(0, x) (Go's max: NaN stays NaN, -0 gives +0)
// and ∂L/∂x = ∂L/∂y where x > 0, 0 elsewhere, for float64; float32 runs
// f32.Relu and f32.ReluGrad, which compute the same.

// relu stores y[i] = max(0, x[i]) for i < len(x).
func relu[T float](y, x []T) {
	y = y[:len(x)]
	for i, xi := range x {
		y[i] = max(xi, 0)
	}
}

// reluDiff stores d[i] = g[i] where x[i] > 0 and 0 elsewhere.
func reluDiff[T float](d, x, g []T) {
	d, g = d[:len(x)], g[:len(x)]
	for i, xi := range x {
		if xi > 0 {
			d[i] = g[i]
		} else {
			d[i] = 0
		}
	}
}

// reluGrad returns the node ∂L/∂x = ∂L/∂y where y > 0, 0 elsewhere, for
// y = Relu(x): the backward of a Relu from its output alone, for ops that
// apply Relu to their own output (a fused epilogue) and differentiate it
// first in their SymDiff.
func reluGrad(y, dy *G.Node) (n *G.Node, err error) {
	dt, err := dtypeOf("Relu gradient", y)
	if err != nil {
		return nil, err
	}
	if !y.Shape().Eq(dy.Shape()) {
		return nil, fmt.Errorf("nn: Relu gradient: %w: output shape %v, gradient shape %v", ErrShape, y.Shape(), dy.Shape())
	}
	op := &unaryOp{kind: "Relu", dt: dt, shape: y.Shape().Clone(), t: y.Type()}
	return G.ApplyOp(&reluDiffOp{op}, y, dy)
}
