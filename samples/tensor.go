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
// undeclared type; integers must be whole).
func (b *Batch) ToTensor(spec Spec) (*onnxlite.Tensor, error) {
	if b.Tensor != nil {
		return b.Tensor, nil
	}
	dims := make([]int64, len(b.Shape))
	for i, d := range b.Shape {
		dims[i] = int64(d)
	}
	t := &onnxlite.Tensor{Name: spec.Name, DType: spec.Elem, Dims: dims}
	switch spec.Elem {
	case onnxlite.Float, onnxlite.Undefined:
		t.DType = onnxlite.Float
		out := make([]float32, len(b.Data))
		for i, v := range b.Data {
			out[i] = float32(v)
		}
		t.Data = out
	case onnxlite.Double:
		t.Data = append([]float64(nil), b.Data...)
	case onnxlite.Int64, onnxlite.Int32:
		ints := make([]int64, len(b.Data))
		for i, v := range b.Data {
			if v != math.Trunc(v) {
				return nil, fmt.Errorf("input %q is %s: value %v at position %d is not an integer", spec.Name, TypeName(spec.Elem), v, i)
			}
			ints[i] = int64(v)
		}
		if spec.Elem == onnxlite.Int64 {
			t.Data = ints
		} else {
			i32 := make([]int32, len(ints))
			for i, v := range ints {
				i32[i] = int32(v)
			}
			t.Data = i32
		}
	default:
		return nil, fmt.Errorf("input %q is %s: only float32, float64, int32 and int64 inputs can be read from .npy, .json or .csv; use a .pb tensor", spec.Name, TypeName(spec.Elem))
	}
	return t, nil
}
