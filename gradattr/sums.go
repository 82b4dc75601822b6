package gradattr

import (
	"context"
	"fmt"
)

// GradientSummer is a Model that returns weighted sums of input gradients
// without the gradients themselves, which lets it form them more cheaply:
// nn's Head pulls the sum back through the affine layers the input meets
// first once, instead of once per point. Integrated gradients by a fixed
// or uniformly refined quadrature rule and SmoothGrad's mean use it when
// the model offers it; the sums then round as the model forms them, not
// point by point. (The adaptive trapezoid rule needs each point's
// gradient to choose where to refine.)
type GradientSummer interface {
	// GradientSum returns the outputs of the n samples in x (n·OutputSize
	// values) and Σ_i weight[i]·∂out[i, target]/∂x[i].
	GradientSum(ctx context.Context, x []float64, n int, weight []float64, target int) (out, sum []float64, err error)
	// PathGradientSum is GradientSum at the points
	// from + alpha[i]·(to − from), i < len(alpha).
	PathGradientSum(ctx context.Context, from, to, alpha, weight []float64, target int) (out, sum []float64, err error)
}

// PathGroupSummer is a GradientSummer that also forms several weighted
// sums along one path in one call: the trapezoid rule keeps its end nodes'
// gradients apart from the others', and one pass of the model serves both.
type PathGroupSummer interface {
	GradientSummer
	// PathGradientSums is PathGradientSum with point i in group[i]: it
	// returns the outputs of every point and, for each g < groups, the
	// weighted sum of group g's input gradients, with the bits
	// PathGradientSum gives for that group's points alone.
	PathGradientSums(ctx context.Context, from, to, alpha, weight []float64, group []int, groups, target int) (out []float64, sums [][]float64, err error)
}

// sumChunk is the most points a method sends to a GradientSummer in one
// call: a fixed count, not the batch size, so that results do not depend
// on the batch size.
const sumChunk = 4096

// summer returns the model as a GradientSummer, or nil.
func (e *engine) summer() GradientSummer {
	s, _ := e.m.(GradientSummer)
	return s
}

// pathSum adds to dst the weighted sum of the target's input gradients at
// the points from + alpha[i]·(x − from).
func (e *engine) pathSum(s GradientSummer, from, alpha, weight, dst []float64) error {
	return e.sumChunks("PathGradientSum", len(alpha), [][]float64{dst}, func(lo, hi int) ([]float64, [][]float64, error) {
		out, sum, err := s.PathGradientSum(e.ctx, from, e.x, alpha[lo:hi], weight[lo:hi], e.target)
		return out, [][]float64{sum}, err
	})
}

// pathSums adds to dst[g] the weighted sum of the target's input
// gradients at the points from + alpha[i]·(x − from) of group g (group[i]).
// Its callers keep to one call (at most sumChunk points), so that each sum
// has the bits of pathSum on its group.
func (e *engine) pathSums(s PathGroupSummer, from, alpha, weight []float64, group []int, dst [][]float64) error {
	return e.sumChunks("PathGradientSums", len(alpha), dst, func(lo, hi int) ([]float64, [][]float64, error) {
		return s.PathGradientSums(e.ctx, from, e.x, alpha[lo:hi], weight[lo:hi], group[lo:hi], len(dst), e.target)
	})
}

// pointSum adds to dst the weighted sum of the target's input gradients at
// n points, fill(i, p) writing point i.
func (e *engine) pointSum(s GradientSummer, n int, fill func(i int, dst []float64), weight, dst []float64) error {
	buf := make([]float64, min(n, sumChunk)*e.size)
	return e.sumChunks("GradientSum", n, [][]float64{dst}, func(lo, hi int) ([]float64, [][]float64, error) {
		x := buf[:(hi-lo)*e.size]
		for i := lo; i < hi; i++ {
			fill(i, x[(i-lo)*e.size:(i-lo+1)*e.size])
		}
		out, sum, err := s.GradientSum(e.ctx, x, hi-lo, weight[lo:hi], e.target)
		return out, [][]float64{sum}, err
	})
}

// sumChunks makes the sum calls of n points, at most sumChunk a call,
// adds each call's sums to dst (one per group) and counts n gradient
// evaluations.
func (e *engine) sumChunks(what string, n int, dst [][]float64, sum func(lo, hi int) (out []float64, sums [][]float64, err error)) error {
	for lo := 0; lo < n; lo += sumChunk {
		hi := min(lo+sumChunk, n)
		var out []float64
		var sums [][]float64
		err := e.call(what, func() (err error) {
			out, sums, err = sum(lo, hi)
			return err
		})
		if err != nil {
			return err
		}
		e.cost.GradientEvals += hi - lo
		if err := checkReturned(what+" outputs", out, e.nout, hi-lo); err != nil {
			return err
		}
		if len(sums) != len(dst) {
			return fmt.Errorf("%s returned %d sums, expected %d", what, len(sums), len(dst))
		}
		for g, s := range sums {
			if err := checkReturned(what, s, e.size, 1); err != nil {
				return err
			}
			for i, v := range s {
				dst[g][i] += v
			}
		}
	}
	return nil
}
