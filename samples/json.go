package samples

import (
	"encoding/json"
	"fmt"
	"io"
	"math"
	"slices"
	"strconv"
)

// ReadJSON reads one JSON document of nested arrays of numbers: one
// sample, or an array of samples, of the declared per-sample shape (nested
// to it, or flat). When the per-sample shape is fully declared, a top-level
// array is read element by element, so that one malformed sample is marked
// bad in the batch and the others are kept.
func ReadJSON(r io.Reader, spec Spec) (*Batch, error) { return readAll(newJSONSource(r, spec)) }

// newJSONSource reads the document whole and hands out its samples.
func newJSONSource(r io.Reader, spec Spec) (*pbSource, error) {
	b, err := readJSONWhole(r, spec)
	if err != nil {
		return nil, err
	}
	return &pbSource{b: b}, nil
}

func readJSONWhole(r io.Reader, spec Spec) (*Batch, error) {
	dec := json.NewDecoder(r)
	dec.UseNumber()
	var v any
	if err := dec.Decode(&v); err != nil {
		return nil, fmt.Errorf("reading JSON: %w", err)
	}
	if _, err := dec.Token(); err != io.EOF {
		return nil, fmt.Errorf("reading JSON: expected one array, got more data after it")
	}
	var shape []int
	var data []float64
	err := flattenJSON(v, "", 0, &shape, &data)
	if err == nil {
		return newBatch(shape, data, spec)
	}
	if b := readJSONSamples(v, spec); b != nil {
		return b, nil
	}
	return nil, err
}

// readJSONSamples reads a top-level array as a list of samples one by one,
// so that one malformed sample does not cost the others. It returns nil
// unless the per-sample shape is fully known and at least one element is a
// well-formed sample.
func readJSONSamples(v any, spec Spec) *Batch {
	list, isList := v.([]any)
	ps, ok := spec.FixedSample()
	if !isList || len(list) == 0 || !ok {
		return nil
	}
	p := Product(ps)
	b := &Batch{Shape: append([]int{len(list)}, ps...), Samples: len(list), Data: make([]float64, 0, p*len(list))}
	good := 0
	for i, e := range list {
		var shape []int
		var data []float64
		err := flattenJSON(e, "["+strconv.Itoa(i)+"]", 0, &shape, &data)
		if err == nil && len(data) == p && !slices.Equal(shape, ps) && !slices.Equal(shape, []int{p}) {
			err = fmt.Errorf("expected a sample of shape %s or %d flat values, got shape %s", ShapeString(ps), p, ShapeString(shape))
		} else if err == nil && len(data) != p {
			err = fmt.Errorf("expected %d values (shape %s), got %d (shape %s)", p, ShapeString(ps), len(data), ShapeString(shape))
		}
		if err != nil {
			b.markBad(i, err)
			for j := 0; j < p; j++ {
				b.Data = append(b.Data, math.NaN())
			}
			continue
		}
		good++
		b.Data = append(b.Data, data...)
	}
	if good == 0 {
		return nil
	}
	return b
}

// flattenJSON appends the numbers of v to data, fixing shape on the first
// visit of each depth and reporting ragged arrays by their path.
func flattenJSON(v any, path string, depth int, shape *[]int, data *[]float64) error {
	at := path
	if at == "" {
		at = "the top level"
	}
	switch x := v.(type) {
	case []any:
		if depth == len(*shape) && len(*data) == 0 {
			*shape = append(*shape, len(x))
		} else if depth >= len(*shape) {
			return fmt.Errorf("ragged array at %s: expected a number, got an array", at)
		} else if (*shape)[depth] != len(x) {
			return fmt.Errorf("ragged array at %s: expected %d elements, got %d", at, (*shape)[depth], len(x))
		}
		for i, e := range x {
			if err := flattenJSON(e, path+"["+strconv.Itoa(i)+"]", depth+1, shape, data); err != nil {
				return err
			}
		}
		return nil
	case json.Number:
		if depth != len(*shape) {
			return fmt.Errorf("ragged array at %s: expected an array of %d elements, got a number", at, (*shape)[depth])
		}
		f, err := strconv.ParseFloat(string(x), 64)
		if err != nil || math.IsInf(f, 0) {
			return fmt.Errorf("at %s: %s is out of the float64 range", at, x)
		}
		*data = append(*data, f)
		return nil
	case nil:
		return fmt.Errorf("at %s: expected a number, got null", at)
	default:
		return fmt.Errorf("at %s: expected a number or an array, got %T %v", at, v, v)
	}
}

// appendNaN appends n NaNs, the values of a sample that cannot be read.
func appendNaN(dst []float64, n int) []float64 {
	for range n {
		dst = append(dst, math.NaN())
	}
	return dst
}
