package onnxlite

import (
	"fmt"
	"math"
	"math/bits"
)

// Limits bounds the resources a decode may use, so that a hostile or broken
// file is refused before it can make the process allocate without bound.
// Beyond tensor payloads, which these limits bound directly, the IR of a
// model takes at most a small multiple of MaxModelBytes.
// The zero value of each field means the matching DefaultLimits value.
type Limits struct {
	// MaxModelBytes bounds the size of the serialized model or tensor read
	// from the reader.
	MaxModelBytes int64
	// MaxTensorElements bounds the element count of one tensor (the product
	// of its dims), checked before any slice is allocated from the dims, and
	// the length of an INTS or FLOATS attribute.
	MaxTensorElements int64
	// MaxInitializerBytes bounds the total in-memory size of all tensor
	// payloads of a model: initializers, tensor-valued attributes and
	// external data together.
	MaxInitializerBytes int64
	// MaxNodes bounds the number of nodes of the graph.
	MaxNodes int
	// MaxRank bounds the rank of every tensor and of every declared shape.
	MaxRank int
}

// DefaultLimits are the limits used for zero-valued Limits fields: 1 GiB of
// model bytes, 1<<28 elements per tensor (1 GiB of float32), 2 GiB of tensor
// payload in total, 100000 nodes and rank 8. They are far above what the small
// dense and convolutional networks apportion explains need, and far below what
// a 24 GiB machine can survive.
var DefaultLimits = Limits{
	MaxModelBytes:       1 << 30,
	MaxTensorElements:   1 << 28,
	MaxInitializerBytes: 2 << 30,
	MaxNodes:            100000,
	MaxRank:             8,
}

// withDefaults returns l with every zero or negative field replaced by its default.
func (l Limits) withDefaults() Limits {
	if l.MaxModelBytes <= 0 {
		l.MaxModelBytes = DefaultLimits.MaxModelBytes
	}
	if l.MaxTensorElements <= 0 {
		l.MaxTensorElements = DefaultLimits.MaxTensorElements
	}
	if l.MaxInitializerBytes <= 0 {
		l.MaxInitializerBytes = DefaultLimits.MaxInitializerBytes
	}
	if l.MaxNodes <= 0 {
		l.MaxNodes = DefaultLimits.MaxNodes
	}
	if l.MaxRank <= 0 {
		l.MaxRank = DefaultLimits.MaxRank
	}
	return l
}

// LimitError reports that a decode hit one of its Limits. Limit is the name
// of the Limits field, Value what the input asked for (saturated at
// math.MaxInt64 when the true value overflows int64; for MaxModelBytes the
// Max+1 bytes read before the decoder stopped reading) and Max the limit in
// force.
type LimitError struct {
	Limit string
	Value int64
	Max   int64
}

// Error names the limit and both numbers.
func (e *LimitError) Error() string {
	if e.Limit == "MaxModelBytes" {
		return fmt.Sprintf("limit %s exceeded: input has more than %d bytes (read %d before stopping)", e.Limit, e.Max, e.Value)
	}
	if e.Value == math.MaxInt64 {
		return fmt.Sprintf("limit %s exceeded: input needs more than %d (overflows int64), max %d", e.Limit, e.Value, e.Max)
	}
	return fmt.Sprintf("limit %s exceeded: input needs %d, max %d", e.Limit, e.Value, e.Max)
}

// Is reports whether target is ErrLimit, so errors.Is(err, ErrLimit) holds
// for every *LimitError.
func (e *LimitError) Is(target error) bool { return target == ErrLimit }

// elementCount returns the product of dims. It refuses negative dims with
// ErrMalformed and counts larger than max with a *LimitError, checking for
// overflow at every step before anything is allocated.
func elementCount(dims []int64, limit int64) (int64, error) {
	for i, d := range dims {
		if d < 0 {
			return 0, fmt.Errorf("dims[%d] = %d: negative dimension: %w", i, d, ErrMalformed)
		}
		if d == 0 {
			return 0, nil
		}
	}
	n := uint64(1)
	for _, d := range dims {
		hi, lo := bits.Mul64(n, uint64(d))
		if hi != 0 || lo > math.MaxInt64 {
			return 0, &LimitError{Limit: "MaxTensorElements", Value: math.MaxInt64, Max: limit}
		}
		n = lo
	}
	if int64(n) > limit {
		return 0, &LimitError{Limit: "MaxTensorElements", Value: int64(n), Max: limit}
	}
	return int64(n), nil
}
