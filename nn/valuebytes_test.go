package nn

import (
	"bytes"
	"context"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/memprobe"
	"github.com/apportion/apportion/onnxlite"
)

// hugeConstModel is a model of about 150 bytes whose values need
// gigabytes: ConstantOfShape makes a [2^25, 4] float tensor of zeros
// (onnx/defs ConstantOfShape: the output's shape is the input's values),
// which Add broadcasts against the input x [N, 4] (numpy broadcasting).
func hugeConstModel() *onnxlite.Model {
	g := newIR(13, 1)
	g.input("x", -1, 4)
	g.node("Add", []string{"x", g.node("ConstantOfShape", []string{g.ints("shape", 1<<25, 4)}, "zeros")}, "y")
	g.output("y")
	return g.m
}

func TestValueBytesLimit(t *testing.T) {
	m := hugeConstModel()
	var buf bytes.Buffer
	require.NoError(t, onnxlite.Encode(&buf, m))
	assert.Less(t, buf.Len(), 200)

	// Refused before shape inference makes the 512 MiB constant: the
	// whole attempt allocates a few megabytes.
	var err error
	_, allocated := memprobe.Measure(func() {
		var nw *Network
		if nw, err = Compile(m, Options{}); err != nil {
			return
		}
		x := &onnxlite.Tensor{Name: "x", DType: onnxlite.Float, Dims: []int64{1, 4}, Data: make([]float32, 4)}
		_, err = nw.Forward(context.Background(), []*onnxlite.Tensor{x})
	})
	require.ErrorIs(t, err, ErrTooLarge)
	assert.ErrorIs(t, err, onnxlite.ErrLimit)
	assert.Contains(t, err.Error(), "the program for input shape [1 4] needs more than 512.0 MiB for its values, over the limit of 256.0 MiB on one program")
	assert.Less(t, allocated, uint64(64<<20))

	// A model whose values fit the limit, and not twice over with their
	// gradients: forward passes run, gradients are refused. The MLP
	// 30-64-64-2 at batch 1 in float32 holds its weights (6,464 floats)
	// and a few activations: about 26 KB, 27 KB with the gradients of its
	// activations.
	mlp := mlpModel(30, 64, 2, 1)
	nw, err := Compile(mlp, Options{MaxValueBytes: 26800})
	require.NoError(t, err)
	x := &onnxlite.Tensor{Name: "x", DType: onnxlite.Float, Dims: []int64{1, 30}, Data: make([]float32, 30)}
	_, err = nw.Forward(context.Background(), []*onnxlite.Tensor{x})
	require.NoError(t, err)
	h, err := nw.Head(Selection{})
	require.NoError(t, err)
	_, _, err = h.Gradient(context.Background(), make([]float64, 30), 1, []int{0})
	require.ErrorIs(t, err, ErrTooLarge)
	assert.Contains(t, err.Error(), "for its values and their gradients")
}

// BenchmarkTooLargeRefused reports the peak heap of compiling and running
// the 150-byte model whose values would take 1 GiB at batch 1: refused by
// the limit on value bytes before any of them is made.
func BenchmarkTooLargeRefused(b *testing.B) {
	m := hugeConstModel()
	x := &onnxlite.Tensor{Name: "x", DType: onnxlite.Float, Dims: []int64{1, 4}, Data: make([]float32, 4)}
	var peak uint64
	for b.Loop() {
		p, _ := memprobe.Measure(func() {
			nw, err := Compile(m, Options{})
			if err == nil {
				_, err = nw.Forward(context.Background(), []*onnxlite.Tensor{x})
			}
			if err == nil {
				b.Fatal("a model of 1 GiB of values ran")
			}
		})
		peak = max(peak, p)
	}
	b.ReportMetric(float64(peak)/1e6, "peak-heap-MB")
}
