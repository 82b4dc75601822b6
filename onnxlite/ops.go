package onnxlite

import (
	"errors"
	"sort"
)

// The default-domain operator set versions the shape rules cover: every
// revision of each supported operator up to MaxOpset (26, the newest ONNX
// Runtime 1.30 accepts), with its semantics where a revision changed them
// (Reduce* with axes as an input from 18, Pad's axes from 18 and wrap from
// 19, Split's num_outputs from 18, AveragePool's dilations from 19, …).
// Models that import an older default opset (1–6, as the early PyTorch
// exporters wrote) are read with the semantics of their version where the
// rules differ, e.g. the legacy broadcast attribute of the elementwise
// operators. A newer opset is refused with ErrUnsupported.
const (
	MinOpset = 1
	MaxOpset = 26
)

// onnxlite supports an operator when Infer can handle its nodes: it has a
// shape rule for it (shapes.go), or evaluates it (Constant), or folds it away
// (the fold-only operators below). Which of these operators a program can
// compute at run time is not onnxlite's to say: nn.Unsupported lists the
// nodes nn cannot run.

// foldOnlyOps are the operators Infer supports only when constant folding
// removes them.
var foldOnlyOps = map[string]bool{
	"Shape": true, "ConstantOfShape": true, "Range": true,
}

// SupportedOps returns the names of the supported default-domain operators,
// sorted. It includes the fold-only operators (see FoldOnly).
func SupportedOps() []string {
	out := []string{"Constant"}
	for op := range shapeRules {
		out = append(out, op)
	}
	for op := range foldOnlyOps {
		out = append(out, op)
	}
	sort.Strings(out)
	return out
}

// IsSupported reports whether op of domain is supported: whether Infer
// handles its nodes. Only the default domain ("" or "ai.onnx") has supported
// operators.
func IsSupported(domain, op string) bool {
	if !isDefaultDomain(domain) {
		return false
	}
	_, rule := shapeRules[op]
	return rule || op == "Constant" || foldOnlyOps[op]
}

// FoldOnly reports whether the default-domain operator op is supported only
// when constant folding removes it: Shape, ConstantOfShape and Range. Infer
// refuses such a node when one of its inputs is a run-time value (Shape
// excepted: it folds to the inferred shape of any value), with an error
// wrapping ErrFoldOnly.
func FoldOnly(op string) bool {
	return foldOnlyOps[op]
}

// ErrFoldOnly is wrapped when Infer meets a fold-only operator (see FoldOnly)
// with a run-time input, which no constant folding can remove. The error
// wraps ErrUnsupported too, so errors.Is(err, ErrFoldOnly) picks out this
// case and errors.Is(err, ErrUnsupported) still holds for it.
var ErrFoldOnly = errors.New("fold-only operator on run-time data")

func isDefaultDomain(domain string) bool {
	return domain == "" || domain == "ai.onnx"
}
