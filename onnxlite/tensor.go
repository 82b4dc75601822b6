package onnxlite

import (
	"fmt"
	"math"
	"reflect"

	"github.com/x448/float16"
)

var dtypeNames = map[DataType]string{
	Undefined: "UNDEFINED", Float: "FLOAT", Uint8: "UINT8", Int8: "INT8",
	Uint16: "UINT16", Int16: "INT16", Int32: "INT32", Int64: "INT64",
	String: "STRING", Bool: "BOOL", Float16: "FLOAT16", Double: "DOUBLE",
	Uint32: "UINT32", Uint64: "UINT64", Complex64: "COMPLEX64",
	Complex128: "COMPLEX128", BFloat16: "BFLOAT16",
}

// String returns the ONNX name of dt (e.g. "FLOAT"), or "DataType(n)" for
// values onnxlite does not know.
func (dt DataType) String() string {
	if s, ok := dtypeNames[dt]; ok {
		return s
	}
	return fmt.Sprintf("DataType(%d)", int32(dt))
}

// sliceType is the Go slice type that holds elements of dt (see Tensor).
func sliceType(dt DataType) reflect.Type {
	switch dt {
	case Float:
		return reflect.TypeFor[[]float32]()
	case Double:
		return reflect.TypeFor[[]float64]()
	case Float16:
		return reflect.TypeFor[[]float16.Float16]()
	case BFloat16:
		return reflect.TypeFor[[]BFloat16Bits]()
	case Int8:
		return reflect.TypeFor[[]int8]()
	case Uint8:
		return reflect.TypeFor[[]uint8]()
	case Int16:
		return reflect.TypeFor[[]int16]()
	case Uint16:
		return reflect.TypeFor[[]uint16]()
	case Int32:
		return reflect.TypeFor[[]int32]()
	case Uint32:
		return reflect.TypeFor[[]uint32]()
	case Int64:
		return reflect.TypeFor[[]int64]()
	case Uint64:
		return reflect.TypeFor[[]uint64]()
	case Bool:
		return reflect.TypeFor[[]bool]()
	case String:
		return reflect.TypeFor[[][]byte]()
	case Complex64:
		return reflect.TypeFor[[]complex64]()
	case Complex128:
		return reflect.TypeFor[[]complex128]()
	}
	return nil
}

// Float32 returns the float32 value of a bfloat16 bit pattern: the pattern
// shifted into the upper half of an IEEE 754 binary32 (exact).
func (b BFloat16Bits) Float32() float32 { return math.Float32frombits(uint32(b) << 16) }

// NewTensor returns a tensor after checking that data has the Go slice type
// that matches dt (see Tensor) and exactly as many elements as dims call for.
// The tensor keeps dims and data without copying them.
func NewTensor(name string, dt DataType, dims []int64, data any) (*Tensor, error) {
	st := sliceType(dt)
	if st == nil {
		return nil, fmt.Errorf("onnxlite: tensor %q: element type %v: %w", name, dt, ErrUnsupportedEncoding)
	}
	if data == nil || reflect.TypeOf(data) != st {
		return nil, fmt.Errorf("onnxlite: tensor %q: %v data must be %v, got %T", name, dt, st, data)
	}
	n, err := elementCount(dims, math.MaxInt64)
	if err != nil {
		return nil, fmt.Errorf("onnxlite: tensor %q: %w", name, err)
	}
	if got := int64(reflect.ValueOf(data).Len()); got != n {
		return nil, fmt.Errorf("onnxlite: tensor %q: dims %v need %d elements, data has %d", name, dims, n, got)
	}
	return &Tensor{Name: name, DType: dt, Dims: dims, Data: data}, nil
}

// NumElements returns the product of the dims (1 for a scalar), or -1 when
// a dim is negative or the product overflows int64. Decoded tensors always
// have a valid count.
func (t *Tensor) NumElements() int64 {
	n, err := elementCount(t.Dims, math.MaxInt64)
	if err != nil {
		return -1
	}
	return n
}

// Shape returns the dims as ints.
func (t *Tensor) Shape() []int {
	s := make([]int, len(t.Dims))
	for i, d := range t.Dims {
		s[i] = int(d)
	}
	return s
}

