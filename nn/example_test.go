package nn_test

import (
	"bytes"
	"context"
	"fmt"
	"log"

	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
)

// Example builds the model y = tanh(W·x + b) for two inputs and two
// outputs, writes it as ONNX and reads it back, compiles it, and takes the
// outputs and the gradient of the second output at x = (0.5, −1). The
// printed values are the closed form y_k = tanh(Σ_i W_ki·x_i + b_k) and
// ∂y_k/∂x_i = (1 − y_k²)·W_ki (d tanh z/dz = 1 − tanh² z), rounded:
// z = (−1.5, −0.75), y = (tanh −1.5, tanh −0.75) and
// ∂y₁/∂x = (1 − tanh² −0.75)·(−1, 0.5).
func Example() {
	matrix := func(name string, dims []int64, v ...float64) *onnxlite.Tensor {
		return &onnxlite.Tensor{Name: name, DType: onnxlite.Double, Dims: dims, Data: v}
	}
	x := &onnxlite.ValueInfo{Name: "x", Type: &onnxlite.Type{Kind: onnxlite.KindTensor, Elem: onnxlite.Double,
		HasShape: true, Shape: []onnxlite.Dim{{Param: "N"}, {Value: 2, HasValue: true}}}}
	model := &onnxlite.Model{
		IRVersion: 8,
		Opsets:    []onnxlite.OpsetImport{{Version: 13}},
		Graph: &onnxlite.Graph{
			Inputs:       []*onnxlite.ValueInfo{x},
			Outputs:      []*onnxlite.ValueInfo{{Name: "y"}},
			Initializers: []*onnxlite.Tensor{matrix("W", []int64{2, 2}, 1, 2, -1, 0.5), matrix("b", []int64{2}, 0, 0.25)},
			Nodes: []*onnxlite.Node{
				{OpType: "Gemm", Inputs: []string{"x", "W", "b"}, Outputs: []string{"z"},
					Attrs: []*onnxlite.Attribute{{Name: "transB", Type: onnxlite.AttrInt, I: 1}}},
				{OpType: "Tanh", Inputs: []string{"z"}, Outputs: []string{"y"}},
			},
		},
	}
	var file bytes.Buffer
	if err := onnxlite.Encode(&file, model); err != nil {
		log.Fatal(err)
	}
	m, err := onnxlite.Decode(&file, onnxlite.DecodeOptions{})
	if err != nil {
		log.Fatal(err)
	}

	nw, err := nn.Compile(m, nn.Options{DType: nn.Float64})
	if err != nil {
		log.Fatal(err)
	}
	h, err := nw.Head(nn.Selection{})
	if err != nil {
		log.Fatal(err)
	}
	y, grad, err := h.Gradient(context.Background(), []float64{0.5, -1}, 1, []int{1})
	if err != nil {
		log.Fatal(err)
	}
	fmt.Printf("y = %.4f\n", y)
	fmt.Printf("∂y₁/∂x = %.4f\n", grad)
	// Output:
	// y = [-0.9051 -0.6351]
	// ∂y₁/∂x = [-0.5966 0.2983]
}
