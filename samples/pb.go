package samples

import (
	"fmt"
	"io"

	"github.com/apportion/apportion/onnxlite"
)

// ReadPB reads one ONNX TensorProto: the samples are its first axis, and
// its stored shape must fit the declared one. Batch.Tensor keeps the
// tensor, so that it is fed to the model as it is. A tensor with no
// elements along its first axis is read as a batch of no samples (Read
// refuses it unless Options.AllowEmpty).
func ReadPB(r io.Reader, spec Spec) (*Batch, error) {
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
	return b, nil
}
