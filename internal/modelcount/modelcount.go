// Package modelcount counts the samples sent through a gradattr.Model, for
// tests only: the count that bounds of work are checked against.
package modelcount

import (
	"context"
	"sync/atomic"

	"github.com/apportion/apportion/gradattr"
)

// Model passes calls on to the model it wraps and counts their samples.
type Model struct {
	gradattr.Model
	n atomic.Int64
}

// Samples is the number of samples sent through Forward and Gradient.
func (c *Model) Samples() int { return int(c.n.Load()) }

// Forward counts n samples and evaluates them.
func (c *Model) Forward(ctx context.Context, x []float64, n int) ([]float64, error) {
	c.n.Add(int64(n))
	return c.Model.Forward(ctx, x, n)
}

// Gradient counts n samples and evaluates them and their gradients.
func (c *Model) Gradient(ctx context.Context, x []float64, n int, target []int) ([]float64, []float64, error) {
	c.n.Add(int64(n))
	return c.Model.Gradient(ctx, x, n, target)
}
