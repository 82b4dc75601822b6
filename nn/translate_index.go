package nn

import (
	"github.com/apportion/apportion/nn/internal/ops"

	"fmt"

	G "gorgonia.org/gorgonia"

	"github.com/apportion/apportion/onnxlite"
)

// The translations of Where and of the variadic elementwise operators.

// variadic translates Sum, Mean, Max and Min of one or more inputs into a
// chain of broadcasting binary operations (Mean: the sum divided by the
// count).
func (b *builder) variadic(n *onnxlite.Node, out string) error {
	kind := map[string]string{"Sum": "Add", "Mean": "Add", "Max": "Max", "Min": "Min"}[n.OpType]
	var acc *G.Node
	count := 0
	for i := range n.Inputs {
		if !b.has(n, i) {
			continue
		}
		x, err := b.input(n, i)
		if err != nil {
			return err
		}
		count++
		if acc == nil {
			acc = x
			continue
		}
		if acc, err = ops.Binary(acc, x, kind); err != nil {
			return err
		}
	}
	if acc == nil {
		return fmt.Errorf("%s: expected at least one input", n.OpType)
	}
	if n.OpType == "Mean" && count > 1 {
		y, err := ops.Binary(acc, b.scalar(float64(count)), "Div")
		if err != nil {
			return err
		}
		acc = y
	}
	return b.set(out, acc)
}

func (b *builder) where(n *onnxlite.Node, out string) error {
	var in [3]*G.Node
	for i := range in {
		x, err := b.input(n, i)
		if err != nil {
			return err
		}
		in[i] = x
	}
	y, err := ops.Where(in[0], in[1], in[2])
	if err != nil {
		return err
	}
	return b.set(out, y)
}
