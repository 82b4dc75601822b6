package nn

import (
	"slices"

	G "gorgonia.org/gorgonia"

	"github.com/apportion/apportion/onnxlite"
)

// A Conv or Gemm whose output only a Relu reads is translated, with that
// Relu, into one op that applies max(v, 0) to its final value (after the
// bias) before it returns, and whose gradient masks ∂L/∂y with its own
// output (y > 0 ⇔ v > 0) before the usual backward. The values are
// those of the two ops run one after the other, bit for bit: the same bias
// add, then the same max(v, 0) (Go's max: NaN stays NaN, −0 becomes +0).

// fuseReluOff turns the fusion off for graphs built while it is set; the
// tests set it to build the unfused graph they compare with.
var fuseReluOff bool

// fusedRelu returns the Relu node that alone reads the first output of n,
// or nil when that output has other readers, is a graph output or a value
// the program returns, or fusion is off. Readers are counted over every node left after folding, so a
// reader that a request does not need still blocks the fusion.
func (b *builder) fusedRelu(n *onnxlite.Node) *onnxlite.Node {
	if fuseReluOff || len(n.Outputs) == 0 || n.Outputs[0] == "" {
		return nil
	}
	out := n.Outputs[0]
	if slices.Contains(b.st.Outputs, out) || slices.Contains(b.requested, out) {
		return nil
	}
	var relu *onnxlite.Node
	for _, m := range b.st.Nodes {
		for _, in := range m.Inputs {
			if in != out {
				continue
			}
			if relu != nil || m.OpType != "Relu" || !defaultDomain(m.Domain) || len(m.Outputs) == 0 || m.Outputs[0] == "" {
				return nil
			}
			relu = m
		}
	}
	return relu
}

// setFused makes y the value of relu's output and marks relu as translated.
func (b *builder) setFused(relu *onnxlite.Node, y *G.Node) error {
	if b.fused == nil {
		b.fused = map[*onnxlite.Node]bool{}
	}
	b.fused[relu] = true
	return b.set(relu.Outputs[0], y)
}
