package nn

import (
	"testing"
)

// TestGradcheckNewOperators checks the gradient of the operators and
// revisions added for opsets 18 to 26 and the exporters of today against
// central finite differences in float64, as TestGradcheckOperators does for
// the others.
func TestGradcheckNewOperators(t *testing.T) {
	cases := []opCase{
		{name: "Pad axes wrap", build: func(g *irGraph) {
			g.node("Pad", []string{"x", g.ints("pads", 2, 3), "", g.ints("axes", -1)}, "y", aString("mode", "wrap"))
		}, shape: []int64{2, 3}, lo: -1, hi: 1, opset: 19},
		{name: "ReduceMean axes input", build: func(g *irGraph) {
			a := g.node("ReduceMean", []string{"x", g.ints("a1", 2)}, "a")
			g.node("Mul", []string{a, "x"}, "y")
		}, shape: []int64{3, 4}, lo: -1, hi: 1, opset: 18},
	}
	checkOpCases(t, cases, 300)
}