// Float64s returns the elements converted to float64. Every real numeric type
// converts (integers, float16, bfloat16, and bool as 0 or 1); STRING and the
// complex types are an error. 64-bit integers beyond 2^53 round to the nearest
// float64.
func (t *Tensor) Float64s() ([]float64, error) {
	switch d := t.Data.(type) {
	case []float64:
		return append([]float64(nil), d...), nil
	case []float32:
		return convert(d, func(v float32) float64 { return float64(v) }), nil
	case []float16.Float16:
		return convert(d, func(v float16.Float16) float64 { return float64(v.Float32()) }), nil
	case []BFloat16Bits:
		return convert(d, func(v BFloat16Bits) float64 { return float64(v.Float32()) }), nil
	case []int8:
		return convert(d, func(v int8) float64 { return float64(v) }), nil
	case []uint8:
		return convert(d, func(v uint8) float64 { return float64(v) }), nil
	case []int16:
		return convert(d, func(v int16) float64 { return float64(v) }), nil
	case []uint16:
		return convert(d, func(v uint16) float64 { return float64(v) }), nil
	case []int32:
		return convert(d, func(v int32) float64 { return float64(v) }), nil
	case []uint32:
		return convert(d, func(v uint32) float64 { return float64(v) }), nil
	case []int64:
		return convert(d, func(v int64) float64 { return float64(v) }), nil
	case []uint64:
		return convert(d, func(v uint64) float64 { return float64(v) }), nil
	case []bool:
		return convert(d, func(v bool) float64 { return b2f(v) }), nil
	}
	return nil, fmt.Errorf("onnxlite: tensor %q: %v (%T) does not convert to float64", t.Name, t.DType, t.Data)
}

// Float32s returns the elements converted to float32, like Float64s;
// float64 values round to the nearest float32.
func (t *Tensor) Float32s() ([]float32, error) {
	switch d := t.Data.(type) {
	case []float32:
		return append([]float32(nil), d...), nil
	case []float16.Float16:
		return convert(d, func(v float16.Float16) float32 { return v.Float32() }), nil
	case []BFloat16Bits:
		return convert(d, func(v BFloat16Bits) float32 { return v.Float32() }), nil
	}
	f, err := t.Float64s()
	if err != nil {
		return nil, fmt.Errorf("onnxlite: tensor %q: %v (%T) does not convert to float32", t.Name, t.DType, t.Data)
	}
	return convert(f, func(v float64) float32 { return float32(v) }), nil
}

// Int64s returns the elements of an integer or bool tensor as int64. Floating
// types, STRING and complex types are an error, and so is a UINT64 value
// above math.MaxInt64.
func (t *Tensor) Int64s() ([]int64, error) {
	switch d := t.Data.(type) {
	case []int64:
		return append([]int64(nil), d...), nil
	case []int8:
		return convert(d, func(v int8) int64 { return int64(v) }), nil
	case []uint8:
		return convert(d, func(v uint8) int64 { return int64(v) }), nil
	case []int16:
		return convert(d, func(v int16) int64 { return int64(v) }), nil
	case []uint16:
		return convert(d, func(v uint16) int64 { return int64(v) }), nil
	case []int32:
		return convert(d, func(v int32) int64 { return int64(v) }), nil
	case []uint32:
		return convert(d, func(v uint32) int64 { return int64(v) }), nil
	case []bool:
		return convert(d, func(v bool) int64 { return int64(b2f(v)) }), nil
	case []uint64:
		out := make([]int64, len(d))
		for i, v := range d {
			if v > math.MaxInt64 {
				return nil, fmt.Errorf("onnxlite: tensor %q: element %d = %d does not fit int64", t.Name, i, v)
			}
			out[i] = int64(v)
		}
		return out, nil
	}
	return nil, fmt.Errorf("onnxlite: tensor %q: %v (%T) is not an integer type", t.Name, t.DType, t.Data)
}

func convert[S, D any](src []S, f func(S) D) []D {
	out := make([]D, len(src))
	for i, v := range src {
		out[i] = f(v)
	}
	return out
}

func b2f(v bool) float64 {
	if v {
		return 1
	}
	return 0
}

