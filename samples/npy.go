package samples

import (
	"fmt"
	"io"

	"codeberg.org/sbinet/npyio/npy"
)

// ReadNPY reads a NumPy .npy array of any real, integer or boolean dtype,
// in C or Fortran order (NEP 1, "A Simple File Format for NumPy Arrays").
func ReadNPY(r io.Reader, spec Spec) (*Batch, error) {
	nr, err := npy.NewReader(r)
	if err != nil {
		return nil, fmt.Errorf("reading .npy header: %w", err)
	}
	shape := append([]int(nil), nr.Header.Descr.Shape...)
	var arr npy.Array
	if err := readSafely(func() error { return nr.Read(&arr) }); err != nil {
		return nil, fmt.Errorf("reading .npy data (%s, shape %v): %w", nr.Header.Descr.Type, shape, err)
	}
	data, err := floatsOf(arr.Data())
	if err != nil {
		return nil, fmt.Errorf(".npy dtype %s: %w", nr.Header.Descr.Type, err)
	}
	if len(data) != Product(shape) {
		return nil, fmt.Errorf(".npy array of shape %v should hold %d values, got %d", shape, Product(shape), len(data))
	}
	if arr.Fortran() && len(shape) > 1 {
		data = fromFortran(data, shape)
	}
	return newBatch(shape, data, spec)
}

// readSafely is the package's one recovery point: it runs a call into the
// .npy decoder, a dependency that may panic on a malformed file, and turns
// a panic into an error.
func readSafely(f func() error) (err error) {
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("malformed data: %v", r)
		}
	}()
	return f()
}

// fromFortran reorders column-major data of the given shape row-major.
func fromFortran(data []float64, shape []int) []float64 {
	out := make([]float64, len(data))
	idx := make([]int, len(shape))
	for k := range out {
		// k is the row-major position; find the column-major offset.
		off, stride := 0, 1
		for d := 0; d < len(shape); d++ {
			off += idx[d] * stride
			stride *= shape[d]
		}
		out[k] = data[off]
		for d := len(shape) - 1; d >= 0; d-- {
			idx[d]++
			if idx[d] < shape[d] {
				break
			}
			idx[d] = 0
		}
	}
	return out
}

// floatsOf converts a slice of a numeric type to float64.
func floatsOf(v any) ([]float64, error) {
	switch s := v.(type) {
	case []float64:
		return append([]float64(nil), s...), nil
	case []float32:
		return convert(s), nil
	case []int8:
		return convert(s), nil
	case []int16:
		return convert(s), nil
	case []int32:
		return convert(s), nil
	case []int64:
		return convert(s), nil
	case []uint8:
		return convert(s), nil
	case []uint16:
		return convert(s), nil
	case []uint32:
		return convert(s), nil
	case []uint64:
		return convert(s), nil
	case []bool:
		out := make([]float64, len(s))
		for i, b := range s {
			if b {
				out[i] = 1
			}
		}
		return out, nil
	}
	return nil, fmt.Errorf("element type %T is not a real number type", v)
}

// number is the element types a .npy array converts from.
type number interface {
	~float32 | ~float64 | ~int8 | ~int16 | ~int32 | ~int64 | ~uint8 | ~uint16 | ~uint32 | ~uint64
}

func convert[T number](s []T) []float64 {
	out := make([]float64, len(s))
	for i, v := range s {
		out[i] = float64(v)
	}
	return out
}
