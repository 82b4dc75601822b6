package explain

import (
	"context"
	"errors"
	"fmt"

	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

// PredictBatch runs the model on batch b for its one run-time input, read
// as spec says, as Predict does, and fills Rows with every sample's index
// (b.First onwards). A sample that could not be read is an error.
func (m *Model) PredictBatch(ctx context.Context, b *samples.Batch, spec samples.Spec) (*Prediction, error) {
	if err := b.FirstBad(); err != nil {
		return nil, err
	}
	t, err := b.ToTensor(spec)
	if err != nil {
		return nil, err
	}
	p, err := m.Predict(ctx, []*onnxlite.Tensor{t})
	if err != nil {
		return nil, err
	}
	p.Rows = make([]int, b.Samples)
	for i := range p.Rows {
		p.Rows[i] = b.First + i
	}
	return p, nil
}

// PredictSamples is PredictBatch keeping the good samples of b: a sample
// that could not be read (b.Bad), holds a value that is not finite, or
// that the engine refuses for what it holds (nn.ErrBadRequest: an index
// out of range, found by running the samples one by one once the batch is
// refused) is left out and listed in Errors, in the user's words. Rows
// lists the indices (b.First onwards) of the samples whose outputs
// Outputs holds, in order; Outputs is nil when no sample could be run.
// Other errors of the model are returned.
func (m *Model) PredictSamples(ctx context.Context, b *samples.Batch, spec samples.Spec) (*Prediction, error) {
	good, bad := goodSamples(b)
	if good.Samples == 0 {
		return &Prediction{Rows: []int{}, Errors: bad}, nil
	}
	p, err := m.PredictBatch(ctx, good.Batch, spec)
	if err == nil {
		for k, i := range good.rows {
			p.Rows[k] = b.First + i
		}
		p.Errors = bad
		return p, nil
	}
	if !errors.Is(err, nn.ErrBadRequest) {
		return nil, err
	}
	var all *Prediction
	rows := []int{}
	shape := good.SampleShape()
	for k, i := range good.rows {
		one := &samples.Batch{Shape: append([]int{1}, shape...), Samples: 1, Name: b.Name, First: b.First + i, Data: good.Sample(k)}
		res, err := m.PredictBatch(ctx, one, spec)
		switch {
		case errors.Is(err, nn.ErrBadRequest):
			bad = append(bad, RowError{Index: b.First + i, Error: err.Error()})
			continue
		case err != nil:
			return nil, err
		}
		if all == nil {
			all = res
		} else if err := all.Append(res, 1); err != nil {
			return nil, err
		}
		rows = append(rows, b.First+i)
	}
	if all == nil {
		all = &Prediction{}
	}
	all.Rows, all.Errors = rows, bad
	return all, nil
}

// Append appends the outputs of q, a prediction of the n samples that
// follow p's, along the outputs' first axis: for a prediction made in
// parts. An output without a batch axis of n is an error that says to give
// the input whole.
func (p *Prediction) Append(q *Prediction, n int) error {
	if len(q.Outputs) != len(p.Outputs) {
		return fmt.Errorf("internal error: a batch has %d outputs, the first had %d", len(q.Outputs), len(p.Outputs))
	}
	for i := range p.Outputs {
		a, o := &p.Outputs[i], q.Outputs[i]
		if len(a.Shape) == 0 || len(o.Shape) == 0 || o.Shape[0] != n {
			return fmt.Errorf("output %q of shape %v has no batch axis to run the input in batches; give it whole (for example as a .pb tensor)", o.Name, o.Shape)
		}
		a.Shape[0] += n
		a.Data.Values = append(a.Data.Values, o.Data.Values...)
	}
	return nil
}

// goodBatch is the samples of a batch that can be run, and their indices
// in it.
type goodBatch struct {
	*samples.Batch
	rows []int
}

// goodSamples splits b into the samples that can be run and the errors of
// the others (by index in the whole input). A batch without bad samples
// is returned as it is (a .pb tensor keeps its tensor).
func goodSamples(b *samples.Batch) (goodBatch, []RowError) {
	var errs []RowError
	var rows []int
	for i := 0; i < b.Samples; i++ {
		err := b.Bad[i]
		if err == nil && b.Tensor == nil {
			err = samples.CheckFinite(b.Sample(i))
		}
		if err != nil {
			errs = append(errs, RowError{Index: b.First + i, Error: err.Error()})
			continue
		}
		rows = append(rows, i)
	}
	if len(errs) == 0 {
		return goodBatch{Batch: b, rows: rows}, nil
	}
	g := &samples.Batch{Shape: append([]int{len(rows)}, b.SampleShape()...), Samples: len(rows), Name: b.Name, First: b.First}
	for _, i := range rows {
		g.Data = append(g.Data, b.Sample(i)...)
	}
	return goodBatch{Batch: g, rows: rows}, errs
}
