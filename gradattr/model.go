// Package gradattr apportions one output of a model among its input
// features, and checks the result. Gradient methods (gradient, gradient ×
// input, SmoothGrad, integrated gradients, expected gradients) need the
// model's gradients; Shapley values, a local surrogate and occlusion need
// only forward passes, sent to the model in large batches. Features can be
// grouped, by hand, on a grid or into SLIC superpixels. Integrated
// gradients, expected gradients and Shapley values carry a completeness
// report: the attributions must sum to f(x) − f(baseline).
package gradattr

import "context"

// Model is what the attribution methods need from a model; the methods
// that only run it forward never call Gradient. The nn package's networks
// implement it, and so does Func for closed-form functions. All slices are
// row-major float64; a batch of n samples is n consecutive samples.
type Model interface {
	// InputShape is the shape of one sample, without the batch dimension.
	InputShape() []int
	// OutputSize is the number of scalars the model outputs per sample.
	OutputSize() int
	// Forward evaluates n samples held in x (n·∏InputShape values) and
	// returns their n·OutputSize outputs.
	Forward(ctx context.Context, x []float64, n int) ([]float64, error)
	// Gradient evaluates n samples and returns their outputs (n·OutputSize)
	// and, for each sample i, the gradient of its output target[i] with
	// respect to its input (n·∏InputShape values), from one forward and one
	// backward pass.
	Gradient(ctx context.Context, x []float64, n int, target []int) (out, grad []float64, err error)
}
