package samples

import (
	"fmt"
	"io"
	"reflect"

	"github.com/apportion/apportion/onnxlite"
)

// ReadPB reads one ONNX TensorProto: the samples are its first axis, and
// its stored shape must fit the declared one. Batch.Tensor keeps the
// tensor, so that it is fed to the model as it is. A tensor with no
// elements along its first axis is read as a batch of no samples when
// Options.AllowEmpty (Read); ReadPB refuses it.
func ReadPB(r io.Reader, spec Spec) (*Batch, error) { return readAll(newPBSource(r, spec, false)) }

// wholeSource hands out the samples of a file read whole: a TensorProto
// has no order in which it could be read in parts, and a text file is
// short.
type wholeSource struct {
	b     *Batch
	given bool // the whole tensor was handed out
}

func newPBSource(r io.Reader, spec Spec, allowEmpty bool) (*wholeSource, error) {
	t, err := onnxlite.DecodeTensor(r, onnxlite.DecodeOptions{})
	if err != nil {
		return nil, fmt.Errorf("reading ONNX tensor: %w", err)
	}
	data, err := t.Float64s()
	if err != nil {
		return nil, fmt.Errorf("tensor %q of type %s: %w", t.Name, TypeName(t.DType), err)
	}
	shape := t.Shape()
	if spec.HasShape {
		if err := matchShape(shape, spec.Shape); err != nil {
			return nil, err
		}
	}
	b := &Batch{Shape: shape, Data: data, Samples: 1, Tensor: t}
	if len(shape) > 0 {
		b.Samples = shape[0]
	}
	if b.Samples == 0 && !allowEmpty {
		return nil, fmt.Errorf("expected at least one sample, got a tensor of shape %s", ShapeString(shape))
	}
	return &wholeSource{b: b}, nil
}

func (s *wholeSource) next(n, first int) (*Batch, error) {
	b := s.b
	switch {
	case first == 0 && n >= b.Samples && !s.given:
		s.given = true // a tensor of no samples, too: it is fed as it is
		return b, nil
	case first >= b.Samples:
		return nil, io.EOF
	}
	hi := min(first+n, b.Samples)
	per := b.SampleSize()
	part := &Batch{Shape: append([]int{hi - first}, b.SampleShape()...), Data: b.Data[first*per : hi*per], Samples: hi - first}
	if b.Tensor != nil {
		t := *b.Tensor
		t.Dims = append([]int64{int64(hi - first)}, t.Dims[1:]...)
		t.Data = reflect.ValueOf(t.Data).Slice(first*per, hi*per).Interface()
		part.Tensor = &t
	}
	return part, nil
}
