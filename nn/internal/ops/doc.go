// Package ops implements the operators nn compiles ONNX graphs to: gorgonia
// ops (gorgonia's Op and SDOp) with exact symbolic gradients, and the
// float32 GEMM and direct-convolution drivers they run on (the kernels
// themselves are in nn/internal/asm/f32).
//
// The files group the operators by family: matmul.go (MatMul, Gemm),
// conv*.go and im2col.go (Conv), pool*.go (MaxPool, AveragePool and the
// global pools), pad.go, unary.go (elementwise functions, Clip, casts),
// binary.go (Add, Sub, Mul, Div, Pow, PRelu, Max, Min and the comparisons
// with broadcasting), reduce.go, softmax.go, clip.go (Clip with run-time
// bounds), norm.go (the standardisation of the normalization operators),
// where.go, gather.go (Gather with run-time indices), indexmap.go (Slice,
// Expand, constant-index Gather: maps that move and repeat elements) with
// resample.go (Resize) and loss.go (the selection that a gradient program
// differentiates); gemm*.go hold the packed float32 GEMM.
//
// Buffers: every op implements gorgonia's UsePreallocDoer with one
// contract. Given a *tensor.Dense of the output's element type and shape
// that it may write into (writable decides), the op writes its whole output
// there and returns it; otherwise it allocates as Do does. It never
// returns, keeps or writes one of its inputs, except that an elementwise op
// may write over an operand of the output's shape that it reads element by
// element before writing the same element (InPlace names it). Scratch that
// an op keeps on its instance (packed weights, im2col panels, geometry) is
// safe because each compiled machine builds its own graph and runs one pass
// at a time.
package ops

import "errors"

// float is the element type of every kernel: ONNX float and double.
type float interface{ ~float32 | ~float64 }

// ErrShape is wrapped by the errors of operators whose operands do not fit
// their attributes or each other (shapes, ranks, element types of the
// spatial ops). nn exports it as nn.ErrShape.
var ErrShape = errors.New("shape mismatch")

var (
	// errTooLarge is wrapped when a convolution, pooling or padding
	// request would allocate more than maxElems elements.
	errTooLarge = errors.New("result too large")
	// errSecondOrder is wrapped when a gradient of an op is
	// differentiated again: nn takes first derivatives only.
	errSecondOrder = errors.New("second derivatives are not supported")
	// errUnknownOp is wrapped when an elementwise op is asked for by a
	// name it does not implement.
	errUnknownOp = errors.New("unknown elementwise op")
	// errDtype is wrapped when an elementwise operand is neither float32
	// nor float64.
	errDtype = errors.New("unsupported element type")
)

// maxElems bounds the number of elements of any tensor or scratch buffer
// the spatial kernels allocate (2^31 elements: 8 GiB of float32). Requests
// above it are refused with errTooLarge instead of exhausting memory.
const maxElems = 1 << 31

// ConstPrefix starts the name of every node that holds a model constant
// (an initializer or a folded value): the nodes fixed treats as constant.
const ConstPrefix = "nn-const:"
