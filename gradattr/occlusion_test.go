package gradattr

import (
	"context"
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// imageFunc is a smooth nonlinear model of a (c, h, w) image with two
// outputs: tanh of a seeded weighted sum, and the sum of squares.
func imageFunc(c, h, w int, seed uint64) *Func {
	rng := rand.New(rand.NewPCG(seed, 1))
	wt := make([]float64, c*h*w)
	for i := range wt {
		wt[i] = rng.NormFloat64()
	}
	return &Func{
		Shape: []int{c, h, w}, Outputs: 2,
		F: func(out, x []float64) {
			s, q := 0.0, 0.0
			for i, v := range x {
				s += wt[i] * v
				q += v * v
			}
			out[0], out[1] = math.Tanh(s/4), q
		},
	}
}

// occlusionLoop is occlusion from its definition (Zeiler & Fergus 2014,
// §4.2, with the averaging over covering windows this package documents),
// one model call per occluded image, no batching.
func occlusionLoop(f *Func, x []float64, bases [][]float64, k, wh, ww, stride int) []float64 {
	c, h, w := f.Shape[0], f.Shape[1], f.Shape[2]
	fx := eval(f, x, k)
	sum := make([]float64, len(x))
	count := make([]float64, len(x))
	for y0 := 0; y0+wh <= h; y0 += stride {
		for x0 := 0; x0+ww <= w; x0 += stride {
			occluded := 0.0
			for _, b := range bases {
				p := slices.Clone(x)
				for ch := 0; ch < c; ch++ {
					for y := y0; y < y0+wh; y++ {
						for xx := x0; xx < x0+ww; xx++ {
							i := ch*h*w + y*w + xx
							p[i] = b[i]
						}
					}
				}
				occluded += eval(f, p, k)
			}
			drop := fx - occluded/float64(len(bases))
			for ch := 0; ch < c; ch++ {
				for y := y0; y < y0+wh; y++ {
					for xx := x0; xx < x0+ww; xx++ {
						i := ch*h*w + y*w + xx
						sum[i] += drop
						count[i]++
					}
				}
			}
		}
	}
	for i := range sum {
		if count[i] > 0 {
			sum[i] /= count[i]
		}
	}
	return sum
}

func TestOcclusionImageAgainstLoop(t *testing.T) {
	f := imageFunc(2, 7, 9, 3)
	rng := rand.New(rand.NewPCG(4, 4))
	x := make([]float64, 2*7*9)
	b1, b2 := make([]float64, len(x)), make([]float64, len(x))
	for i := range x {
		x[i], b1[i], b2[i] = rng.NormFloat64(), rng.Float64(), -rng.Float64()
	}
	for _, c := range []struct{ wh, ww, stride int }{{3, 2, 2}, {4, 4, 3}, {1, 1, 1}, {7, 9, 1}, {2, 5, 4}} {
		bases := [][]float64{b1, b2}
		r, err := Occlusion(context.Background(), f, x, 0, OcclusionOptions{Window: [2]int{c.wh, c.ww}, Stride: c.stride,
			Baselines: []Baseline{{Kind: BaselineValues, Values: b1}, {Kind: BaselineValues, Values: b2}}, BatchSize: 5})
		require.NoError(t, err)
		want := occlusionLoop(f, x, bases, 0, c.wh, c.ww, c.stride)
		assert.InDeltaSlice(t, want, r.Attributions, 1e-12, "%+v", c)
		assert.False(t, r.Completeness.Judged)
		assert.Equal(t, []int{c.wh, c.ww}, r.Settings.Window)
		windows := ((7-c.wh)/c.stride + 1) * ((9-c.ww)/c.stride + 1)
		assert.Equal(t, 1+2+2*windows, r.Cost.ForwardPasses)
		est, err := Options{Method: MethodOcclusion, Window: [2]int{c.wh, c.ww}, Stride: c.stride,
			Baselines: []Baseline{{}, {}}}.Estimate(f.Shape)
		require.NoError(t, err)
		assert.Equal(t, r.Cost.ForwardPasses, est.ForwardPasses)
	}
	// Elements no window covers get 0: a 4×4 window by 4 leaves the last
	// three rows and the last column of a 7×9 image.
	r, err := Occlusion(context.Background(), f, x, 1, OcclusionOptions{Window: [2]int{4, 4}, Stride: 4})
	require.NoError(t, err)
	for ch := 0; ch < 2; ch++ {
		for y := 0; y < 7; y++ {
			for xx := 0; xx < 9; xx++ {
				if y >= 4 || xx >= 8 {
					assert.Equal(t, 0.0, r.Attributions[ch*63+y*9+xx])
				}
			}
		}
	}
	// The defaults: a 4×4 window by 2.
	r, err = Occlusion(context.Background(), f, x, 1, OcclusionOptions{})
	require.NoError(t, err)
	assert.InDeltaSlice(t, occlusionLoop(f, x, [][]float64{make([]float64, len(x))}, 1, 4, 4, 2), r.Attributions, 1e-12)

	_, err = Occlusion(context.Background(), f, x, 0, OcclusionOptions{Window: [2]int{8, 2}})
	assert.ErrorIs(t, err, ErrOptions)
	assert.ErrorContains(t, err, "window 8×2 does not fit the sample's 7×9 pixels")
	_, err = Occlusion(context.Background(), f, x, 0, OcclusionOptions{Window: [2]int{2, 2}, Stride: -1})
	assert.ErrorIs(t, err, ErrOptions)
}

func TestOcclusionFeaturesAndGroups(t *testing.T) {
	// A sample of one axis: each feature is occluded on its own, its drop
	// f(x) − f(x with x_i = x′_i) (Zeiler & Fergus 2014 applied feature by
	// feature); for f = x₀x₁ + x₂ against 0 the drops are x₀x₁, x₀x₁ and
	// x₂. With groups, each group is occluded whole and its features take
	// its drop.
	f := &Func{Shape: []int{3}, Outputs: 1, F: func(out, x []float64) { out[0] = x[0]*x[1] + x[2] }}
	x := []float64{2, 3, -1}
	r, err := Occlusion(context.Background(), f, x, 0, OcclusionOptions{})
	require.NoError(t, err)
	assert.Equal(t, []float64{6, 6, -1}, r.Attributions)
	assert.Nil(t, r.Groups)
	g, err := Occlusion(context.Background(), f, x, 0, OcclusionOptions{Groups: []Group{{Name: "ab", Indices: []int{0, 1}}, {Name: "c", Indices: []int{2}}}})
	require.NoError(t, err)
	assert.Equal(t, []float64{6, 6, -1}, g.Attributions)
	assert.Equal(t, []float64{6, -1}, g.Groups.Attributions)
	assert.Equal(t, 1+1+2, g.Cost.ForwardPasses)
}
