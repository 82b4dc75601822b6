package samples

import (
	"fmt"
	"math"
	"strconv"

	"github.com/apportion/apportion/onnxlite"
)

// typeNames are the element type names in messages and documents, as Go
// and NumPy spell them.
var typeNames = map[onnxlite.DataType]string{
	onnxlite.Undefined:  "undefined",
	onnxlite.Float:      "float32",
	onnxlite.Uint8:      "uint8",
	onnxlite.Int8:       "int8",
	onnxlite.Uint16:     "uint16",
	onnxlite.Int16:      "int16",
	onnxlite.Int32:      "int32",
	onnxlite.Int64:      "int64",
	onnxlite.String:     "string",
	onnxlite.Bool:       "bool",
	onnxlite.Float16:    "float16",
	onnxlite.Double:     "float64",
	onnxlite.Uint32:     "uint32",
	onnxlite.Uint64:     "uint64",
	onnxlite.Complex64:  "complex64",
	onnxlite.Complex128: "complex128",
	onnxlite.BFloat16:   "bfloat16",
}

// TypeName names an element type as Go and NumPy do: float32, int64.
func TypeName(t onnxlite.DataType) string {
	if n, ok := typeNames[t]; ok {
		return n
	}
	return "type" + strconv.Itoa(int(t))
}

// ToTensor returns the batch as a tensor of the spec's element type: the .pb
// tensor as it was read, otherwise the values converted (float32 for an
// undeclared type; float16 and bfloat16 rounded to nearest; integers must
// be whole and fit the type; bool true for every non-zero value).
func (b *Batch) ToTensor(spec Spec) (*onnxlite.Tensor, error) {
	if b.Tensor != nil {
		return b.Tensor, nil
	}
	return tensorOf(spec, b.Shape, b.Data)
}

// SampleTensor returns sample i as a tensor of one sample (a leading
// dimension of 1) of the spec's element type, converted as ToTensor does.
func (b *Batch) SampleTensor(i int, spec Spec) (*onnxlite.Tensor, error) {
	if i < 0 || i >= b.Samples {
		return nil, fmt.Errorf("sample %d of %d", i, b.Samples)
	}
	shape := append([]int{1}, b.SampleShape()...)
	if b.Tensor != nil && len(b.Shape) == 0 {
		shape = nil // a scalar tensor is its only sample
	}
	dt := spec.Elem
	if b.Tensor != nil {
		dt = b.Tensor.DType
	}
	return tensorOf(Spec{Name: spec.Name, Elem: dt}, shape, b.Sample(i))
}

// tensorOf converts values to a tensor of spec's element type.
func tensorOf(spec Spec, shape []int, data []float64) (*onnxlite.Tensor, error) {
	dims := make([]int64, len(shape))
	for i, d := range shape {
		dims[i] = int64(d)
	}
	dt := spec.Elem
	if dt == onnxlite.Undefined {
		dt = onnxlite.Float
	}
	switch dt {
	case onnxlite.Float, onnxlite.Double, onnxlite.Float16, onnxlite.BFloat16, onnxlite.Bool:
	default:
		for i, v := range data {
			if v != math.Trunc(v) {
				return nil, fmt.Errorf("input %q is %s: value %v at position %d is not an integer", spec.Name, TypeName(dt), v, i)
			}
		}
	}
	t, err := onnxlite.FromFloat64s(spec.Name, dt, dims, data)
	if err != nil {
		return nil, fmt.Errorf("input %q is %s: %w", spec.Name, TypeName(dt), err)
	}
	return t, nil
}
