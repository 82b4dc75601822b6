package onnxlite

import (
	"errors"
	"sort"
)

// The default-domain operator set versions the shape rules cover. Models that
// import an older default opset (1–6, as the early PyTorch exporters wrote)
// are read with the semantics of their version where the rules differ, e.g.
// the legacy broadcast attribute of the elementwise operators.
const (
	MinOpset = 1
	MaxOpset = 17
)

// opKind says how an operator is supported.
type opKind uint8

const (
	runtimeOp  opKind = iota + 1 // compiled by nn
	foldOnlyOp                   // only when all its inputs are constant
)

// supportedOps are the default-domain operators apportion handles.
var supportedOps = map[string]opKind{
	"Gemm": runtimeOp, "MatMul": runtimeOp,
	"Add": runtimeOp, "Sub": runtimeOp, "Mul": runtimeOp, "Div": runtimeOp,
	"Neg": runtimeOp, "Abs": runtimeOp, "Sqrt": runtimeOp, "Exp": runtimeOp,
	"Log": runtimeOp, "Pow": runtimeOp,
	"Relu": runtimeOp, "LeakyRelu": runtimeOp, "PRelu": runtimeOp, "Elu": runtimeOp,
	"Selu": runtimeOp, "Celu": runtimeOp, "Sigmoid": runtimeOp, "HardSigmoid": runtimeOp,
	"HardSwish": runtimeOp, "Tanh": runtimeOp, "Softplus": runtimeOp, "Softsign": runtimeOp,
	"Erf": runtimeOp, "Clip": runtimeOp, "Softmax": runtimeOp, "LogSoftmax": runtimeOp,
	"Conv": runtimeOp, "MaxPool": runtimeOp, "AveragePool": runtimeOp,
	"GlobalAveragePool": runtimeOp, "GlobalMaxPool": runtimeOp,
	"BatchNormalization": runtimeOp,
	"Flatten":            runtimeOp, "Reshape": runtimeOp, "Transpose": runtimeOp,
	"Squeeze": runtimeOp, "Unsqueeze": runtimeOp, "Concat": runtimeOp, "Pad": runtimeOp,
	"ReduceMean": runtimeOp, "ReduceSum": runtimeOp,
	"Identity": runtimeOp, "Dropout": runtimeOp, "Constant": runtimeOp, "Cast": runtimeOp,
	"Shape": foldOnlyOp, "Gather": foldOnlyOp, "Slice": foldOnlyOp,
	"ConstantOfShape": foldOnlyOp, "Range": foldOnlyOp,
}

// SupportedOps returns the names of the supported default-domain operators,
// sorted. It includes the fold-only operators (see FoldOnly).
func SupportedOps() []string {
	out := make([]string, 0, len(supportedOps))
	for op := range supportedOps {
		out = append(out, op)
	}
	sort.Strings(out)
	return out
}

// IsSupported reports whether op of domain is supported. Only the default
// domain ("" or "ai.onnx") has supported operators.
func IsSupported(domain, op string) bool {
	if !isDefaultDomain(domain) {
		return false
	}
	_, ok := supportedOps[op]
	return ok
}

// FoldOnly reports whether the default-domain operator op is supported only
// when constant folding removes it: Shape, Gather, Slice, ConstantOfShape and
// Range. Infer refuses such a node when one of its inputs is a run-time value
// (Shape excepted: it folds to the inferred shape of any value), with an
// error wrapping ErrFoldOnly.
func FoldOnly(op string) bool {
	return supportedOps[op] == foldOnlyOp
}

// ErrFoldOnly is wrapped when Infer meets a fold-only operator (see FoldOnly)
// with a run-time input, which no constant folding can remove. The error
// wraps ErrUnsupported too, so errors.Is(err, ErrFoldOnly) picks out this
// case and errors.Is(err, ErrUnsupported) still holds for it.
var ErrFoldOnly = errors.New("fold-only operator on run-time data")

func isDefaultDomain(domain string) bool {
	return domain == "" || domain == "ai.onnx"
}
