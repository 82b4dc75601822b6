package ops

import (
	"testing"

	"github.com/stretchr/testify/assert"
	"gorgonia.org/tensor"
)

func TestMayWrite(t *testing.T) {
	// Two half-open byte ranges [lo, hi) share a byte exactly when each
	// starts before the other ends (interval intersection; common
	// practice). The output may never share a byte with an input, and may
	// coincide with an in-place input only as a whole: the same first byte
	// and the same length.
	arr := make([]float32, 16)
	other := make([]float32, 8)
	a64 := make([]float64, 8)
	for _, c := range []struct {
		name    string
		out     span
		inPlace []span
		ins     []span
		want    bool
	}{
		{"disjoint arrays", spanOf(arr[:8]), nil, []span{spanOf(other)}, true},
		{"adjacent halves of one array", spanOf(arr[:8]), nil, []span{spanOf(arr[8:])}, true},
		{"adjacent, input first", spanOf(arr[8:]), nil, []span{spanOf(arr[:8])}, true},
		{"adjacent float64", spanOf(a64[2:4]), nil, []span{spanOf(a64[:2]), spanOf(a64[4:])}, true},
		{"overlap by one element", spanOf(arr[:8]), nil, []span{spanOf(arr[7:9])}, false},
		{"output starts inside the input", spanOf(arr[4:12]), nil, []span{spanOf(arr[:8])}, false},
		{"input starts inside the output", spanOf(arr[:8]), nil, []span{spanOf(arr[4:12])}, false},
		{"input inside the output", spanOf(arr[:16]), nil, []span{spanOf(arr[4:8])}, false},
		{"same memory, not in place", spanOf(arr[:8]), nil, []span{spanOf(arr[:8])}, false},
		{"same memory, in place", spanOf(arr[:8]), []span{spanOf(arr[:8])}, nil, true},
		{"in place, same start, shorter", spanOf(arr[:8]), []span{spanOf(arr[:4])}, nil, false},
		{"in place, same start, longer", spanOf(arr[:8]), []span{spanOf(arr[:12])}, nil, false},
		{"in place, shifted by one element", spanOf(arr[1:9]), []span{spanOf(arr[:8])}, nil, false},
		{"in place, disjoint", spanOf(arr[:8]), []span{spanOf(arr[8:])}, nil, true},
		{"in place exact, another input overlaps", spanOf(arr[:8]), []span{spanOf(arr[:8])}, []span{spanOf(arr[6:10])}, false},
		{"in place exact, another input adjacent", spanOf(arr[:8]), []span{spanOf(arr[:8])}, []span{spanOf(arr[8:])}, true},
		{"empty input", spanOf(arr[:8]), nil, []span{spanOf(arr[4:4])}, true},
		{"empty output", spanOf(arr[4:4]), nil, []span{spanOf(arr[:8])}, true},
		{"float64 view of the same bytes", spanOf(a64[:4]), nil, []span{spanOf(a64[3:5])}, false},
	} {
		assert.Equal(t, c.want, mayWrite(c.out, c.inPlace, c.ins...), c.name)
	}
}

func TestWritable(t *testing.T) {
	// writable hands an op its prealloc only when the op may write its
	// result there: a contiguous dense tensor of the result's element type
	// and shape (the buffer contract of gorgonia's UsePreallocDoer, common
	// practice) whose memory mayWrite allows.
	back := make([]float32, 24)
	pre := tensor.New(tensor.WithShape(2, 3), tensor.WithBacking(back[:6]))
	in := tensor.New(tensor.WithShape(2, 3), tensor.WithBacking(back[6:12]))
	shape := []int{2, 3}
	assert.Same(t, pre, writable(pre, tensor.Float32, shape, nil, denseSpan(in)))
	assert.Nil(t, writable(pre, tensor.Float64, shape, nil, denseSpan(in)), "element type")
	assert.Nil(t, writable(pre, tensor.Float32, []int{3, 2}, nil, denseSpan(in)), "shape")
	assert.Nil(t, writable(nil, tensor.Float32, shape, nil), "no buffer")
	assert.Nil(t, writable(pre, tensor.Float32, shape, nil, denseSpan(pre)), "the buffer is an input")
	shifted := tensor.New(tensor.WithShape(2, 3), tensor.WithBacking(back[3:9]))
	assert.Nil(t, writable(pre, tensor.Float32, shape, nil, denseSpan(shifted)), "the buffer overlaps an input")
	assert.Same(t, pre, writable(pre, tensor.Float32, shape, []span{denseSpan(pre)}), "in place")
	view := tensor.New(tensor.WithShape(3, 2), tensor.WithBacking(back[12:18]))
	assert.NoError(t, view.T())
	assert.True(t, view.RequiresIterator())
	assert.Nil(t, writable(view, tensor.Float32, shape, nil), "a transposed view is not contiguous")
}
