package onnxlite

import (
	"errors"
	"fmt"
)

// Sentinel errors of the codec. Every error returned by Decode, DecodeTensor,
// Encode and EncodeTensor that stems from one of these conditions wraps the
// matching sentinel, so callers can test it with errors.Is.
var (
	// ErrMalformed marks bytes that are not a well-formed protobuf encoding
	// of the expected message: a truncated varint, a length that runs past
	// the end, a known field with the wrong wire type, or tensor data whose
	// element count disagrees with its dims.
	ErrMalformed = errors.New("malformed ONNX protobuf")

	// ErrSubgraph marks a node with a graph-valued attribute (GRAPH or
	// GRAPHS: If, Loop, Scan and friends). onnxlite keeps flat graphs only.
	ErrSubgraph = errors.New("graph-valued attributes (subgraphs) are not supported")

	// ErrUnsupportedEncoding marks valid ONNX that onnxlite does not
	// represent: sparse tensors, type-valued attributes, segmented tensors,
	// unknown element types.
	ErrUnsupportedEncoding = errors.New("unsupported ONNX encoding")

	// ErrExternalData marks a tensor whose external data cannot be loaded
	// safely: no base directory, a path that leaves the model's directory,
	// or an offset or length that does not fit the file.
	ErrExternalData = errors.New("external tensor data refused")

	// ErrLimit is matched by every *LimitError.
	ErrLimit = errors.New("decode limit exceeded")
)

// recoverTo turns a panic into the error *err, wrapping kind when it is
// not nil (the input was malformed or invalid). onnxlite is written not to
// panic on any input; this is the last line of defence, and the package's
// one recovery boundary: Decode, DecodeTensor, Encode, EncodeTensor and
// Infer defer it.
func recoverTo(err *error, what string, kind error) {
	r := recover()
	switch {
	case r == nil:
	case kind == nil:
		*err = fmt.Errorf("onnxlite: %s: internal error: %v", what, r)
	default:
		*err = fmt.Errorf("onnxlite: %s: internal error: %v: %w", what, r, kind)
	}
}
