package onnxlite

import (
	"errors"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestInferWithValueBytes(t *testing.T) {
	// x [N, 4] + ConstantOfShape([rows, 4]): the folded constant holds
	// rows × 4 float32 zeros, 16·rows bytes (onnx/defs ConstantOfShape, IEEE
	// 754 binary32), and Add's output as many again.
	model := func(rows int64) *Model {
		return &Model{IRVersion: 8, Opsets: []OpsetImport{{Version: 13}}, Graph: &Graph{
			Initializers: []*Tensor{{Name: "shape", DType: Int64, Dims: []int64{2}, Data: []int64{rows, 4}}},
			Inputs: []*ValueInfo{{Name: "x", Type: &Type{Kind: KindTensor, Elem: Float, HasShape: true,
				Shape: []Dim{{Param: "N"}, {Value: 4, HasValue: true}}}}},
			Nodes: []*Node{
				{Name: "c", OpType: "ConstantOfShape", Inputs: []string{"shape"}, Outputs: []string{"zeros"}},
				{Name: "a", OpType: "Add", Inputs: []string{"x", "zeros"}, Outputs: []string{"y"}},
			},
			Outputs: []*ValueInfo{{Name: "y", Type: &Type{Kind: KindTensor, Elem: Float}}},
		}}
	}
	in := map[string][]int{"x": {1, 4}}
	// 16 bytes of shape, 16 of x, 16·1000 of zeros and of y.
	st, err := InferWith(model(1000), InferOptions{Shapes: in, MaxValueBytes: 32032})
	require.NoError(t, err)
	assert.Equal(t, []int{1000, 4}, st.Values["y"].Shape)
	_, err = InferWith(model(1000), InferOptions{Shapes: in, MaxValueBytes: 32031})
	var le *LimitError
	require.ErrorAs(t, err, &le)
	assert.Equal(t, LimitError{Limit: "MaxValueBytes", Value: 32032, Max: 32031}, *le)
	assert.Contains(t, err.Error(), `node "a" (Add)`)

	// The constant is refused before it is made: 2^25 rows would be 512 MiB.
	_, err = InferWith(model(1<<25), InferOptions{Shapes: in, MaxValueBytes: 1 << 20})
	require.ErrorAs(t, err, &le)
	assert.Equal(t, int64(16+16+16<<25), le.Value)
	assert.Contains(t, err.Error(), `node "c" (ConstantOfShape)`)
	assert.True(t, errors.Is(err, ErrLimit))
}