// checkTensor reports whether t's Data has the slice type and length its
// DType and Dims call for.
func checkTensor(t *Tensor) error {
	if t == nil {
		return fmt.Errorf("nil tensor")
	}
	st := sliceType(t.DType)
	if st == nil {
		return fmt.Errorf("tensor %q: element type %v: %w", t.Name, t.DType, ErrUnsupportedEncoding)
	}
	if t.Data == nil || reflect.TypeOf(t.Data) != st {
		return fmt.Errorf("tensor %q: %v data must be %v, got %T", t.Name, t.DType, st, t.Data)
	}
	n, err := elementCount(t.Dims, math.MaxInt64)
	if err != nil {
		return fmt.Errorf("tensor %q: %w", t.Name, err)
	}
	if got := int64(reflect.ValueOf(t.Data).Len()); got != n {
		return fmt.Errorf("tensor %q: dims %v need %d elements, data has %d", t.Name, t.Dims, n, got)
	}
	return nil
}

// maxExact is 2^53: every integer of smaller magnitude is a float64.
const maxExact = 1 << 53

// FromFloat64s returns a tensor of type dt holding vals: floating-point
// types rounded to nearest, ties to even (float16 and bfloat16 through
// float32); integer types only for whole numbers that the type holds and
// that float64 holds exactly (|v| ≤ 2^53), an error naming the first
// element otherwise; BOOL true for every non-zero value.
func FromFloat64s(name string, dt DataType, dims []int64, vals []float64) (*Tensor, error) {
	var data any
	switch dt {
	case Float, Double:
		data = floatsAs(dt, vals)
	case Float16:
		data = convert(vals, func(v float64) float16.Float16 { return float16.Fromfloat32(float32(v)) })
	case BFloat16:
		data = convert(vals, func(v float64) BFloat16Bits { return bfloat16Of(float32(v)) })
	case Bool:
		data = convert(vals, func(v float64) bool { return v != 0 })
	default:
		if !isIntType(dt) {
			return nil, fmt.Errorf("onnxlite: tensor %q: element type %v: %w", name, dt, ErrUnsupportedEncoding)
		}
		ints := make([]int64, len(vals))
		for i, v := range vals {
			if v != math.Trunc(v) || math.Abs(v) > maxExact {
				return nil, fmt.Errorf("onnxlite: tensor %q: element %d = %v is not an integer of magnitude at most 2^53", name, i, v)
			}
			ints[i] = int64(v)
		}
		if err := checkRange(dt, ints); err != nil {
			return nil, fmt.Errorf("onnxlite: tensor %q: %w", name, err)
		}
		data = intsAs(dt, ints)
	}
	return NewTensor(name, dt, dims, data)
}

// checkRange reports the first value of v that integer type dt does not hold.
func checkRange(dt DataType, v []int64) error {
	lo, hi := intRange(dt)
	for i, x := range v {
		if x < lo || x > hi {
			return fmt.Errorf("element %d = %d does not fit %v", i, x, dt)
		}
	}
	return nil
}

// intRange returns the values an integer or boolean type holds as int64,
// and for FLOAT16 and BFLOAT16 those of their 16-bit patterns (how
// TensorProto stores them in int32_data); UINT64 is capped at the int64
// maximum.
func intRange(dt DataType) (lo, hi int64) {
	switch dt {
	case Int8:
		return math.MinInt8, math.MaxInt8
	case Uint8:
		return 0, math.MaxUint8
	case Int16:
		return math.MinInt16, math.MaxInt16
	case Uint16, Float16, BFloat16:
		return 0, math.MaxUint16
	case Int32:
		return math.MinInt32, math.MaxInt32
	case Uint32:
		return 0, math.MaxUint32
	case Bool:
		return 0, 1
	case Uint64:
		return 0, math.MaxInt64
	}
	return math.MinInt64, math.MaxInt64
}

// bfloat16Of rounds x to the nearest bfloat16, ties to even; a NaN stays a
// (quiet) NaN.
func bfloat16Of(x float32) BFloat16Bits {
	b := math.Float32bits(x)
	if x != x {
		return BFloat16Bits(b>>16 | 0x40)
	}
	b += 0x7fff + (b>>16)&1
	return BFloat16Bits(b >> 16)
}
