package gradattr

import "errors"

// Sentinel errors. Every error the package returns wraps one of them, so
// callers can tell a bad sample from a bad option or a failing model with
// errors.Is; the message says what was expected and what came.
var (
	// ErrInput reports a bad sample, reference set, baseline or target:
	// wrong length, a NaN or infinity, an index out of range.
	ErrInput = errors.New("gradattr: invalid input")
	// ErrOptions reports a bad option value: a negative count, an unknown
	// rule or variant, a request larger than the documented limits.
	ErrOptions = errors.New("gradattr: invalid options")
	// ErrModel reports a Model that failed, panicked, or returned slices of
	// the wrong length or non-finite values.
	ErrModel = errors.New("gradattr: model failed")
)

// Limits on one request. A request beyond them is refused with ErrOptions
// before any model evaluation, so a typo in a count cannot run for hours or
// exhaust memory.
const (
	// MaxBatchSize bounds the BatchSize field of every options struct.
	MaxBatchSize = 1 << 16
	// MaxPointsLimit bounds the number of integration points of
	// integrated gradients (fixed or automatic).
	MaxPointsLimit = 1 << 16
	// MaxSamplesLimit bounds the number of noisy copies of SmoothGrad and
	// the number of draws of expected gradients.
	MaxSamplesLimit = 1 << 20
	// MaxEvaluations bounds the gradient values one request asks for:
	// features × points (× baselines) for integrated gradients with a fixed
	// point count, features × copies for SmoothGrad, features × draws for
	// expected gradients (2^28 values, 2 GiB of float64 if they were all
	// kept at once; they are not, but the compute is as large).
	MaxEvaluations = 1 << 28
)
