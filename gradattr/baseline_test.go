package gradattr

import (
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestBaselines(t *testing.T) {
	shape := []int{4}
	x := []float64{1, 2, 3, 4}
	b, err := Baseline{}.Build(x, shape)
	require.NoError(t, err)
	assert.Equal(t, []float64{0, 0, 0, 0}, b)
	b, err = Baseline{Kind: BaselineConstant, Value: 0.5}.Build(x, shape)
	require.NoError(t, err)
	assert.Equal(t, []float64{0.5, 0.5, 0.5, 0.5}, b)

	// Mean and median of the reference rows k·(1, 2, 3, 4) + c_i for
	// k = 1..5 in shuffled order: closed forms 3·(1, 2, 3, 4) + c_i for
	// both (the middle of 1..5 is 3, the mean of 1..5 is 3); with k = 1..4
	// the median is the mean of the two middle values, 2.5.
	c := []float64{0.25, -1, 0, 2}
	row := func(k float64) []float64 {
		r := make([]float64, 4)
		for i := range r {
			r[i] = k*float64(i+1) + c[i]
		}
		return r
	}
	ref := [][]float64{row(4), row(1), row(5), row(3), row(2)}
	for _, kind := range []BaselineKind{BaselineMean, BaselineMedian} {
		b, err = Baseline{Kind: kind, Reference: ref}.Build(x, shape)
		require.NoError(t, err)
		assert.InDeltaSlice(t, row(3), b, 1e-15, string(kind))
	}
	b, err = Baseline{Kind: BaselineMedian, Reference: ref[:4]}.Build(x, shape) // k = 4, 1, 5, 3
	require.NoError(t, err)
	assert.InDeltaSlice(t, row(3.5), b, 1e-15)
	assert.Equal(t, row(4), ref[0], "Build must not reorder the reference set")

	// Uniform: within [lo, hi), same seed same bits, mean (lo+hi)/2 within
	// 5 standard errors (hi−lo)/√(12n) (moments of the uniform distribution).
	n := 20000
	big := make([]float64, n)
	u1, err := Baseline{Kind: BaselineUniform, Lo: -2, Hi: 3, Seed: 4}.Build(big, []int{n})
	require.NoError(t, err)
	u2, err := Baseline{Kind: BaselineUniform, Lo: -2, Hi: 3, Seed: 4}.Build(big, []int{n})
	require.NoError(t, err)
	assert.Equal(t, bits(u1), bits(u2))
	mean := 0.0
	for _, v := range u1 {
		assert.GreaterOrEqual(t, v, -2.0)
		assert.Less(t, v, 3.0)
		mean += v / float64(n)
	}
	assert.InDelta(t, 0.5, mean, 5*5/math.Sqrt(12*float64(n)))
	u3, err := Baseline{Kind: BaselineUniform, Lo: -2, Hi: 3, Seed: 5}.Build(big, []int{n})
	require.NoError(t, err)
	assert.NotEqual(t, bits(u1), bits(u3))

	b, err = Baseline{Kind: BaselineValues, Values: []float64{9, 8, 7, 6}}.Build(x, shape)
	require.NoError(t, err)
	assert.Equal(t, []float64{9, 8, 7, 6}, b)

	for _, bad := range []Baseline{
		{Kind: BaselineMean},
		{Kind: BaselineMedian, Reference: [][]float64{{1, 2}}},
		{Kind: BaselineMean, Reference: [][]float64{{1, 2, math.NaN(), 4}}},
		{Kind: BaselineValues, Values: []float64{1, 2, 3}},
		{Kind: BaselineBlur, Sigma: 1},
	} {
		_, err := bad.Build(x, shape)
		assert.ErrorIs(t, err, ErrInput, "%+v", bad)
	}
	for _, bad := range []Baseline{
		{Kind: BaselineUniform, Lo: 1, Hi: 1},
		{Kind: BaselineConstant, Value: math.Inf(-1)},
		{Kind: "noise"},
	} {
		_, err := bad.Build(x, shape)
		assert.ErrorIs(t, err, ErrOptions, "%+v", bad)
	}
}

func TestBlur(t *testing.T) {
	// Closed forms of a separable, normalised, symmetric kernel k:
	//  - an impulse far from the edges becomes the outer product k ⊗ k;
	//  - a constant image stays constant (Σk = 1; half-sample reflection
	//    keeps it constant at the edges);
	//  - a linear ramp stays the same away from the edges (Σ j k_j = 0).
	const sigma = 1.3
	r := int(math.Ceil(3 * sigma))
	k := make([]float64, 2*r+1)
	s := 0.0
	for j := -r; j <= r; j++ {
		k[j+r] = math.Exp(-float64(j*j) / (2 * sigma * sigma))
		s += k[j+r]
	}
	for j := range k {
		k[j] /= s
	}
	h, w := 15, 13
	shape := []int{2, h, w}
	img := make([]float64, 2*h*w)
	img[h*w+7*w+6] = 1 // impulse in plane 1 at (7, 6)
	out, err := Blur(img, shape, sigma)
	require.NoError(t, err)
	for y := 0; y < h; y++ {
		for x := 0; x < w; x++ {
			want := 0.0
			if dy, dx := y-7, x-6; abs(dy) <= r && abs(dx) <= r {
				want = k[dy+r] * k[dx+r]
			}
			assert.InDelta(t, want, out[h*w+y*w+x], 1e-16, "(%d,%d)", y, x)
			assert.Zero(t, out[y*w+x], "plane 0 untouched")
		}
	}
	for i := range img {
		img[i] = 0.7
	}
	out, err = Blur(img, shape, sigma)
	require.NoError(t, err)
	assert.InDeltaSlice(t, img, out, 1e-15)
	for y := 0; y < h; y++ {
		for x := 0; x < w; x++ {
			img[y*w+x] = 0.5*float64(x) - 0.25*float64(y)
		}
	}
	out, err = Blur(img, shape, sigma)
	require.NoError(t, err)
	for y := r; y < h-r; y++ {
		for x := r; x < w-r; x++ {
			assert.InDelta(t, img[y*w+x], out[y*w+x], 1e-14)
		}
	}
	// Half-sample reflection at the edge, 1 × 3 image (a b c) with the
	// three-tap kernel of σ = 0.3 (r = 1): the left pixel sees (a a b).
	a := []float64{1, 2, 4}
	out, err = Blur(a, []int{1, 3}, 0.3)
	require.NoError(t, err)
	e := math.Exp(-1 / (2 * 0.3 * 0.3))
	k0, k1 := 1/(1+2*e), e/(1+2*e)
	assert.InDelta(t, k1*1+k0*1+k1*2, out[0], 1e-15)
	assert.InDelta(t, k1*2+k0*4+k1*4, out[2], 1e-15)
	// Blur baseline wiring.
	bl, err := Baseline{Kind: BaselineBlur, Sigma: 0.3}.Build(a, []int{1, 3})
	require.NoError(t, err)
	assert.Equal(t, out, bl)

	_, err = Blur(a, []int{3}, 1)
	assert.ErrorIs(t, err, ErrInput)
	_, err = Blur(a, []int{1, 3}, 0)
	assert.ErrorIs(t, err, ErrOptions)
	_, err = Blur(a, []int{1, 3}, math.NaN())
	assert.ErrorIs(t, err, ErrOptions)
}

func abs(i int) int {
	if i < 0 {
		return -i
	}
	return i
}
