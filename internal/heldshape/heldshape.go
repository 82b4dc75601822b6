// Package heldshape builds, for tests, a small network whose target shape
// is a graph input of its own — a compile-time input, a parameter of the
// graph rather than data — with its closed form.
package heldshape

import (
	"math"

	"github.com/apportion/apportion/onnxlite"
)

// The network's weights: y = softmax(reshape(relu(x·W + b), shape)), x of
// 3 features, 4 hidden units.
var (
	w    = []float64{0.5, -1, 2, 0.25, 1.5, 0.75, -0.5, 1, -2, 0.125, 1, -0.25}
	bias = []float64{0.1, -0.2, 0.3, -0.4}
)

// Model returns the network with x and its weights of element type dt
// (onnxlite.Float or onnxlite.Double), and shape an int64 tensor of 2.
func Model(dt onnxlite.DataType) *onnxlite.Model {
	in := func(name string, dt onnxlite.DataType, dims ...onnxlite.Dim) *onnxlite.ValueInfo {
		return &onnxlite.ValueInfo{Name: name, Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: dt, HasShape: true, Shape: dims}}
	}
	fixed := func(d int64) onnxlite.Dim { return onnxlite.Dim{Value: d, HasValue: true} }
	tensor := func(name string, dims []int64, v []float64) *onnxlite.Tensor {
		if dt == onnxlite.Double {
			return &onnxlite.Tensor{Name: name, DType: dt, Dims: dims, Data: v}
		}
		f := make([]float32, len(v))
		for i, x := range v {
			f[i] = float32(x)
		}
		return &onnxlite.Tensor{Name: name, DType: dt, Dims: dims, Data: f}
	}
	return &onnxlite.Model{IRVersion: 8, Opsets: []onnxlite.OpsetImport{{Version: 13}}, ProducerName: "apportion-test",
		Graph: &onnxlite.Graph{
			Name:         "held_shape",
			Inputs:       []*onnxlite.ValueInfo{in("x", dt, onnxlite.Dim{Param: "N"}, fixed(3)), in("shape", onnxlite.Int64, fixed(2))},
			Outputs:      []*onnxlite.ValueInfo{{Name: "y", Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: dt}}},
			Initializers: []*onnxlite.Tensor{tensor("W", []int64{3, 4}, w), tensor("b", []int64{4}, bias)},
			Nodes: []*onnxlite.Node{
				{Name: "dense", OpType: "Gemm", Inputs: []string{"x", "W", "b"}, Outputs: []string{"h"}},
				{Name: "act", OpType: "Relu", Inputs: []string{"h"}, Outputs: []string{"r"}},
				{Name: "reshape", OpType: "Reshape", Inputs: []string{"r", "shape"}, Outputs: []string{"l"}},
				{Name: "prob", OpType: "Softmax", Inputs: []string{"l"}, Outputs: []string{"y"}},
			},
		}}
}

// F is the closed form of one sample with shape [−1, 4]: the 4 values of
// softmax(relu(x·W + b)), in float64.
func F(x []float64) []float64 {
	z := make([]float64, 4)
	total := 0.0
	for j := range z {
		h := bias[j]
		for i := range 3 {
			h += x[i] * w[i*4+j]
		}
		z[j] = math.Exp(max(h, 0))
		total += z[j]
	}
	for j := range z {
		z[j] /= total
	}
	return z
}
