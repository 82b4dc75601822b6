package ops

import (
	"github.com/apportion/apportion/nn/internal/asm/f32"

	"fmt"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// Dense makes a tensor of element type dt holding vals.
func Dense(dt tensor.Dtype, shape tensor.Shape, vals []float64) *tensor.Dense {
	if dt == tensor.Float64 {
		return tensor.New(tensor.WithShape(shape.Clone()...), tensor.WithBacking(append([]float64(nil), vals...)))
	}
	f := make([]float32, len(vals))
	f32.Narrow(f, vals)
	return tensor.New(tensor.WithShape(shape.Clone()...), tensor.WithBacking(f))
}

// Fill converts vals into the backing array of t, which holds as many
// elements.
func Fill(t *tensor.Dense, vals []float64) error {
	switch t.Dtype() {
	case tensor.Float64:
		d := t.Float64s()
		if len(d) != len(vals) {
			return fmt.Errorf("expected %d values, got %d", len(d), len(vals))
		}
		copy(d, vals)
	case tensor.Float32:
		d := t.Float32s()
		if len(d) != len(vals) {
			return fmt.Errorf("expected %d values, got %d", len(d), len(vals))
		}
		f32.Narrow(d, vals)
	default:
		return fmt.Errorf("unexpected element type %v", t.Dtype())
	}
	return nil
}

// Floats copies a gorgonia value into a new row-major float64 slice.
func Floats(v G.Value) ([]float64, error) {
	switch t := v.(type) {
	case nil:
		return nil, fmt.Errorf("no value computed")
	case *tensor.Dense:
		if t.RequiresIterator() {
			t = t.Materialize().(*tensor.Dense)
		}
		switch t.Dtype() { // not t.Data(), which allocates through reflection
		case tensor.Float64:
			return append([]float64(nil), t.Float64s()...), nil
		case tensor.Float32:
			d := t.Float32s()
			out := make([]float64, len(d))
			f32.Widen(out, d)
			return out, nil
		}
		return nil, fmt.Errorf("unexpected data %T", t.Data())
	case *G.F64:
		return []float64{float64(*t)}, nil
	case *G.F32:
		return []float64{float64(*t)}, nil
	}
	return nil, fmt.Errorf("unexpected value %T", v)
}
